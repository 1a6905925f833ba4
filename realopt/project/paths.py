"""Key paths and plain-words descriptions of raw values, shared by every stage of the loader
(they live in realopt.keypaths, shared with the model's validator)."""
from __future__ import annotations

from ..keypaths import Index, _float_text, describe, format_path  # noqa: F401
