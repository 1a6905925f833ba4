"""Decision rights: one module per right type (registered in :mod:`.registry`) and the state
graph they compile into (:mod:`.graph`)."""
from .graph import (MAX_STATES, Edge, State, StateGraph, base_description,  # noqa: F401
                    base_scale_fixed, build_state_graph, check_state_graph, held_switches,
                    prepared_rights, requirement_closure, structure_warnings, unusable_rights,
                    usable_subset)
from .base import Action, threshold_side  # noqa: F401
from .registry import RIGHT_TYPES, example_project, right_keys, right_type  # noqa: F401
