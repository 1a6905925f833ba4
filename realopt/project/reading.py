"""Reading: bytes -> UTF-8 text -> YAML nodes -> plain data with the position of every value.

Only plain YAML data is accepted: the file is *composed* with PyYAML's safe loader (nothing is
constructed by PyYAML) and converted node by node here, so tags are refused, nested aliases cannot
blow up (a budget on the number of values) and every value keeps its 1-based line and column.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from ..errors import Problem, ProjectError
from .paths import Index, format_path

MAX_FILE_BYTES = 1_000_000        # a project file is a few kilobytes; data belongs in a CSV
MAX_NODES = 100_000               # values after expanding aliases ("billion laughs" guard)
MAX_DEPTH = 32                    # nesting of lists/mappings

# libyaml's safe composer when PyYAML was built with it (20x faster), else the pure-Python one;
# both only compose nodes: nothing is constructed by PyYAML here.
_LOADER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)
_TAG = "tag:yaml.org,2002:"
_SCALAR_TAGS = {_TAG + t for t in ("str", "int", "float", "bool", "null", "timestamp", "value")}
_TEXT_TAGS = {_TAG + t for t in ("str", "timestamp", "value")}
_FLOAT_TEXT = re.compile(r"^[-+]?(\d[\d_]*\.?\d*|\.\d+)[eE][-+]?\d+$")   # 1e-3 (YAML 1.1 misses it)


def _size(n: int) -> str:
    return f"{n / 1e6:.1f} MB" if n >= 1e5 else f"{n / 1e3:.0f} kB"


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

