"""Load a YAML project file into a validated :class:`realopt.model.Project`.

Only plain YAML data is accepted: mappings, lists, text, numbers, true/false and null. The file is
*composed* with PyYAML's safe loader and converted node by node here, so ``!!python/...`` tags and
every other constructor are refused, nested aliases cannot blow up (a budget on the number of
values), and every value keeps the line and column it came from.

Validation happens here, once, at the boundary; later stages trust the Project. Every problem
found is reported together in one :class:`realopt.errors.ProjectError`, each naming the file,
line, column and key path, what was found, what was expected and how to fix it. Paths inside a
file (forecast CSVs, price histories) resolve against the folder of that file.

``overrides`` (the command line's ``--set KEY=VALUE``) are dotted key paths applied to the raw tree
before validation; a list item of ``rights`` is addressed by its index or its name
(``rights.Sell the line.salvage``).

Units and conventions are those of :mod:`realopt.model`: years from today, yearly rates
compounded as ``market.compounding`` says, money in the project's currency and unit.
"""
from __future__ import annotations

import copy
import difflib
import importlib
import keyword
import math
import re
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Mapping

import yaml

from . import model
from .errors import Problem, ProjectError
from .rights.registry import right_keys, right_type

MAX_FILE_BYTES = 1_000_000        # a project file is a few kilobytes; data belongs in a CSV
MAX_NODES = 100_000               # values after expanding aliases ("billion laughs" guard)
MAX_DEPTH = 32                    # nesting of lists/mappings
VOLATILITY_WARN = 1.5             # yearly sigma above which the loader warns
RATE_WARN = 1.0                   # a yearly rate above 100% is probably a percentage typo

# libyaml's safe composer when PyYAML was built with it (20x faster), else the pure-Python one;
# both only compose nodes: nothing is constructed by PyYAML here.
_LOADER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)
_TAG = "tag:yaml.org,2002:"
_SCALAR_TAGS = {_TAG + t for t in ("str", "int", "float", "bool", "null", "timestamp", "value")}
_TEXT_TAGS = {_TAG + t for t in ("str", "timestamp", "value")}
_FLOAT_TEXT = re.compile(r"^[-+]?(\d[\d_]*\.?\d*|\.\d+)[eE][-+]?\d+$")   # 1e-3 (YAML 1.1 misses it)
_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")

TOP_KEYS = ("project", "market", "underlying", "investment", "lattice", "rights")
PROJECT_KEYS = ("name", "currency", "unit")
MARKET_KEYS = ("risk_free_rate", "compounding", "discount_rate")
CASH_FLOW_KEYS = ("cash_flows", "terminal_value", "flow_timing")
PV_KEYS = ("present_value", "payout_yield")
DRIVER_FORM_KEYS = ("years", "drivers", "correlation", "cash_flow", "tax_rate")
UNDERLYING_KEYS = CASH_FLOW_KEYS + PV_KEYS + DRIVER_FORM_KEYS + ("volatility",)
LATTICE_KEYS = ("steps_per_year", "up", "down", "step_years")
COMMON_RIGHT_KEYS = ("name", "type", "window", "exercise", "dates", "requires", "excludes")
RIGHT_KEYS = right_keys()         # kind -> its keys, from the registry (realopt.rights)
FORECAST_KEYS = ("file", "year", "value", "sheet")


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


def _size(n: int) -> str:
    return f"{n / 1e6:.1f} MB" if n >= 1e5 else f"{n / 1e3:.0f} kB"


def _float_text(text: str):
    try:
        v = float(text.replace("_", ""))
    except (ValueError, AttributeError):
        return None
    return v if math.isfinite(v) else None


# --------------------------------------------------------------------------------------------
# Reading: bytes -> text -> YAML nodes -> plain data with positions


@dataclass
class Tree:
    """Raw project data and where each value came from.

    ``marks`` and ``key_marks`` map a key path to the 1-based (line, column) of the value and of
    its mapping key; ``overridden`` maps a path set by an override to the ``--set`` text.
    """

    data: Any
    file: str
    marks: dict = field(default_factory=dict)
    key_marks: dict = field(default_factory=dict)
    overridden: dict = field(default_factory=dict)
    problems: list = field(default_factory=list)


def _fatal(file, found, expected, fix="", line=None, column=None, key="(whole file)"):
    raise ProjectError([Problem(file, line, column, key, found, expected, fix)])


def read_tree(path) -> Tree:
    """Read a project file into a :class:`Tree`; file-level problems raise ProjectError."""
    file = str(path)
    p = Path(path)
    try:
        if p.is_dir():
            _fatal(file, "a folder", "a YAML project file", "name a .yaml file inside that folder")
        with open(p, "rb") as fh:
            raw = fh.read(MAX_FILE_BYTES + 1)
    except FileNotFoundError:
        _fatal(file, "no such file", "the path of a YAML project file",
               "check the spelling; a relative path starts from the current folder")
    except OSError as err:
        _fatal(file, f"a file that cannot be read ({err.strerror or err})",
               "a readable YAML project file", "check the path and the file's permissions")
    if len(raw) > MAX_FILE_BYTES:
        _fatal(file, f"a file larger than {_size(MAX_FILE_BYTES)}",
               f"a project file of at most {_size(MAX_FILE_BYTES)} (a project is a few kilobytes "
               "of YAML)", "check that this is the project file; put long forecasts in a CSV "
               "named by underlying.cash_flows.file")
    return parse_bytes(raw, file)


def _line_col(data, offset: int, newline) -> tuple[int, int]:
    head = data[:offset]
    line = head.count(newline) + 1
    return line, offset - (head.rfind(newline) + 1) + 1


def parse_bytes(raw: bytes, file: str) -> Tree:
    """Decode UTF-8 (an optional BOM is dropped) and parse; binary data is refused."""
    zero = raw.find(b"\x00")
    if zero >= 0:
        line, col = _line_col(raw, zero, b"\n")
        _fatal(file, "binary data (a zero byte)", "a YAML text file",
               "this is not a project file; give the path of a .yaml file", line, col)
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        line, col = _line_col(raw, err.start, b"\n")
        _fatal(file, f"bytes that are not UTF-8 text (0x{raw[err.start]:02x} at byte {err.start})",
               "a UTF-8 text file", "save the file as UTF-8 text; a spreadsheet or a binary file is "
               "not a project file", line, col)
    return parse_text(text, file)


def _syntax_problem(err: yaml.MarkedYAMLError, text: str, file: str) -> Problem:
    mark = err.problem_mark or err.context_mark
    line = mark.line + 1 if mark else None
    col = mark.column + 1 if mark else None
    problem = (err.problem or "").strip()
    lines = text.splitlines()
    src = lines[mark.line] if mark and mark.line < len(lines) else ""
    key = "(YAML syntax)"
    if "\t" in problem or "'\\t'" in problem or "\t" in src[: (mark.column + 1) if mark else 0]:
        return Problem(file, line, col, key, "a tab character",
                       "spaces for indentation (YAML does not allow tabs there)",
                       "replace the tabs on this line with spaces")
    if "another document" in problem:
        return Problem(file, line, col, key, "a second YAML document (a '---' line)",
                       "one project per file", "remove the '---' line and what follows, or split "
                       "the file in two")
    context = f" {err.context}" if err.context else ""
    cmark = err.context_mark
    if cmark is not None and mark is not None and cmark.line != mark.line:
        context += f" started at line {cmark.line + 1}, column {cmark.column + 1}"
    if problem.startswith("found "):
        problem = problem[len("found "):]
    found = f"text YAML cannot read ({problem}{context})"
    fix = "check the indentation and the quotes on this line and the one above"
    if "mapping values are not allowed" in problem:
        found = "a ': ' that YAML reads as the start of another key"
        fix = ("a value containing ': ' needs quotes, or this line is indented wrongly; "
               "check the indentation against the line above")
    elif "expected ',' or" in problem or "flow" in context:
        fix = "close every '[' with ']' and every '{' with '}'"
    elif "could not find expected ':'" in problem:
        fix = "each key needs a colon and a space after it ('key: value')"
    elif "undefined alias" in problem:
        fix = "define the anchor (&name) before using the alias (*name)"
    return Problem(file, line, col, key, found, "valid YAML", fix)


