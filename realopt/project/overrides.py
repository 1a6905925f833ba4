"""Overrides (the command line's ``--set KEY=VALUE``): dotted key paths set in the raw tree
before validation; a list item of ``rights`` is addressed by its index or its name
(``rights.Sell the line.salvage``). Problems they cause later say ``(from --set KEY)``."""
from __future__ import annotations

import difflib
import re
from typing import Any, Mapping

from ..errors import Problem, ProjectError
from .paths import Index, _float_text, describe, format_path
from .reading import Tree, parse_text


def parse_value(text: str, key: str = "value"):
    """Read a ``--set`` value as YAML: '0.35' -> 0.35, '[1, 6]' -> list, '{1: 5}' -> mapping."""
    tree = parse_text(text, f"--set {key}")
    if tree.problems:
        raise ProjectError(tree.problems)
    return tree.data


def _match_key(mapping: dict, seg: str):
    for k in mapping:
        if str(k) == seg:
            return k
    num = _float_text(seg)
    if num is not None:
        for k in mapping:
            if isinstance(k, (int, float)) and not isinstance(k, bool) and float(k) == num:
                return k
        return int(num) if re.fullmatch(r"[-+]?\d+", seg) else num
    return seg


def apply_overrides(tree: Tree, overrides: Mapping[str, Any],
                    labels: Mapping[str, str] | None = None) -> None:
    """Set each dotted key path of ``overrides`` in ``tree.data`` (before validation).

    ``labels`` names where an override came from in messages (default ``--set KEY``)."""
    for key, value in overrides.items():
        _apply_one(tree, str(key), value, (labels or {}).get(key, f"--set {key}"))
    if tree.problems:
        raise ProjectError(tree.problems)


def _apply_one(tree: Tree, key: str, value, label: str) -> None:
    def bad(found, expected, fix=""):
        tree.problems.append(Problem(tree.file, None, None, label, found, expected, fix))

    segs = key.split(".")          # raw: a right's name may hold dots and spaces
    if not key.strip():
        bad("an empty key path", "a dotted path such as market.risk_free_rate",
            "write KEY=VALUE with KEY like lattice.steps_per_year")
        return
    if tree.data is None:
        tree.data = {}
    node, path, i = tree.data, (), 0
    while True:
        if isinstance(node, dict):
            if not segs[i].strip():
                bad(f"an empty part in the key path after {format_path(path)}",
                    "a dotted path such as market.risk_free_rate",
                    "remove the doubled or trailing dot")
                return
            k = _match_key(node, segs[i].strip())
            path += (k,)
            i += 1
            if i == len(segs):
                node[k] = value
                break
            child = node.get(k)
            if child is None:
                child = node[k] = {}
            node = child
        elif isinstance(node, list):
            idx, used = _match_item(node, segs, i)
            if idx is None:
                names = [str(it.get("name")) for it in node if isinstance(it, dict) and "name" in it]
                tries = [".".join(segs[i:j]).strip() for j in range(len(segs), i, -1)]
                hint = [h for t in tries for h in difflib.get_close_matches(t, names, n=1,
                                                                            cutoff=0.5)]
                bad(f"no item {segs[i].strip()} in {format_path(path)}",
                    f"an index 0 to {len(node) - 1} or the name of an item"
                    + (f" ({', '.join(names)})" if names else ""),
                    f"did you mean {hint[0]}?" if hint else "")
                return
            path += (Index(idx),)
            i += used
            if i == len(segs):
                node[idx] = value
                break
            node = node[idx]
        else:
            bad(f"{format_path(path)} is {describe(node)}, which has no keys inside it",
                "a path through mappings and lists", f"set {format_path(path)} itself")
            return
    for marks in (tree.marks, tree.key_marks):
        for p in [p for p in marks if p[: len(path)] == path and (marks is tree.marks or p != path)]:
            del marks[p]
    tree.overridden[path] = label


def _match_item(items: list, segs, i):
    seg = segs[i].strip()
    if re.fullmatch(r"\d+", seg):
        idx = int(seg)
        return (idx, 1) if idx < len(items) else (None, 0)
    for j in range(len(segs), i, -1):       # names may contain dots: longest match first
        name = ".".join(segs[i:j]).strip()
        for idx, item in enumerate(items):
            if isinstance(item, dict) and str(item.get("name", "")).strip() == name:
                return idx, j - i
    return None, 0

