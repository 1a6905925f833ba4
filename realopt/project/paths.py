"""Key paths and plain-words descriptions of raw values, shared by every stage of the loader
(they live in realopt.validate, which the Python API's checks share)."""
from __future__ import annotations

from ..validate import Index, _float_text, describe, format_path  # noqa: F401