_FLOW_CHARS = re.compile(r"[\[\]{}\"'#\n]")


def _flow_depth_check(text: str, file: str) -> None:
    """Refuse bracket nesting deeper than MAX_DEPTH before PyYAML's scanner, which slows down
    sharply on deep flow collections, sees it (quotes and comments are skipped roughly)."""
    if text.count("[") + text.count("{") <= MAX_DEPTH:
        return
    depth, quote, comment = 0, "", False
    for m in _FLOW_CHARS.finditer(text):
        ch = m.group()
        if comment:
            comment = ch != "\n"
        elif quote:
            quote = "" if ch == quote else quote
        elif ch == "#" and (m.start() == 0 or text[m.start() - 1] in " \t\n"):
            comment = True
        elif ch in "\"'" and (m.start() == 0 or text[m.start() - 1] in " \t\n[{,:"):
            quote = ch
        elif ch in "[{":
            depth += 1
            if depth > MAX_DEPTH:
                line, col = _line_col(text, m.start(), "\n")
                _fatal(file, f"lists or mappings nested more than {MAX_DEPTH} levels deep",
                       "a project file a few levels deep", "check the brackets", line, col,
                       "(YAML syntax)")
        elif ch in "]}":
            depth = max(0, depth - 1)


def parse_text(text: str, file: str) -> Tree:
    """Parse YAML text into a :class:`Tree` (plain data only); syntax errors raise ProjectError."""
    _flow_depth_check(text, file)
    try:
        root = yaml.compose(text, Loader=_LOADER)
    except yaml.MarkedYAMLError as err:
        raise ProjectError([_syntax_problem(err, text, file)]) from None
    except yaml.reader.ReaderError as err:
        line, col = _line_col(text, err.position, "\n")
        char = err.character if isinstance(err.character, str) else chr(err.character)
        _fatal(file, f"the control character #x{ord(char):04x}", "printable text",
               "delete the character (it is often pasted in from another program)", line, col,
               "(YAML syntax)")
    except RecursionError:
        _fatal(file, "lists or mappings nested too deeply for the reader",
               f"at most {MAX_DEPTH} levels of nesting", "a project file is a few levels deep; "
               "check the brackets")
    except yaml.YAMLError as err:
        _fatal(file, f"unreadable YAML ({err})", "valid YAML", "check the file's syntax")
    tree = Tree(data=None, file=file)
    if root is not None:
        tree.data = _Converter(tree).node(root, (), 0)
    return tree


class _Budget(Exception):
    def __init__(self, node, why):
        self.node, self.why = node, why


def _pos(mark) -> tuple[int, int]:
    return mark.line + 1, mark.column + 1


def _tag_text(tag: str) -> str:
    return "!!" + tag[len(_TAG):] if tag.startswith(_TAG) else tag


class _Converter:
    """YAML nodes -> plain Python data, recording positions and refusing anything but data."""

    def __init__(self, tree: Tree):
        self.tree = tree
        self.count = 0
        self.constructor = yaml.constructor.SafeConstructor()

    def node(self, node, path, depth):
        try:
            return self._node(node, path, depth)
        except _Budget as b:
            # an alias carries its anchor's position: place the problem at the nearest key
            keyed = [b.path[:n] for n in range(len(b.path), 0, -1)
                     if b.path[:n] in self.tree.key_marks]
            line, col = self.tree.key_marks[keyed[0]] if keyed else _pos(b.node.start_mark)
            if b.why == "count":
                _fatal(self.tree.file, f"more than {MAX_NODES:,} values once anchors and aliases "
                       "are expanded (nested aliases, the 'billion laughs' pattern)",
                       "a project file of plain data", "write the values out, or use aliases "
                       "only for a few small shared blocks", line, col, format_path(b.path))
            _fatal(self.tree.file, f"lists or mappings nested more than {MAX_DEPTH} levels deep",
                   "a project file a few levels deep", "check the brackets and the indentation",
                   line, col, format_path(b.path))

    def _problem(self, node, path, found, expected, fix):
        line, col = _pos(node.start_mark)
        self.tree.problems.append(Problem(self.tree.file, line, col, format_path(path), found,
                                          expected, fix))

    def _bad_tag(self, node, path):
        self._problem(node, path, f"the tag {_tag_text(node.tag)}",
                      "plain YAML data (text, numbers, lists, mappings)",
                      "remove the tag; a project file never builds objects or runs code")

    def _node(self, node, path, depth):
        self.count += 1
        if self.count > MAX_NODES or depth > MAX_DEPTH:
            err = _Budget(node, "count" if self.count > MAX_NODES else "depth")
            err.path = path
            raise err
        self.tree.marks[path] = _pos(node.start_mark)
        if isinstance(node, yaml.ScalarNode):
            return self._scalar(node, path)
        if isinstance(node, yaml.SequenceNode):
            if node.tag != _TAG + "seq":
                self._bad_tag(node, path)
                return None
            return [self._node(item, path + (Index(i),), depth + 1)
                    for i, item in enumerate(node.value)]
        if node.tag != _TAG + "map":
            self._bad_tag(node, path)
            return None
        return self._mapping(node, path, depth)

    def _scalar(self, node, path, key=False):
        tag = node.tag
        if tag not in _SCALAR_TAGS:
            self._bad_tag(node, path)
            return None
        if key and tag in (_TAG + "bool", _TAG + "null"):
            return node.value          # 'on:', 'off:', 'no:' as mode names stay text
        if tag in _TEXT_TAGS:
            if not node.style and _FLOAT_TEXT.match(node.value):    # plain (unquoted)
                return float(node.value.replace("_", ""))
            return node.value
        try:
            return self.constructor.construct_object(node)
        except Exception:  # e.g. !!int "abc"
            self._problem(node, path, f'the text "{node.value}" tagged {_tag_text(tag)}',
                          "a value matching its tag", "remove the tag")
            return None

    def _mapping(self, node, path, depth):
        out: dict = {}
        merges = []
        for knode, vnode in node.value:
            if knode.tag == _TAG + "merge":
                merges.append(vnode)
                continue
            if not isinstance(knode, yaml.ScalarNode):
                self._problem(knode, path, "a list or mapping used as a key",
                              "a key that is a word or a number", "write the key as plain text")
                continue
            key = self._scalar(knode, path, key=True)
            if key is None:
                continue
            kpath = path + (key,)
            if key in out:
                first = self.tree.key_marks.get(kpath, (None,))[0]
                self._problem(knode, kpath, f"the key {key} a second time (first at line {first})",
                              "each key once in a mapping",
                              "remove one of them; YAML would silently keep only the last")
                continue
            self.tree.key_marks[kpath] = _pos(knode.start_mark)
            out[key] = self._node(vnode, kpath, depth + 1)
        own = self.tree.marks.get(path)
        for vnode in merges:
            sources = vnode.value if isinstance(vnode, yaml.SequenceNode) else [vnode]
            for src in sources:
                if not isinstance(src, yaml.MappingNode):
                    self._problem(src, path, "a merge key (<<) on something that is not a mapping",
                                  "<<: *anchor of a mapping", "point the merge at a mapping")
                    continue
                merged = self._node(src, path, depth)
                for k, v in (merged or {}).items():
                    out.setdefault(k, v)
        if own is not None:
            self.tree.marks[path] = own
        return out


