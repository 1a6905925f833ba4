"""Values written back as a project file states them (for moved copies and Python projects)."""
from __future__ import annotations

from dataclasses import replace

from ..model import Schedule


def schedule_raw(s: Schedule):
    """A Schedule as the file writes it: a number, {year: amount}, {start, growth} or (under
    valuation: simulation) the text of a money formula over the drivers."""
    if s.formula is not None:
        return s.formula
    if s.start is not None:
        return {"start": s.start, "growth": s.growth}
    if len(s.points) == 1 and s.points[0][0] == 0.0:
        return s.points[0][1]
    return {y: v for y, v in s.points}


def scaled(s: Schedule | None, k: float) -> Schedule | None:
    """``s`` times ``k`` (every point, or the start of a growing schedule)."""
    if s is None:
        return None
    if s.start is not None:
        return replace(s, start=s.start * k)
    return replace(s, points=tuple((y, v * k) for y, v in s.points))


def moved(s: Schedule, k: float):
    """The raw form of ``s`` times ``k`` (a money formula: ``(formula) * k``; k = 1 keeps the
    text as written)."""
    if s.formula is not None:
        return s.formula if k == 1.0 else formula_times(s.formula, k)
    return schedule_raw(scaled(s, k))


def formula_times(text: str, k: float) -> str:
    """A formula over the drivers times ``k``, as formula text (k written exactly)."""
    return f"({text}) * {float(k)!r}"
