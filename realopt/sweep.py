"""``realopt sweep FILE --vary KEY=START:STOP:N ... [-o DIR]``: a grid of what-ifs on Dask.

Each point of the grid is one appraisal of FILE with ``--set KEY=VALUE`` for every varied key,
exactly what ``realopt appraise FILE --set KEY=VALUE ... --json`` prints, byte for byte: the point
is loaded by the same loader with the same override text and serialised by the same
:func:`realopt.jsontext.to_json`.

``--vary KEY=START:STOP:N`` gives N evenly spaced values, both ends included, computed exactly
(rational arithmetic, then the nearest float) and written as the shortest text that reads back as
the same number; whole-number ends with whole steps stay whole (``12:48:4`` -> 12, 24, 36, 48).
``--vary KEY=v1,v2,...`` gives the values as written (commas inside brackets or quotes do not
split). Several ``--vary`` make the full grid, the first key varying slowest.

Order of work: every point is loaded, validated, resolved (files read) and checked against the
machine's means *before* any cluster is started; one bad point stops the run with its KEY=VALUE
and the message. Then the missing points go to Dask (:mod:`realopt.fanout`) and each result is
written as it arrives to ``DIR/points/NNNNNN.json`` (temp file + rename). At the end
``DIR/sweep.csv``, ``DIR/sweep.parquet`` and the figure are written, also atomically.

Folder: DIR must be new, empty, or (with ``--resume``) an earlier run of the same sweep (its
``.realopt-sweep`` manifest names the file, its content hash and the grid); anything else is
refused. The command itself (parser, validation of the points, run) is in
realopt.sweep_command.
"""
from __future__ import annotations

import itertools
import json
import os
import re
from dataclasses import dataclass
from pathlib import Path

from .errors import RealoptError

MANIFEST = ".realopt-sweep"
_UMASK = os.umask(0)
os.umask(_UMASK)
MAX_POINTS = 100_000
_NUM = r"[-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?"
_RANGE = re.compile(rf"^\s*({_NUM})\s*:\s*({_NUM})\s*:\s*([-+]?\d+)\s*$")
_WHOLE = re.compile(r"^\s*[-+]?\d+\s*$")


# ------------------------------------------------------------------------------------------
# Grid


@dataclass(frozen=True)
class Vary:
    """One varied key and its values as ``--set`` text."""

    key: str
    values: tuple[str, ...]
    spec: str


def number_text(x, whole: bool) -> str:
    """Shortest text of ``x`` that the project loader reads back as the same number: a whole
    number as digits, else Python's round-trip repr of the nearest float, with a decimal point
    before any exponent (YAML reads ``1e-05`` as text, ``1.0e-05`` as a number)."""
    if whole and x.denominator == 1:
        return str(x.numerator)
    t = repr(float(x))
    if "e" in t:
        mant, exp = t.split("e")
        if "." not in mant:
            mant += ".0"
        t = f"{mant}e{exp}"
    return t


def split_list(text: str) -> list[str]:
    """Split at commas outside brackets, braces and quotes."""
    out, depth, quote, cur = [], 0, None, []
    for ch in text:
        if quote:
            quote = None if ch == quote else quote
        elif ch in "\"'":
            quote = ch
        elif ch in "[{(":
            depth += 1
        elif ch in "]})":
            depth -= 1
        elif ch == "," and depth == 0:
            out.append("".join(cur).strip())
            cur = []
            continue
        cur.append(ch)
    out.append("".join(cur).strip())
    return out