# --------------------------------------------------------------------------------------------
# Overrides (--set)


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


# --------------------------------------------------------------------------------------------
# Validation: raw tree -> model.Project


def _optional_module(name: str):
    """Import realopt.<name>, or None when this installation does not have it."""
    try:
        return importlib.import_module(f"realopt.{name}")
    except ModuleNotFoundError as err:
        if err.name == f"realopt.{name}":
            return None
        raise


_ABSENT = object()   # a section missing from the file (reported once, as missing)


class _Builder:
    def __init__(self, tree: Tree, base_dir: Path):
        self.tree = tree
        self.file = tree.file
        self.base_dir = base_dir
        self.problems: list[Problem] = list(tree.problems)
        self.warnings: list[str] = []
        self._reported = {p.key for p in tree.problems}   # refused by the reader already
        self._typos: set = set()                          # (mapping path, key it suggests)

    # ---- reporting -------------------------------------------------------------------------

    def _where(self, path, at):
        """(line, column, note) for a path: its value, its key, or (missing) its parent."""
        if at == "missing":
            path = path[:-1]
            at = "key"
        for n in range(len(path), -1, -1):
            p = path[:n]
            if p in self.tree.overridden:
                return None, None, self.tree.overridden[p]
            table = self.tree.key_marks if (at == "key" and p in self.tree.key_marks) \
                else self.tree.marks
            if p in table:
                return (*table[p], None)
        return None, None, None

    def bad(self, path, found, expected, fix="", at="value", loc=None):
        """Record a problem at ``path``; ``loc`` (another key path) places it in the file."""
        if format_path(path) in self._reported:
            return
        line, col, note = self._where(path if loc is None else loc, at)
        if note:
            found += f" (from {note})"
        self.problems.append(Problem(self.file, line, col, format_path(path), found, expected,
                                     fix))

    def missing(self, path, expected, fix=""):
        if (path[:-1], path[-1]) in self._typos:
            return                  # the misspelt key's "did you mean" says it already
        self.bad(path, "no value (the key is missing)", expected, fix, at="missing")

    def warn(self, path, text):
        line, _, note = self._where(path, "value")
        where = f"{self.file}:{line}" if line else self.file
        self.warnings.append(f"{where}: {format_path(path)}: {text}"
                             + (f" (from {note})" if note else ""))

    # ---- shapes ----------------------------------------------------------------------------

    def mapping(self, path, value, keys, what, elsewhere=None, empty_ok=False):
        """Check ``value`` is a mapping with only ``keys``; returns it, or None."""
        if value is None and empty_ok:
            return {}
        if not isinstance(value, dict):
            fix = ""
            if isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
                fix = "remove the '- ' in front of the keys: this is a mapping, not a list"
            self.bad(path, describe(value), what, fix)
            return None
        for k in value:
            if k not in keys:
                self.unknown(path + (k,), k, keys, elsewhere or {})
        return value

    def unknown(self, path, key, keys, elsewhere):
        listed = ", ".join(str(k) for k in keys)
        if key in elsewhere:
            self.bad(path, f"the key {key}", f"one of: {listed}", elsewhere[key], at="key")
            return
        hint = difflib.get_close_matches(str(key), [str(k) for k in keys], n=1, cutoff=0.6)
        fix = f"did you mean {hint[0]}?" if hint else "remove it, or use one of the keys listed"
        if hint:
            self._typos.add((path[:-1], hint[0]))
        self.bad(path, f"an unknown key {key}", f"one of: {listed}", fix, at="key")

    def number(self, path, value, expected, *, gt=None, ge=None, lt=None, le=None, fix=""):
        """A finite number within the given bounds (returns float), else None and a problem."""
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self._not_a_number(path, value, expected, fix)
            return None
        v = float(value)
        if not math.isfinite(v):
            self.bad(path, describe(v), expected, "replace .inf / .nan with a figure")
            return None
        if ((gt is not None and not v > gt) or (ge is not None and not v >= ge)
                or (lt is not None and not v < lt) or (le is not None and not v <= le)):
            self.bad(path, describe(value), expected, fix)
            return None
        return v

    def _not_a_number(self, path, value, expected, fix):
        found = describe(value)
        if isinstance(value, str):
            s = value.strip().replace(" ", "")
            pct = _float_text(s[:-1]) if s.endswith("%") else None
            if pct is not None:
                found = f'"{value}" (a percentage)'
                fix = f"write a fraction without the percent sign: {pct / 100:g}"
            elif _float_text(s) is not None:
                found = f'the text "{value}" (a number in quotes)'
                fix = "remove the quotes so it reads as a number"
            elif "," in s and _float_text(s.replace(",", "")) is not None:
                fix = "write digits with a dot for decimals, without thousands separators"
            elif not fix:
                fix = "write a plain number, e.g. 0.25"
        elif isinstance(value, bool) and not fix:
            fix = "write a number; true/false (and yes/no/on/off) are yes/no values in YAML"
        elif value is None and not fix:
            fix = "give a number after the colon"
        self.bad(path, found, expected, fix)

    def integer(self, path, value, expected, *, ge=None, le=None):
        v = self.number(path, value, expected, ge=ge, le=le)
        if v is None:
            return None
        if not v.is_integer():
            self.bad(path, describe(value), expected, f"use a whole number such as {round(v)}")
            return None
        return int(v)

    def text(self, path, value, expected):
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return str(value)
        if not isinstance(value, str) or not value.strip():
            self.bad(path, describe(value), expected)
            return None
        return value.strip()

    def choice(self, path, value, choices, what):
        expected = f"{what}: one of {', '.join(choices)}"
        if not isinstance(value, str):
            self.bad(path, describe(value), expected)
            return None
        v = value.strip().lower()
        if v in choices:
            return v
        hint = difflib.get_close_matches(v, list(choices), n=1, cutoff=0.5)
        self.bad(path, describe(value), expected, f"did you mean {hint[0]}?" if hint else "")
        return None

    def year_key(self, path, key, *, gt=None, ge=0.0, fix=""):
        """A mapping key that is a year (number of years from now)."""
        k = key
        if isinstance(k, str) and _float_text(k.strip()) is not None:
            k = _float_text(k.strip())
        expected = "a year (years from now, " + (f"above {gt:g}" if gt is not None
                                                 else f"{ge:g} or later") + ")"
        if isinstance(k, bool) or not isinstance(k, (int, float)) or not math.isfinite(k) \
                or (gt is not None and not k > gt) or (ge is not None and not k >= ge):
            if isinstance(key, str):
                fix = "write the year as a number of years from now, such as 3, not a date"
            self.bad(path, f"the key {key}", expected, fix, at="key")
            return None
        return float(k)

    def schedule(self, path, value, what, *, nonneg=False):
        """number | {year: amount} (linear between, flat beyond) | {start, growth}."""
        sign = " of 0 or more" if nonneg else ""
        expected = (f"{what}{sign}: a number, a mapping {{year: amount}} (linear between the "
                    "years, flat beyond), or {start: amount, growth: yearly rate}")
        ge = 0.0 if nonneg else None
        if isinstance(value, dict):
            if not value:
                self.bad(path, "an empty mapping", expected)
                return None
            if {"start", "growth"} & set(value):
                other = [k for k in value if k not in ("start", "growth")]
                if other:
                    self.bad(path, f"a mapping mixing start/growth with {other[0]}", expected,
                             "use either {start: X, growth: g} or {year: amount, ...}, not both")
                    return None
                if "start" not in value:
                    self.missing(path + ("start",), f"{what} at year 0")
                    return None
                s = self.number(path + ("start",), value["start"], f"{what} at year 0{sign}",
                                ge=ge)
                g = self.number(path + ("growth",), value.get("growth", 0.0),
                                "a yearly growth rate above -1 (0.02 for 2%)", gt=-1.0)
                return model.Schedule.compound(s, g) if s is not None and g is not None else None
            points, ok = {}, True
            for k, v in value.items():
                y = self.year_key(path + (k,), k)
                a = self.number(path + (k,), v, f"{what}{sign} at year {k}", ge=ge)
                if y is None or a is None:
                    ok = False
                else:
                    points[y] = a
            return model.Schedule.from_points(points) if ok else None
        if isinstance(value, list):
            self.bad(path, describe(value), expected,
                     "a schedule by year is a mapping like {0: 60, 8: 35}, not a list")
            return None
        a = self.number(path, value, expected, ge=ge)
        return model.Schedule.constant(a) if a is not None else None

    def names(self, path, value):
        """requires/excludes: a list of right names (one name alone is accepted too)."""
        if value is None:
            return ()
        if isinstance(value, str):
            value = [value]
        if not isinstance(value, list):
            self.bad(path, describe(value), "a list of right names, e.g. [Phase 1]")
            return None
        out = []
        for i, v in enumerate(value):
            t = self.text(path + (Index(i),), v, "the name of another right")
            if t is not None:
                out.append(t)
        return tuple(out)

    def resolve(self, path, value):
        """A path inside the file, resolved against the file's folder; must exist."""
        t = self.text(path, value, "a file path (relative to this project file)")
        if t is None:
            return None
        p = Path(t).expanduser()
        if not p.is_absolute():
            p = self.base_dir / p
        p = p.resolve()
        if not p.is_file():
            self.bad(path, f"no file at {p}", "an existing file (relative to this project file)",
                     "check the name; relative paths start from the project file's folder")
            return None
        return p

    # ---- sections --------------------------------------------------------------------------

    def build(self) -> model.Project:
        data = self.tree.data
        if data is None and not self.tree.overridden:
            _fatal(self.file, "an empty document (no keys at all)",
                   "a project: the sections project, market, underlying, investment and rights",
                   "start from one of the demo files in projects/")
        top = self.mapping((), data, TOP_KEYS, "a mapping with the sections project, market, "
                           "underlying, investment, lattice and rights")
        if top is None:
            raise ProjectError(self.problems)
        for key, what in (("project", "the project's name"), ("market", "the rates"),
                          ("underlying", "the operating project's value and volatility"),
                          ("investment", "the investment cost")):
            if key not in top:
                self.missing((key,), f"a {key} section ({what})",
                             "add it; see the project file reference in the README")
        sec = {k: top.get(k, _ABSENT) for k in TOP_KEYS}
        name, currency, unit = self.project_section(sec["project"])
        form = self.underlying_form(sec["underlying"])
        market = self.market(sec["market"], form)
        lattice = self.lattice(sec["lattice"])
        underlying = self.underlying(sec["underlying"], form, lattice)
        investment = self.investment(sec["investment"], market)
        rights = self.rights(sec["rights"], lattice)
        if self.problems:
            raise ProjectError(sorted(self.problems, key=lambda p: (p.line or 0, p.column or 0)))
        self.cross_checks(market, underlying, investment, rights, lattice)
        return model.Project(name=name, market=market, underlying=underlying,
                             investment=investment, rights=rights, lattice=lattice,
                             currency=currency, unit=unit, source=self.file,
                             warnings=tuple(self.warnings))

    def project_section(self, value):
        path = ("project",)
        if value is _ABSENT:
            return None, "", ""
        d = self.mapping(path, value, PROJECT_KEYS, "a mapping with name, currency and unit")
        if d is None:
            return None, "", ""
        name = None
        if "name" not in d:
            self.missing(path + ("name",), "the project's name (text)")
        else:
            name = self.text(path + ("name",), d["name"], "the project's name (text)")
        currency = self.text(path + ("currency",), d["currency"], "a currency label such as EUR") \
            if d.get("currency") is not None else ""
        unit = self.text(path + ("unit",), d["unit"], "a unit label such as million") \
            if d.get("unit") is not None else ""
        return name, currency or "", unit or ""

    def market(self, value, form):
        path = ("market",)
        if value is _ABSENT:
            return None
        d = self.mapping(path, value, MARKET_KEYS,
                         "a mapping with risk_free_rate, discount_rate and compounding")
        if d is None:
            return None
        comp = "annual"
        if d.get("compounding") is not None:
            comp = self.choice(path + ("compounding",), d["compounding"], model.COMPOUNDING,
                               "how the rates compound")
        rates = {}
        for key, what in (("risk_free_rate", "the yearly risk-free rate"),
                          ("discount_rate", "the yearly risk-adjusted discount rate for the "
                           "project's cash flows")):
            if key not in d:
                if key == "discount_rate" and form == "present_value":
                    continue
                self.missing(path + (key,), f"{what}, a fraction above -1 (0.035 for 3.5%)")
                continue
            r = self.number(path + (key,), d[key], f"{what}, a fraction above -1 (0.035 for 3.5%)",
                            gt=-1.0)
            if r is not None and r > RATE_WARN:
                self.warn(path + (key,), f"{r:g} is a rate above 100% a year; if you meant "
                          f"{r:g}%, write {r / 100:g}")
            rates[key] = r
        rf = rates.get("risk_free_rate")
        dr = rates.get("discount_rate", rf)
        if rf is None or dr is None or comp is None:
            return None
        return model.Market(risk_free_rate=rf, discount_rate=dr, compounding=comp)

    def underlying_form(self, value):
        if not isinstance(value, dict):
            return None
        forms = []
        if "cash_flows" in value:
            forms.append("cash_flows")
        if "present_value" in value:
            forms.append("present_value")
        if any(k in value for k in ("years", "drivers", "cash_flow")):
            forms.append("drivers")
        return forms[0] if len(forms) == 1 else tuple(forms)

    def underlying(self, value, form, lattice):
        path = ("underlying",)
        if value is _ABSENT:
            return None
        d = self.mapping(path, value, UNDERLYING_KEYS,
                         "a mapping giving the operating project's value: cash_flows, or "
                         "present_value, or years/drivers/cash_flow; and its volatility")
        if d is None:
            return None
        if isinstance(form, tuple):
            if not form:
                self.bad(path, describe(d), "one way to give the operating project's value: "
                         "cash_flows, present_value, or years/drivers/cash_flow",
                         "add cash_flows: {1: ..., 2: ...} (expected free cash flow by year)")
            else:
                self.bad(path, f"{' and '.join(form)} together",
                         "exactly one way to give the operating project's value",
                         "keep one of them and delete the others")
            return None
        if form == "drivers" and isinstance(d.get("cash_flow"), dict) and "drivers" not in d:
            self.bad(path + ("cash_flow",), "cash_flow (the formula key) holding a mapping of "
                     "years", "cash_flows: {year: expected free cash flow}",
                     "did you mean cash_flows (with an s)?", at="key")
            return None
        allowed = {"cash_flows": CASH_FLOW_KEYS, "present_value": PV_KEYS,
                   "drivers": DRIVER_FORM_KEYS + ("terminal_value", "flow_timing")}[form]
        for k in d:
            if k in UNDERLYING_KEYS and k != "volatility" and k not in allowed:
                self.bad(path + (k,), f"the key {k} next to {form}",
                         f"with {form}: {', '.join(allowed)} and volatility",
                         _FORM_HINTS.get(k, f"{k} belongs to another way of giving the value; "
                                         "delete it"), at="key")
        out = {}
        if form == "cash_flows":
            out["cash_flows"] = self.cash_flows(path + ("cash_flows",), d["cash_flows"])
        elif form == "present_value":
            out["present_value"] = self.number(
                path + ("present_value",), d["present_value"],
                "the present value of the operating project, above 0", gt=0.0)
            if d.get("payout_yield") is not None:
                out["payout_yield"] = self.number(
                    path + ("payout_yield",), d["payout_yield"],
                    "a continuous yearly payout yield from 0 up to 1 (0.02 for 2%)", ge=0.0, lt=1.0)
        else:
            out["drivers"] = self.driver_model(path, d)
        if d.get("terminal_value") is not None and "terminal_value" in allowed:
            out["terminal_value"] = self.number(
                path + ("terminal_value",), d["terminal_value"],
                "the value at the last cash-flow year of the flows beyond it (a number)")
        if d.get("flow_timing") is not None and "flow_timing" in allowed:
            out["flow_timing"] = self.choice(
                path + ("flow_timing",), d["flow_timing"], model.FLOW_TIMING,
                "when the yearly cash flows are received (at_dates: each at its date; spread: "
                "evenly over the period before it)")
        vol_path = path + ("volatility",)
        explicit = lattice is not None and lattice.explicit
        if "volatility" not in d or d["volatility"] is None:
            if not explicit:
                self.missing(vol_path, "the yearly volatility of the project value (0.28 for 28%) "
                             "or an estimate block", "add volatility: 0.3, or give explicit "
                             "lattice up/down factors")
        elif isinstance(d["volatility"], dict):
            out["volatility_estimate"] = self.volatility_estimate(vol_path, d["volatility"], form)
            if explicit:
                self.warn(vol_path, "ignored: the lattice's explicit up/down factors set the tree")
        else:
            vol = self.number(vol_path, d["volatility"], "the yearly volatility of ln(project "
                              "value), above 0 (0.28 for 28%)", gt=0.0,
                              fix="volatility is a spread, never negative or zero; "
                                  "write e.g. 0.28")
            out["volatility"] = vol
            if vol is not None and vol > VOLATILITY_WARN:
                self.warn(vol_path, f"a volatility of {vol:g} ({vol:.0%} a year) is very high for "
                          "a project's value; check it is a fraction (0.3 for 30%)")
            if vol is not None and explicit:
                self.warn(vol_path, "ignored: the lattice's explicit up/down factors set the tree")
        if any(v is None for v in out.values()):
            return None
        return model.Underlying(**out)

    def cash_flows(self, path, value):
        if isinstance(value, dict) and "file" in value:
            return self.forecast(path, value)
        if not isinstance(value, dict) or not value:
            self.bad(path, describe(value), "a mapping {year: expected free cash flow} with years "
                     "above 0, e.g. {1: 6.0, 2: 9.5}, or {file: forecast.csv, year: .., value: ..}",
                     "a list of flows needs its years: write {1: 6.0, 2: 9.5, ...}"
                     if isinstance(value, list) else "")
            return None
        flows, ok = [], True
        for k, v in value.items():
            y = self.year_key(path + (k,), k, gt=0.0, ge=None,
                              fix="year 0 is today: put today's outlay in investment.cost")
            a = self.number(path + (k,), v, f"the expected free cash flow of year {k} (a number)")
            if y is None or a is None:
                ok = False
            else:
                flows.append((y, a))
        return tuple(sorted(flows)) if ok else None

    def forecast(self, path, d):
        self.mapping(path, d, FORECAST_KEYS, "a mapping with file, year, value and sheet")
        for k in ("year", "value"):
            if k not in d:
                self.missing(path + (k,), f"the name of the forecast's {k} column")
        file = self.resolve(path + ("file",), d.get("file"))
        year = self.text(path + ("year",), d.get("year"), "the name of the year column") \
            if "year" in d else None
        col = self.text(path + ("value",), d.get("value"), "the name of the value column") \
            if "value" in d else None
        sheet = d.get("sheet")
        if sheet is not None and not isinstance(sheet, (str, int)) or isinstance(sheet, bool):
            self.bad(path + ("sheet",), describe(sheet), "a sheet name or number")
            return None
        if file is None or year is None or col is None:
            return None
        mod = _optional_module("forecast")
        if mod is None:
            self.bad(path, "a forecast file", "cash_flows as a {year: amount} mapping",
                     "this installation cannot read forecast files (realopt.forecast is missing); "
                     "write the flows into the file")
            return None
        try:
            rows = mod.read_forecast(str(file), year, col, sheet=sheet)
        except mod.ForecastError as err:
            self.bad(path + ("file",), f"a forecast that cannot be used: {err}",
                     "a table with a year column and a value column", "fix the forecast file")
            return None
        rows = tuple((float(y), float(v)) for y, v in rows)
        bad = [y for y, _ in rows if not y > 0]
        if bad or not rows:
            self.bad(path + ("file",), f"year {bad[0]:g} in {file.name}" if bad else "no rows",
                     "cash-flow years above 0", "year 0 is today: put today's outlay in "
                     "investment.cost")
            return None
        return tuple(sorted(rows))

    def volatility_estimate(self, path, d, form):
        method = d.get("estimate")
        keys = {"simulation": ("estimate", "paths", "seed"),
                "history": ("estimate", "file", "column", "periods_per_year")}
        if "estimate" not in d:
            self.missing(path + ("estimate",), "estimate: simulation or estimate: history")
            return None
        method = self.choice(path + ("estimate",), method, tuple(keys), "how to estimate it")
        if method is None:
            return None
        self.mapping(path, d, keys[method], f"an estimate block for {method}")
        if method == "simulation":
            if form != "drivers":
                self.bad(path + ("estimate",), "estimate: simulation without drivers",
                         "simulation only when the cash flows come from drivers",
                         "give a volatility number, or use estimate: history with a price file")
            paths = self.integer(path + ("paths",), d.get("paths", 20000),
                                 "a number of simulation paths from 100 to 10,000,000",
                                 ge=100, le=10_000_000)
            seed = self.integer(path + ("seed",), d.get("seed", 1), "a whole-number seed, 0 or "
                                "more", ge=0)
            if paths is None or seed is None:
                return None
            return model.VolatilityEstimate(method="simulation", paths=paths, seed=seed)
        for k, what in (("file", "a CSV or spreadsheet of past values"),
                        ("column", "the column holding the values"),
                        ("periods_per_year", "observations per year (12 for monthly)")):
            if k not in d:
                self.missing(path + (k,), what)
        file = self.resolve(path + ("file",), d["file"]) if "file" in d else None
        column = self.text(path + ("column",), d["column"], "a column name") \
            if "column" in d else None
        ppy = self.number(path + ("periods_per_year",), d["periods_per_year"],
                          "observations per year, above 0 (12 for monthly, 52 for weekly)",
                          gt=0.0) if "periods_per_year" in d else None
        if file is None or column is None or ppy is None:
            return None
        return model.VolatilityEstimate(method="history", file=str(file), column=column,
                                        periods_per_year=ppy)

    def driver_model(self, path, d):
        ok = True
        for k, what in (("years", "the cash-flow years [first, last]"),
                        ("drivers", "a mapping of driver names to their processes"),
                        ("cash_flow", "the cash-flow formula over the driver names")):
            if k not in d:
                self.missing(path + (k,), what)
                ok = False
        if not ok:
            return None
        years = None
        y = d["years"]
        if isinstance(y, list) and len(y) == 2:
            a = self.integer(path + ("years", Index(0)), y[0], "the first cash-flow year, 1 or "
                             "later", ge=1)
            b = self.integer(path + ("years", Index(1)), y[1], "the last cash-flow year", ge=1)
            if a is not None and b is not None:
                if a > b:
                    self.bad(path + ("years",), f"[{a}, {b}]", "[first, last] with first <= last",
                             f"write [{b}, {a}]")
                else:
                    years = (a, b)
        else:
            self.bad(path + ("years",), describe(y), "[first, last] cash-flow years, e.g. [1, 15]")
        drivers = self.drivers(path + ("drivers",), d["drivers"])
        names = {dr.name: dr for dr in drivers} if drivers else {}
        corr = self.correlation(path + ("correlation",), d.get("correlation"), names)
        tax = 0.0
        if d.get("tax_rate") is not None:
            tax = self.number(path + ("tax_rate",), d["tax_rate"], "a tax rate from 0 up to 1 "
                              "(0.25 for 25%)", ge=0.0, lt=1.0)
        formula = self.formula(path + ("cash_flow",), d["cash_flow"], names)
        if None in (years, drivers, corr, tax, formula):
            return None
        return model.DriverModel(years=years, drivers=drivers, cash_flow=formula,
                                 correlation=corr, tax_rate=tax)

    def drivers(self, path, value):
        if not isinstance(value, dict) or not value:
            self.bad(path, describe(value), "a mapping of driver names to processes, e.g. "
                     "price: {process: gbm, start: 52, drift: 0.02, volatility: 0.25}")
            return None
        out, ok = [], True
        for name, spec in value.items():
            p = path + (name,)
            if not isinstance(name, str) or not _NAME.match(name) or keyword.iskeyword(name):
                self.bad(p, f"the driver name {name}", "a name of letters, digits and _ that "
                         "does not start with a digit (it is used in the formula)",
                         "rename it, e.g. unit_cost", at="key")
                ok = False
                continue
            dr = self.driver(p, name, spec)
            ok = ok and dr is not None
            if dr is not None:
                out.append(dr)
        return tuple(out) if ok else None

    def driver(self, path, name, spec):
        if isinstance(spec, (int, float)) and not isinstance(spec, bool):
            return model.Driver(name=name, process="schedule",
                                schedule=model.Schedule.constant(float(spec)))
        if not isinstance(spec, dict):
            self.bad(path, describe(spec), "a driver: {process: gbm, ...}, {process: "
                     "mean_reverting, ...} or {schedule: {year: value}}")
            return None
        if "schedule" in spec and spec.get("process", "schedule") == "schedule":
            self.mapping(path, spec, ("process", "schedule"), "a deterministic driver")
            s = self.schedule(path + ("schedule",), spec["schedule"], f"the values of {name}")
            return model.Driver(name=name, process="schedule", schedule=s) if s else None
        if "process" not in spec:
            self.missing(path + ("process",), "process: gbm or mean_reverting (or a schedule:)")
            return None
        proc = self.choice(path + ("process",), spec["process"], ("gbm", "mean_reverting"),
                           "the driver's process")
        if proc is None:
            return None
        need = {"gbm": ("start", "volatility"),
                "mean_reverting": ("start", "long_run", "speed", "volatility")}[proc]
        keys = ("process",) + need + (("drift",) if proc == "gbm" else ())
        self.mapping(path, spec, keys, f"a {proc} driver")
        vals = {}
        rules = {"start": ("today's value, above 0", {"gt": 0.0}),
                 "volatility": ("the yearly volatility of its log, 0 or more (0.25 for 25%)",
                                {"ge": 0.0}),
                 "drift": ("the yearly drift of its log (real-world, 0.02 for 2%)", {}),
                 "long_run": ("the long-run median it reverts to, above 0", {"gt": 0.0}),
                 "speed": ("the yearly speed of mean reversion, 0 or more", {"ge": 0.0})}
        for k in keys[1:]:
            what, bounds = rules[k]
            if k not in spec:
                if k == "drift":
                    vals[k] = 0.0
                    continue
                self.missing(path + (k,), what)
                vals[k] = None
                continue
            vals[k] = self.number(path + (k,), spec[k], what, **bounds)
        if any(v is None for v in vals.values()):
            return None
        return model.Driver(name=name, process=proc, **vals)

    def correlation(self, path, value, drivers):
        if value is None:
            return ()
        if not isinstance(value, list):
            self.bad(path, describe(value), "a list of [driver, driver, rho] triples, e.g. "
                     "[[price, unit_cost, 0.6]]")
            return None
        out, ok = [], True
        stochastic = [n for n, d in drivers.items() if d.process != "schedule"]
        seen = set()
        for i, item in enumerate(value):
            p = path + (Index(i),)
            if not isinstance(item, list) or len(item) != 3:
                self.bad(p, describe(item), "[driver, driver, rho]")
                ok = False
                continue
            a, b, rho = item
            for j, n in enumerate((a, b)):
                if drivers and n not in stochastic:
                    hint = difflib.get_close_matches(str(n), stochastic, n=1)
                    self.bad(p + (Index(j),), describe(n), "the name of a simulated driver ("
                             + ", ".join(stochastic) + ")",
                             f"did you mean {hint[0]}?" if hint else "")
                    ok = False
            r = self.number(p + (Index(2),), rho, "a correlation from -1 to 1", ge=-1.0, le=1.0)
            if a == b:
                self.bad(p, f"{a} paired with itself", "two different drivers")
                ok = False
            pair = frozenset((str(a), str(b)))
            if pair in seen:
                self.bad(p, f"the pair {a}, {b} a second time", "each pair once")
                ok = False
            seen.add(pair)
            if r is None:
                ok = False
            else:
                out.append((str(a), str(b), r))
        idx = {n: i for i, n in enumerate(stochastic)}
        if ok and out and all(a in idx and b in idx for a, b, _ in out):
            import numpy as np

            m = np.eye(len(stochastic))
            for a, b, r in out:
                m[idx[a], idx[b]] = m[idx[b], idx[a]] = r
            if np.linalg.eigvalsh(m).min() < -1e-10:
                self.bad(path, "correlations that no set of drivers can have together (the "
                         "matrix is not positive semi-definite)", "a consistent set of "
                         "correlations", "lower the largest correlations in absolute value")
                ok = False
        return tuple(out) if ok else None

    def formula(self, path, value, drivers):
        text = self.text(path, value, "a formula over the driver names, e.g. "
                         "(price - unit_cost) * volume / 1000 - 4.5")
        if text is None:
            return None
        if isinstance(value, dict):
            return None
        mod = _optional_module("formula")
        if mod is None:
            self.bad(path, "a cash-flow formula", "cash_flows as a {year: amount} mapping",
                     "this installation cannot evaluate formulas (realopt.formula is missing)")
            return None
        try:
            parsed = mod.parse(text)
        except mod.FormulaError as err:
            self.bad(path, f"a formula that cannot be used: {err}", "whitelisted arithmetic over "
                     "the driver names (+ - * / ** parentheses, numbers, min, max)")
            return None
        used = getattr(parsed, "names", None)
        if used is not None and drivers:
            for n in sorted(set(used) - set(drivers)):
                hint = difflib.get_close_matches(n, list(drivers), n=1)
                self.bad(path, f"the name {n}, which is not a driver",
                         f"names from: {', '.join(drivers)}",
                         f"did you mean {hint[0]}?" if hint else "define it under drivers")
        return text

    def lattice(self, value):
        path = ("lattice",)
        if value is _ABSENT:
            return model.LatticeSpec()
        d = self.mapping(path, value, LATTICE_KEYS, "a mapping with steps_per_year, or up, down "
                         "and step_years", empty_ok=True)
        if d is None:
            return None
        explicit = [k for k in ("up", "down", "step_years") if k in d]
        if explicit:
            if "steps_per_year" in d:
                self.bad(path + ("steps_per_year",), "steps_per_year together with "
                         + ", ".join(explicit), "either steps_per_year (Cox-Ross-Rubinstein "
                         "factors from the volatility) or up, down and step_years",
                         "delete one of the two ways", at="key")
                return None
            for k in ("up", "down", "step_years"):
                if k not in d:
                    self.missing(path + (k,), {"up": "the up factor per step, above 1",
                                               "down": "the down factor per step, from 0 to 1",
                                               "step_years": "the length of a step in years"}[k],
                                 "explicit trees need up, down and step_years together")
            up = self.number(path + ("up",), d.get("up"), "the up factor per step, above 1",
                             gt=1.0) if "up" in d else None
            down = self.number(path + ("down",), d.get("down"), "the down factor per step, "
                               "above 0 and below 1", gt=0.0, lt=1.0) if "down" in d else None
            dt = self.number(path + ("step_years",), d.get("step_years"), "the length of one "
                             "step in years, above 0", gt=0.0) if "step_years" in d else None
            if None in (up, down, dt):
                return None
            return model.LatticeSpec(up=up, down=down, step_years=dt)
        spy = 12
        if "steps_per_year" in d:
            spy = self.integer(path + ("steps_per_year",), d["steps_per_year"],
                               "a whole number of steps per year, 1 or more (12 = monthly)", ge=1)
        return model.LatticeSpec(steps_per_year=spy) if spy is not None else None

    def investment(self, value, market):
        path = ("investment",)
        if value is _ABSENT:
            return None
        d = self.mapping(path, value, ("cost",), "a mapping with cost")
        if d is None:
            return None
        if "cost" not in d:
            self.missing(path + ("cost",), "the investment outlay: a number paid now, or "
                         "{year: amount}")
            return None
        v = d["cost"]
        expected = "an outlay of 0 or more"
        if isinstance(v, dict):
            if not v:
                self.bad(path + ("cost",), "an empty mapping", "{year: amount} outlays")
                return None
            outlays, ok = [], True
            for k, a in v.items():
                y = self.year_key(path + ("cost", k), k)
                amt = self.number(path + ("cost", k), a, f"{expected} at year {k}", ge=0.0)
                if y is None or amt is None:
                    ok = False
                else:
                    outlays.append((y, amt))
            return model.Investment(outlays=tuple(sorted(outlays))) if ok else None
        amt = self.number(path + ("cost",), v, f"{expected} (paid now), or {{year: amount}}",
                          ge=0.0, fix="an outlay is written positive; 0 for no investment")
        return model.Investment(outlays=((0.0, amt),)) if amt is not None else None

    # ---- rights ----------------------------------------------------------------------------

    def rights(self, value, lattice):
        path = ("rights",)
        if value is None or value is _ABSENT:
            return ()
        if not isinstance(value, list):
            fix = ""
            if isinstance(value, dict):
                fix = "start each right with '- name: ...' so that rights is a list"
            self.bad(path, describe(value), "a list of rights, each starting with '- name:'", fix)
            return None
        out, ok, seen = [], True, {}
        for i, item in enumerate(value):
            r = self.right(path + (Index(i),), item)
            if r is None:
                ok = False
                continue
            if r.name in seen:
                self.bad(path + (Index(i), "name"), f'the name "{r.name}" a second time (first '
                         f"at rights[{seen[r.name]}])", "a unique name for each right",
                         "rename one of them; requires/excludes and reports use the names")
                ok = False
                continue
            seen[r.name] = i
            out.append(r)
        if not ok:
            return None
        defers = [i for i, r in enumerate(out) if isinstance(r, model.Defer)]
        for i in defers[1:]:
            self.bad(path + (Index(i), "type"), "a second defer right", "at most one defer "
                     "right (one decision to commit)", "merge the waiting periods into one "
                     "window, or use bermudan dates")
        self.links(path, out)
        if lattice is not None and lattice.explicit:
            self.on_grid(path, out, lattice.step_years)
        return tuple(out)

    def right(self, path, item):
        if not isinstance(item, dict):
            self.bad(path, describe(item), "a right: a mapping with name, type and window")
            return None
        kind = None
        if "type" not in item:
            self.missing(path + ("type",), "type: " + " | ".join(RIGHT_KEYS))
        else:
            kind = self.choice(path + ("type",), item["type"], tuple(RIGHT_KEYS),
                               "the kind of right")
        keys = COMMON_RIGHT_KEYS + (RIGHT_KEYS[kind] if kind else
                                    tuple(k for ks in RIGHT_KEYS.values() for k in ks))
        elsewhere = {}
        if kind:
            for other, ks in RIGHT_KEYS.items():
                for k in ks:
                    if k not in keys:
                        article = "an" if kind[0] in "aeiou" else "a"
                        elsewhere.setdefault(k, f"{k} belongs to {other} rights; this is "
                                             f"{article} {kind} right")
        self.mapping(path, item, keys, "a right", elsewhere)
        name = None
        if "name" not in item:
            self.missing(path + ("name",), "a unique name for the right (text)")
        else:
            name = self.text(path + ("name",), item["name"], "a unique name for the right (text)")
        window = self.window(path + ("window",), item.get("window"), "window" in item)
        exercise = "american"
        if item.get("exercise") is not None:
            exercise = self.choice(path + ("exercise",), item["exercise"], model.EXERCISE,
                                   "when the right can be used")
        dates = self.dates(path + ("dates",), item.get("dates"), exercise, window, kind)
        requires = self.names(path + ("requires",), item.get("requires"))
        excludes = self.names(path + ("excludes",), item.get("excludes"))
        if kind is None:
            return None
        specific = right_type(kind).parse(self, path, item)
        if None in (name, window, exercise, dates, requires, excludes, specific):
            return None
        if kind == "defer" and window[0] != 0:
            self.bad(path + ("window",), f"a window starting at year {window[0]:g}",
                     "a defer window starting at 0 (committing now is always one of the choices)",
                     f"write window: [0, {window[1]:g}]")
            return None
        cls = model.RIGHT_TYPES[kind]
        return cls(name=name, window=window, exercise=exercise, dates=dates, requires=requires,
                   excludes=excludes, **specific)

    def window(self, path, value, given):
        expected = "[start, end] in years from now, 0 <= start <= end (both inclusive)"
        if not given:
            self.missing(path, expected, "add e.g. window: [0, 5]")
            return None
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            self.bad(path, describe(value), expected, f"for a single date write [{value}, {value}]")
            return None
        if not isinstance(value, list) or len(value) != 2:
            self.bad(path, describe(value), expected)
            return None
        a = self.number(path + (Index(0),), value[0], "the window's start, a year 0 or later",
                        ge=0.0)
        b = self.number(path + (Index(1),), value[1], "the window's end, a year 0 or later",
                        ge=0.0)
        if a is None or b is None:
            return None
        if a > b:
            self.bad(path, f"[{a:g}, {b:g}] (the start after the end)", expected,
                     f"write [{b:g}, {a:g}]")
            return None
        return (a, b)

    def dates(self, path, value, exercise, window, kind):
        if exercise != "bermudan":
            if value is not None:
                self.bad(path, describe(value), f"no dates with exercise: {exercise}",
                         "dates apply to exercise: bermudan; delete them or set exercise: bermudan",
                         at="key")
                return None
            return ()
        if value is None:
            self.bad(path, "exercise: bermudan without dates", "a list of exercise dates (years) "
                     "inside the window, e.g. dates: [0, 1, 2]", "add dates:, or use exercise: "
                     "american (any time in the window) or european (its end only)",
                     loc=path[:-1] + ("exercise",))
            return None
        if not isinstance(value, list) or not value:
            self.bad(path, describe(value), "a list of exercise dates (years) inside the window, "
                     "e.g. [0, 1, 2]")
            return None
        out, ok = [], True
        for i, v in enumerate(value):
            d = self.number(path + (Index(i),), v, "an exercise date (years from now), 0 or later",
                            ge=0.0)
            if d is None:
                ok = False
                continue
            if window and not window[0] <= d <= window[1]:
                self.bad(path + (Index(i),), f"{d:g}, outside the window [{window[0]:g}, "
                         f"{window[1]:g}]", "dates inside the window",
                         "widen the window or drop the date")
                ok = False
            out.append(d)
        if not ok:
            return None
        out = sorted(set(out))
        if kind == "defer" and out[0] != 0:
            self.bad(path, describe(value), "defer dates that include 0 (committing now is "
                     "always one of the choices)", "add 0 to the dates")
            return None
        return tuple(out)

    # each right type parses its own keys (realopt/rights/<type>.py); messages are located here
    def right_defer(self, path, item):
        return right_type("defer").parse(self, path, item)

    def right_expand(self, path, item):
        return right_type("expand").parse(self, path, item)

    def right_contract(self, path, item):
        return right_type("contract").parse(self, path, item)

    def right_abandon(self, path, item):
        return right_type("abandon").parse(self, path, item)

    def right_switch(self, path, item):
        return right_type("switch").parse(self, path, item)

    def links(self, path, rights):
        """requires/excludes: known names, not self, requires never an abandon right, no cycle."""
        index = {r.name: i for i, r in enumerate(rights)}
        names = list(index)
        for i, r in enumerate(rights):
            if isinstance(r, model.Defer) and r.requires:
                self.bad(path + (Index(i), "requires"), f"requires on the defer right {r.name}",
                         "no requires on a defer right (committing is the first decision)",
                         "delete requires here; put it on the rights that follow the commitment")
            for key in ("requires", "excludes"):
                for j, target in enumerate(getattr(r, key)):
                    p = path + (Index(i), key, Index(j))
                    if target == r.name:
                        self.bad(p, f"the right's own name {target}",
                                 f"the name of another right in {key}",
                                 f"delete {target} from {key}")
                    elif target not in index:
                        hint = difflib.get_close_matches(target, names, n=1)
                        self.bad(p, f'"{target}", which is not the name of a right',
                                 f"one of: {', '.join(names)}",
                                 f"did you mean {hint[0]}?" if hint else "check the spelling")
                    elif key == "requires" and isinstance(rights[index[target]], model.Abandon):
                        self.bad(p, f"{target}, an abandon right", "a defer, expand, contract "
                                 "or switch right (nothing can follow abandonment)",
                                 f"delete {target} from requires")
            both = set(r.requires) & set(r.excludes)
            for target in sorted(both):
                self.bad(path + (Index(i), "excludes"), f"{target} both required and excluded",
                         "each name in requires or excludes, not both", f"delete {target} from "
                         "one of them")
            for target in r.requires:
                if target in index and r.name in rights[index[target]].excludes:
                    self.bad(path + (Index(i), "requires"), f"{target}, which excludes "
                             f"{r.name}", "requirements that can be met",
                             f"{r.name} could never be used; drop one of the two conditions")
        # cycles in requires (depth-first search; states: 1 = on the path, 2 = done)
        state: dict[str, int] = {}

        def visit(n, trail):
            state[n] = 1
            for m in rights[index[n]].requires:
                if m not in index or m == n:
                    continue
                if state.get(m) == 1:
                    cycle = trail[trail.index(m):] + [m]
                    self.bad(path + (Index(index[n]), "requires"), "a cycle: "
                             + " -> ".join(cycle), "requirements without cycles (a right "
                             "cannot wait for itself)", f"delete {m} from the requires of {n}")
                elif m not in state:
                    visit(m, trail + [m])
            state[n] = 2

        for n in names:
            if n not in state:
                visit(n, [n])

    def on_grid(self, path, rights, dt):
        for i, r in enumerate(rights):
            for d in r.window + r.dates:
                k = d / dt
                if abs(k - round(k)) > 1e-9:
                    self.bad(path + (Index(i), "window"), f"the date {d:g}, between the tree's "
                             f"steps of {dt:g} years", "dates on the explicit tree's grid "
                             f"(multiples of step_years = {dt:g})", "move the date onto a step")

    def cross_checks(self, market, underlying, investment, rights, lattice):
        """Warnings that need several sections (each points at the key to look at)."""
        ipv = investment.present_value(market)
        for i, r in enumerate(rights):
            if isinstance(r, model.Defer) and r.cost is not None:
                c0 = r.cost.at(0.0)
                if abs(c0 - ipv) > 1e-9 * max(1.0, abs(ipv)):
                    self.warn(("rights", Index(i), "cost"),
                              f"{r.name}: the cost of committing at year 0 is {c0:,.4g} but "
                              f"investment.cost is worth {ipv:,.4g} today; committing today "
                              f"through '{r.name}' costs the investment's present value (the "
                              "same commitment as the static NPV) and this cost applies at its "
                              "later exercise dates; leave out the right's cost to use the "
                              "investment plan throughout, or make them agree")
        # windows past the last cash-flow year: warned by the valuation (realopt.appraisal)
        if lattice.explicit and underlying.cash_flows:
            for y, _ in underlying.cash_flows:
                k = y / lattice.step_years
                if abs(k - round(k)) > 1e-9:
                    self.bad(("underlying", "cash_flows", y), f"year {y:g}, between the tree's "
                             f"steps of {lattice.step_years:g} years", "cash-flow years on the "
                             "explicit tree's grid", "use steps_per_year, or move the flow",
                             at="key")
        if self.problems:
            raise ProjectError(sorted(self.problems, key=lambda p: (p.line or 0, p.column or 0)))


