"""Key paths (``rights[1].window``) and plain-words descriptions of values, for the messages of
the loader (realopt.project) and of the model's validator (realopt.validate)."""
from __future__ import annotations

import math


class Index(int):
    """A list position inside a key path (shown as ``[i]``); other parts are mapping keys."""


def format_path(path) -> str:
    """('rights', Index(1), 'window') -> 'rights[1].window'."""
    out = ""
    for part in path:
        if isinstance(part, Index):
            out += f"[{int(part)}]"
        else:
            out += ("." if out else "") + str(part)
    return out or "(top level)"


def describe(value) -> str:
    """A short plain-words description of a raw YAML value, for messages."""
    if value is None:
        return "nothing (an empty value)"
    if isinstance(value, bool):
        return f"{'true' if value else 'false'} (a yes/no value)"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return f"{value:g}"
    if isinstance(value, str):
        text = value if len(value) <= 40 else value[:37] + "..."
        return f'the text "{text}"'
    if isinstance(value, list):
        return f"a list of {len(value)} item{'s' if len(value) != 1 else ''}"
    if isinstance(value, dict):
        keys = [str(k) for k in value][:4]
        more = ", ..." if len(value) > 4 else ""
        return f"a mapping ({', '.join(keys)}{more})" if keys else "an empty mapping"
    return type(value).__name__


def _float_text(text: str):
    try:
        v = float(text.replace("_", ""))
    except (ValueError, AttributeError):
        return None
    return v if math.isfinite(v) else None