def parse_vary(text: str) -> Vary:
    """``KEY=START:STOP:N`` or ``KEY=v1,v2,...`` -> :class:`Vary` (RealoptError if malformed)."""
    key, sep, spec = text.partition("=")
    key, spec = key.strip(), spec.strip()
    if not sep or not key or not spec:
        raise RealoptError(f"--vary {text}: expected KEY=START:STOP:N (e.g. "
                           "underlying.volatility=0.2:0.4:5) or KEY=v1,v2,... (e.g. "
                           "investment.cost=30,35,40)")
    m = _RANGE.match(spec)
    if m:
        a, b, n = m.group(1), m.group(2), int(m.group(3))
        if n < 1:
            raise RealoptError(f"--vary {key}={spec}: N is {n}; expected a whole number of 1 or "
                               f"more (the count of values from {a} to {b}, both included)")
        if n > MAX_POINTS:
            raise RealoptError(f"--vary {key}={spec}: N is {n:,}; at most {MAX_POINTS:,} points")
        from fractions import Fraction

        fa, fb = Fraction(a), Fraction(b)
        if n == 1 and fa != fb:
            raise RealoptError(f"--vary {key}={spec}: one value cannot include both {a} and {b}. "
                               f"Fix: use N of 2 or more, or write --vary {key}={a}")
        whole = bool(_WHOLE.match(a) and _WHOLE.match(b))
        vals = [fa if n == 1 else fa + (fb - fa) * k / (n - 1) for k in range(n)]
        values = tuple(number_text(v, whole) for v in vals)
        from .project import parse_value

        for v, text_v in zip(vals, values):        # the text reads back as the same number
            back = parse_value(text_v, key)
            if not (isinstance(back, (int, float)) and float(back) == float(v)):
                raise RealoptError(f"--vary {key}={spec}: internal: {text_v} does not read back "
                                   "as a number")
    else:
        values = tuple(split_list(spec))
        if any(not v for v in values):
            raise RealoptError(f"--vary {key}={spec}: an empty value in the list. Fix: write "
                               "the values separated by single commas, e.g. 0.2,0.3,0.4")
    if len(set(values)) != len(values):
        raise RealoptError(f"--vary {key}={spec}: a value appears twice ({', '.join(values)})")
    return Vary(key=key, values=values, spec=spec)


def grid(varies: list[Vary]) -> list[tuple[str, ...]]:
    """Every combination of the values, the first key varying slowest."""
    return list(itertools.product(*(v.values for v in varies)))


def point_label(varies, point) -> str:
    return ", ".join(f"{v.key}={x}" for v, x in zip(varies, point))


# ------------------------------------------------------------------------------------------
# The output folder


def file_hash(path) -> str:
    import hashlib

    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def manifest_for(args, varies, fixed) -> dict:
    return {"kind": "realopt sweep", "version": 1, "file": str(args.file),
            "file_sha256": file_hash(args.file),
            "set": [[k, v] for k, v in fixed],
            "steps_per_year": getattr(args, "steps_per_year", None),
            "vary": [[v.key, list(v.values)] for v in varies]}