_FORM_HINTS = {
    "payout_yield": "payout_yield goes with present_value; with cash_flows the payout is the "
                    "cash flows themselves; delete it",
    "terminal_value": "terminal_value goes with cash_flows (or drivers); delete it",
    "flow_timing": "flow_timing goes with cash_flows or drivers; with present_value the payout "
                   "is the continuous payout_yield; delete it",
    "cash_flow": "cash_flow (singular) is the formula of the drivers form; for flows by year "
                 "use cash_flows",
    "present_value": "present_value is another way of giving the value; keep one",
}


# --------------------------------------------------------------------------------------------
# Public entry points


def build_project(tree: Tree, base_dir) -> model.Project:
    """Validate a raw :class:`Tree` into a Project (ProjectError lists every problem); the
    Project keeps a copy of the raw tree as ``origin`` (data, folder) for moved copies."""
    origin = (copy.deepcopy(tree.data), str(Path(base_dir).resolve()))
    return replace(_Builder(tree, Path(base_dir)).build(), origin=origin)


def load_project(path, overrides: Mapping[str, Any] | None = None, *,
                 labels: Mapping[str, str] | None = None) -> model.Project:
    """Read, override (dotted key paths) and validate a YAML project file.

    Raises :class:`realopt.errors.ProjectError` naming every problem with its file, line, column
    and key path. Paths inside the file resolve against the file's folder.
    """
    tree = read_tree(path)
    if overrides:
        apply_overrides(tree, overrides, labels)
    return build_project(tree, Path(path).resolve().parent)


def loads(text: str, source: str = "<text>", base_dir=".",
          overrides: Mapping[str, Any] | None = None) -> model.Project:
    """Like :func:`load_project` for YAML text (tests, notebooks)."""
    tree = parse_text(text, source)
    if overrides:
        apply_overrides(tree, overrides)
    return build_project(tree, Path(base_dir))
