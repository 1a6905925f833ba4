"""Text clean-up shared by every output (terminal, HTML, Markdown, PDF); imports nothing heavy,
so the command line may use it without loading pandas or matplotlib."""
from __future__ import annotations

import re

_NEG_ZERO = re.compile(r"(?<![\w.,])-(0(?:\.0+)?)(?![\d.,]*[1-9])(?![\w])")


def no_negative_zero(text: str) -> str:
    """``text`` with every "-0.00" (a tiny negative rounded to zero, any number of zeros)
    written "0.00": applied to every text shown, the engine's own sentences too."""
    return _NEG_ZERO.sub(r"\1", text) if "-0" in text else text