def check_folder(out: Path, manifest: dict, resume: bool) -> bool:
    """Refuse an output folder that is neither new, empty, nor (with --resume) an earlier run
    of the same sweep; creates nothing. True when it holds that earlier run."""
    if out.exists() and not out.is_dir():
        raise RealoptError(f"-o {out}: this is a file, not a folder. Fix: name a new folder")
    entries = sorted(p.name for p in out.iterdir()) if out.is_dir() else []
    if not entries:
        return False
    mpath = out / MANIFEST
    if not mpath.is_file():
        raise RealoptError(
            f"-o {out}: the folder holds other files ({', '.join(entries[:3])}"
            f"{', ...' if len(entries) > 3 else ''}) and is not a realopt sweep. Fix: name "
            "a new or empty folder")
    try:
        old = json.loads(mpath.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        old = None
    if not resume:
        raise RealoptError(
            f"-o {out}: the folder holds an earlier sweep. Fix: add --resume to complete "
            "it (only missing points are computed), or name a new folder")
    if old != manifest:
        what = "another sweep"
        if isinstance(old, dict):
            if old.get("file") != manifest["file"]:
                what = f"a sweep of {old.get('file')}"
            elif old.get("file_sha256") != manifest["file_sha256"]:
                what = "a sweep of an earlier version of the project file"
            elif old.get("vary") != manifest["vary"]:
                what = "a sweep of another grid (--vary differs)"
            else:
                what = "a sweep with other --set or --steps-per-year options"
        raise RealoptError(f"-o {out}: --resume, but the folder holds {what}. Fix: run the "
                           "same command as the earlier run, or name a new folder")
    return True


def prepare_folder(out: Path, manifest: dict, resume: bool) -> None:
    """Check the folder (:func:`check_folder`), then create it with its manifest if new."""
    if check_folder(out, manifest, resume):
        (out / "points").mkdir(exist_ok=True)
        return
    (out / "points").mkdir(parents=True, exist_ok=True)
    write_atomic(out / MANIFEST, json.dumps(manifest, indent=2) + "\n")


def write_atomic(path: Path, data, binary: bool = False) -> None:
    """Write ``data`` to a temp file beside ``path`` and rename it over ``path``."""
    import tempfile

    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.tmp-", dir=path.parent)
    try:
        os.fchmod(fd, 0o666 & ~_UMASK)
        with os.fdopen(fd, "wb" if binary else "w", **({} if binary else
                                                       {"encoding": "utf-8", "newline": ""})) as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def point_path(out: Path, index: int) -> Path:
    return out / "points" / f"{index + 1:06d}.json"


def done_points(out: Path, n: int) -> set[int]:
    """Indices whose point file is complete (valid JSON); stray temp files are removed."""
    done = set()
    folder = out / "points"
    for p in folder.iterdir():
        if p.name.startswith("."):
            try:
                p.unlink()
            except OSError:
                pass
            continue
        m = re.fullmatch(r"(\d{6})\.json", p.name)
        if not m or not 1 <= int(m.group(1)) <= n:
            continue
        try:
            json.loads(p.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        done.add(int(m.group(1)) - 1)
    return done


# ------------------------------------------------------------------------------------------
# The table


def table(out: Path, varies, points):
    """One row a point: the varied keys (as --set text, named as given), then the contract's
    columns. Returns (csv DataFrame, parquet DataFrame)."""
    import pandas as pd

    rows = []
    for i, point in enumerate(points):
        d = json.loads(point_path(out, i).read_text(encoding="utf-8"))
        row = {"point": i + 1}
        row.update({v.key: x for v, x in zip(varies, point)})
        for k in ("present_value", "investment_pv", "static_npv", "expanded_npv",
                  "flexibility_value"):
            row[k] = d.get(k)
        for r in d.get("rights", []):
            row[f"shapley_value: {r['name']}"] = r.get("shapley_value")
        row["decision_today"] = d.get("decision_today")
        for k, v in (d.get("standard_error") or {}).items():
            row[f"standard_error: {k}"] = v
        rows.append(row)
    text = pd.DataFrame(rows)
    typed = text.copy()
    from .project import parse_value

    for v in varies:
        vals = [parse_value(x, v.key) for x in v.values]
        if all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in vals):
            kind = int if all(isinstance(x, int) for x in vals) else float
            lookup = dict(zip(v.values, (kind(x) for x in vals)))
            typed[v.key] = typed[v.key].map(lookup)
    return text, typed


def _write_parquet(path: Path, df) -> None:
    import io

    buf = io.BytesIO()
    df.to_parquet(buf, index=False)        # pyarrow
    write_atomic(path, buf.getvalue(), binary=True)


def _figure(out: Path, varies, typed) -> str | None:
    if len(varies) not in (1, 2):
        return None
    from .outputs.sweep_figures import sweep_png

    first = json.loads(point_path(out, 0).read_text(encoding="utf-8"))
    money = " ".join(x for x in (first.get("currency"), first.get("unit")) if x)
    png = sweep_png(typed, [v.key for v in varies], money)
    write_atomic(out / "sweep.png", png, binary=True)
    return "sweep.png"
