"""The command line: exit codes, located messages for the malformed corpus, demo projects, JSON.

Contract under test: docs/design.md ("Results contract") and docs/file-format.md and issue 3 (exit codes 0 ok,
1 invalid project or failed valuation, 2 usage; no traceback ever reaches the user).
"""
from __future__ import annotations

import json
import math
import os
import random
import re
import shutil
import sys
from pathlib import Path

import pytest

import realopt
from realopt import cli as cli_module

MALFORMED = Path(__file__).resolve().parent / "malformed"
CORPUS = sorted(MALFORMED.glob("*.yaml"))


def _header(path: Path):
    """The expectations written at the top of a corpus file."""
    expects, at = [], None
    for line in path.read_text(encoding="utf-8", errors="replace").splitlines():
        if not line.startswith("#"):
            break
        if line.startswith("# expect: "):
            expects.append(line[len("# expect: "):])
        elif line.startswith("# expect-at: "):
            at = line[len("# expect-at: "):]
    return expects, at


def _line_of(path: Path, marker: str) -> int:
    """1-based line of the n-th non-comment line containing marker ('text @n', default 1st)."""
    nth = 1
    if " @" in marker:
        marker, n = marker.rsplit(" @", 1)
        nth = int(n)
    seen = 0
    for i, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        if line.startswith("#"):
            continue
        if marker in line:
            seen += 1
            if seen == nth:
                return i
    raise AssertionError(f"marker {marker!r} not in {path.name}")


def _no_traceback(res):
    assert "Traceback" not in res.text
    assert "internal error" not in res.text


def test_corpus_is_large_enough():
    assert len(CORPUS) >= 30


@pytest.mark.parametrize("path", CORPUS, ids=[p.stem for p in CORPUS])
def test_malformed_file_is_refused_with_a_located_message(path, cli, request):
    if path.stem.startswith("probability_"):
        request.getfixturevalue("engine")          # p is checked by the lattice
    expects, at = _header(path)
    assert expects, f"{path.name} states no expectation"
    res = cli("check", path)
    assert res.code == 1, res.text
    _no_traceback(res)
    assert res.out == ""                            # nothing on stdout for an invalid file
    assert str(path) in res.err                     # the message names the file
    for text in expects:
        assert text in res.err, f"{text!r} missing from:\n{res.err}"
    if at is not None:
        line = _line_of(path, at)
        assert re.search(rf"{re.escape(str(path))}:{line}(:\d+)?: ", res.err), \
            f"expected a location at line {line} in:\n{res.err}"


def test_every_corpus_problem_says_what_was_expected(cli):
    """Common practice for user-facing validation: found, expected (and a fix where one exists)."""
    for path in CORPUS:
        err = cli("check", path).err
        for line in err.splitlines()[1:]:
            if line.startswith("  - "):
                assert "found " in line and "expected " in line, (path.name, line)


# ---- files made at test time (not committed) -------------------------------------------------


def test_fifty_megabyte_file_is_refused_without_reading_it_all(tmp_path, cli):
    big = tmp_path / "huge.yaml"
    with open(big, "wb") as fh:
        fh.write(b"project:\n  name: big\n")
        fh.write(b"# padding\n" * (50 * 1024 * 1024 // 10))
    assert big.stat().st_size >= 50 * 1024 * 1024
    res = cli("appraise", big)
    assert res.code == 1
    _no_traceback(res)
    assert "larger than 1.0 MB" in res.err and str(big) in res.err


def test_binary_garbage_is_refused(tmp_path, cli):
    garbage = tmp_path / "garbage.yaml"
    garbage.write_bytes(random.Random(7).randbytes(4096))
    res = cli("check", garbage)
    assert res.code == 1
    _no_traceback(res)
    assert "binary data" in res.err or "not UTF-8" in res.err


def test_text_in_another_encoding_is_refused_with_its_position(tmp_path, cli):
    p = tmp_path / "latin1.yaml"
    p.write_bytes("project:\n  name: Usine de Béziers\n".encode("latin-1"))
    res = cli("check", p)
    assert res.code == 1
    _no_traceback(res)
    assert f"{p}:2:" in res.err and "not UTF-8" in res.err


def test_zero_byte_file_is_refused(tmp_path, cli):
    p = tmp_path / "empty.yaml"
    p.write_bytes(b"")
    res = cli("check", p)
    assert res.code == 1 and "an empty document" in res.err


def test_missing_file_and_folder_are_refused(tmp_path, cli):
    res = cli("appraise", tmp_path / "nope.yaml")
    assert res.code == 1 and "no such file" in res.err
    res = cli("check", tmp_path)
    assert res.code == 1 and "a folder" in res.err


def test_real_entry_point_never_shows_a_traceback(tmp_path, cli_process):
    garbage = tmp_path / "garbage.yaml"
    garbage.write_bytes(random.Random(11).randbytes(2048))
    for path in (garbage, MALFORMED / "billion_laughs.yaml", MALFORMED / "python_tag.yaml",
                 MALFORMED / "deep_nesting.yaml"):
        res = cli_process("appraise", path)
        assert res.code == 1, res.text
        _no_traceback(res)
        assert str(path) in res.err


def test_python_tag_never_runs(tmp_path, cli):
    marker = tmp_path / "ran"
    p = tmp_path / "evil.yaml"
    p.write_text(f"project: !!python/object/apply:os.system ['touch {marker}']\n")
    res = cli("check", p)
    assert res.code == 1 and not marker.exists()


# ---- usage (exit code 2) ---------------------------------------------------------------------


@pytest.mark.parametrize("argv", [
    [],
    ["frobnicate", "projects/coating_line.yaml"],
    ["appraise"],
    ["check"],
    ["appraise", "projects/coating_line.yaml", "--set", "no_equals_sign"],
    ["appraise", "projects/coating_line.yaml", "--steps-per-year", "0"],
    ["appraise", "projects/coating_line.yaml", "--steps-per-year", "many"],
    ["appraise", "projects/coating_line.yaml", "--colour"],
])
def test_wrong_usage_exits_2(argv, cli, repo_root, monkeypatch):
    monkeypatch.chdir(repo_root)
    res = cli(*argv)
    assert res.code == 2, res.text
    _no_traceback(res)
    assert "usage:" in res.err or "name a command" in res.err


def test_help_teaches(cli):
    res = cli("--help")
    assert res.code == 0
    for word in ("check", "appraise", "exit codes", "realopt appraise projects/coating_line.yaml"):
        assert word in res.out
    res = cli("appraise", "--help")
    assert res.code == 0
    for word in ("--json", "--set", "--steps-per-year", "--allow-large", "Shapley"):
        assert word in res.out
    assert cli("--version").out.strip() == f"realopt {realopt.__version__}"


def _help_examples():
    """Every 'realopt ...' example line of the --help texts (top level and each command)."""
    import argparse

    parser = cli_module.build_parser()
    texts = [parser.epilog or ""]
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            texts += [sp.epilog or "" for sp in action.choices.values()]
    out = []
    for text in texts:
        lines = iter(text.splitlines())
        for line in lines:
            m = re.match(r"\s*(?:examples?:\s*)?realopt\s+(.*)$", line)
            if m:
                cmd = m.group(1).rstrip()
                while cmd.endswith("\\"):                # a shell continuation line
                    cmd = cmd[:-1].rstrip() + " " + next(lines, "").strip()
                out.append(cmd.split(" > ")[0].strip())
    return out


def test_every_help_example_runs_on_the_demos(cli, repo_root, monkeypatch, tmp_path, engine):
    """Issue 8 item 9: each example of the --help texts exits 0 on the demo projects, each run
    in a fresh folder (a shell glob is expanded as the shell would; an example naming a
    cluster at a placeholder address is left out; the report's writer is replaced by a
    stand-in that records its call, the report itself being tested in test_outputs.py)."""
    import glob
    import shlex

    from realopt.outputs import report as report_mod

    examples = _help_examples()
    assert len(examples) >= 8 and any(e.startswith("report ") for e in examples)
    written = []
    monkeypatch.setattr(report_mod, "write_report",
                        lambda a, out, **kw: written.append((a.project.name, out)))
    ran = 0
    for k, example in enumerate(examples):
        if re.search(r"--scheduler\s+tcp://", example):
            continue                    # needs a running cluster at a placeholder address
        here = tmp_path / f"example-{k}"        # each example in a fresh folder, as a user
        here.mkdir()                            # trying one would; its output lands there
        (here / "projects").symlink_to(repo_root / "projects")
        monkeypatch.chdir(here)
        argv = []
        for word in shlex.split(example):
            argv += sorted(glob.glob(word)) if "*" in word else [word]
        res = cli(*argv)
        assert res.code == 0, (example, res.text)
        ran += 1
    assert ran >= len(examples) - 1
    assert len(written) == sum(1 for e in examples if e.startswith("report "))


# ---- demo projects ---------------------------------------------------------------------------


def test_three_demo_projects_exist_with_a_header(demo_projects):
    names = {p.name for p in demo_projects}
    assert {"coating_line.yaml", "peaking_unit.yaml", "staged_field.yaml"} <= names
    for p in demo_projects:
        head = p.read_text().split("\nproject:")[0]
        assert "Who would use it" in head and "What it supports" in head, p.name
        assert "invented" in head, p.name


def test_demo_rights_cover_the_issue(demo_projects):
    from realopt.project import load_project

    kinds = {p.stem: {r.kind for r in load_project(p).rights} for p in demo_projects}
    assert {"expand", "abandon"} <= kinds["coating_line"]
    assert {"defer", "switch"} <= kinds["peaking_unit"]
    field = load_project(next(p for p in demo_projects if p.stem == "staged_field"))
    phase2 = [r for r in field.rights if r.requires]
    assert phase2, "the staged field's second phase must require the first"
    assert {field.right(n).kind for r in phase2 for n in r.requires} <= {"defer", "expand"}
    for p in demo_projects:
        proj = load_project(p)
        # modest trees keep `realopt appraise` on a demo well under 1.5 s
        assert proj.horizon <= 12 and proj.horizon * proj.lattice.steps_per_year <= 600, p.name
        if p.stem in ("coating_line", "peaking_unit", "staged_field"):
            assert proj.warnings == (), (p.name, proj.warnings)


def test_demo_check_prints_the_lattice(demo_projects, cli, engine):
    """Cox, Ross & Rubinstein (1979): u = exp(sigma sqrt(dt)), d = 1/u, p = (g - d)/(u - d)."""
    from realopt.project import load_project
    from realopt.underlying import resolve

    for p in demo_projects:
        res = cli("check", p)
        assert res.code == 0, res.text
        proj = load_project(p)
        dt = 1.0 / proj.lattice.steps_per_year
        u = math.exp(resolve(proj).volatility * math.sqrt(dt))
        g = proj.market.risk_free_growth(dt) * math.exp(-proj.underlying.payout_yield * dt)
        prob = (g - 1 / u) / (u - 1 / u)
        out = " ".join(res.out.split())                # lines are wrapped at 100 columns
        assert f"up {u:.6g}, down {1 / u:.6g}" in out
        assert f"risk-neutral probability {prob:.6g}" in out
        assert f"{int(round(proj.horizon / dt))} steps" in out
        assert "valid" in out and "memory about" in out


def test_demo_appraise_prints_the_headline_table(demo_projects, cli, engine):
    for p in demo_projects:
        res = cli("appraise", p)
        assert res.code == 0, res.text
        _no_traceback(res)
        proj = realopt.load_project(p)
        for text in ("Present value of the operating project", "Static NPV", "value alone",
                     "Shapley share", "Interaction", "Expanded NPV", proj.name,
                     f"{proj.currency} {proj.unit}", "When to use each right"):
            assert text in res.out, (p.name, text)
        for r in proj.rights:
            assert r.name in res.out
        assert realopt.CAUTION.split(";")[0].replace("\n", " ") in " ".join(res.out.split())


def test_demo_json_equals_the_python_api(demo_projects, cli, engine):
    for p in demo_projects:
        res = cli("appraise", p, "--json")
        assert res.code == 0, res.text
        printed = json.loads(res.out)
        api = realopt.appraise(realopt.load_project(p)).to_dict()
        assert printed == json.loads(json.dumps(api, default=cli_module._plain))
        for key in ("present_value", "investment_pv", "static_npv", "expanded_npv",
                    "flexibility_value", "rights", "lattice"):
            assert key in printed
        assert math.isclose(printed["flexibility_value"],
                            sum(r["shapley_value"] for r in printed["rights"]), abs_tol=1e-9)


def test_headline_numbers_are_those_of_the_api(cli, repo_root, engine):
    p = repo_root / "projects" / "coating_line.yaml"
    a = realopt.appraise(realopt.load_project(p))
    out = cli("appraise", p).out
    for x in (a.present_value, a.static_npv, a.expanded_npv, a.flexibility_value):
        assert f"{x:,.2f}" in out
    for r in a.rights:
        assert f"{r.standalone_value:,.2f}" in out and f"{r.shapley_value:,.2f}" in out
        assert r.rule.split()[0] in out


# ---- overrides -------------------------------------------------------------------------------


def test_set_and_steps_per_year_change_the_run(cli, repo_root, engine):
    p = repo_root / "projects" / "coating_line.yaml"
    base = json.loads(cli("appraise", p, "--json").out)
    res = cli("appraise", p, "--json", "--set", "underlying.volatility=0.45",
              "--steps-per-year", "24")
    assert res.code == 0, res.text
    d = json.loads(res.out)
    assert d["volatility"] == 0.45
    assert d["lattice"]["steps"] == 24 * realopt.load_project(p).horizon
    # common practice: more volatility never lowers the value of these one-shot rights
    assert d["flexibility_value"] > base["flexibility_value"]
    res = cli("appraise", p, "--json", "--set", "rights.Sell the line to a contract coater.window=[1, 4]")
    assert res.code == 0, res.text
    d = json.loads(res.out)
    sale = next(r for r in d["rights"] if r["type"] == "abandon")
    assert sale["standalone_value"] < next(
        r for r in base["rights"] if r["type"] == "abandon")["standalone_value"]


def test_bad_overrides_exit_1_with_the_override_named(cli, repo_root):
    p = repo_root / "projects" / "coating_line.yaml"
    res = cli("check", p, "--set", "rights.Sell the lime.salvage=10")
    assert res.code == 1
    assert "--set rights.Sell the lime.salvage" in res.err
    assert "did you mean Sell the line to a contract coater?" in res.err
    res = cli("check", p, "--set", "underlying.volatility=-1")
    assert res.code == 1 and "(from --set underlying.volatility)" in res.err
    res = cli("check", p, "--set", "market.risk_free_rate.x=1")
    assert res.code == 1 and "has no keys inside it" in res.err
    res = cli("check", p, "--set", "underlying.volatility=[0.3")
    assert res.code == 1 and "--set underlying.volatility" in res.err
    _no_traceback(res)


def test_steps_per_year_on_an_explicit_tree_is_refused(write_project, cli):
    p = write_project("""\
        project: {name: Textbook tree}
        market: {risk_free_rate: 0.08}
        underlying: {present_value: 100}
        investment: {cost: 104}
        lattice: {up: 1.8, down: 0.6, step_years: 1}
        rights: [{name: Wait, type: defer, window: [0, 1], exercise: european}]
        """)
    res = cli("check", p, "--steps-per-year", "10")
    assert res.code == 1
    assert "(from --steps-per-year 10)" in res.err


# ---- guard, errors, side effects ------------------------------------------------------------


def test_guard_refuses_a_run_beyond_the_machine_and_names_a_smaller_step(cli, repo_root,
                                                                         monkeypatch, engine):
    from realopt.lattice import plan

    p = repo_root / "projects" / "peaking_unit.yaml"
    need = plan(realopt.load_project(p, {"lattice.steps_per_year": 400})).memory_bytes
    memory = need                       # the run needs more than MEMORY_SHARE of this
    monkeypatch.setattr(cli_module, "available_memory", lambda: memory)
    res = cli("appraise", p, "--steps-per-year", "400")
    assert res.code == 1
    _no_traceback(res)
    m = re.search(r"use --steps-per-year (\d+)", res.err)
    assert m and "--allow-large" in res.err, res.err
    smaller = int(m.group(1))
    assert 1 <= smaller < 400
    fits = plan(realopt.load_project(p, {"lattice.steps_per_year": smaller}))
    assert fits.memory_bytes <= cli_module.MEMORY_SHARE * memory
    too_big = plan(realopt.load_project(p, {"lattice.steps_per_year": int(smaller / 0.8) + 1}))
    assert too_big.memory_bytes > cli_module.MEMORY_SHARE * memory * 0.5   # not absurdly small
    res = cli("check", p, "--steps-per-year", "400")
    assert res.code == 0 and "appraise would refuse this run" in res.out
    monkeypatch.setattr(cli_module, "TIME_LIMIT", 1e9)
    res = cli("appraise", p, "--steps-per-year", "400", "--allow-large", "--json")
    assert res.code == 0, res.text


FOUR_RIGHTS = """
project: {name: "Four rights (invented figures)"}
market: {risk_free_rate: 0.04, discount_rate: 0.09}
underlying:
  cash_flows: {1: 8, 2: 9, 3: 10, 4: 10, 5: 10, 6: 10, 7: 10, 8: 10, 9: 10, 10: 10}
  terminal_value: 40
  volatility: 0.3
investment: {cost: 60}
lattice: {steps_per_year: 1000}
rights:
  - {name: Wait, type: defer, window: [0, 2]}
  - {name: Grow, type: expand, window: [2, 4], scale: 0.3, cost: 10}
  - {name: Grow more, type: expand, window: [3, 8], scale: 0.3, cost: 12, requires: [Grow]}
  - {name: Sell, type: abandon, window: [5, 10], salvage: 15}
"""


def test_time_estimate_costs_each_distinct_subset_with_its_own_states(engine):
    """Issue 8 item 9: the estimate was several times too pessimistic at 1,000-2,000 steps a
    year because it charged every one of the 2^n subset solves with all of the project's
    states. Subsets that leave the same rights usable are solved once (the appraisal caches
    them), and a subset's solve costs its own states. Measured ratios: bench_plan.py."""
    from realopt.lattice import NODE_SECONDS, plan
    from realopt.project import loads

    pl = plan(loads(FOUR_RIGHTS))
    # 15 non-empty subsets; the 4 holding 'Grow more' without Grow use the same rights as
    # without 'Grow more'
    assert pl.solves == 11
    nodes = (pl.steps + 1) * (pl.steps + 2) / 2
    live = pl.states - 1                               # every state but 'abandoned'
    charged_all = NODE_SECONDS * nodes * live * (2 ** 4)
    assert pl.seconds_estimate < 0.8 * charged_all + pl.solve_seconds * 10
    assert pl.solve_seconds >= NODE_SECONDS * nodes * live


def test_time_guard(cli, repo_root, monkeypatch, engine):
    monkeypatch.setattr(cli_module, "TIME_LIMIT", 1e-9)
    res = cli("appraise", repo_root / "projects" / "coating_line.yaml")
    assert res.code == 1 and "the limit is" in res.err and "--allow-large" in res.err


def test_valuation_error_exits_1_naming_the_file(cli, repo_root, monkeypatch, engine):
    def fail(project):
        raise realopt.ValuationError("The risk-neutral probability is 1.2. Fix: more steps")

    monkeypatch.setattr(engine, "appraise", fail)
    p = repo_root / "projects" / "coating_line.yaml"
    res = cli("appraise", p)
    assert res.code == 1
    assert res.err.startswith(f"{p}: The risk-neutral probability is 1.2")


def test_unexpected_errors_are_short_messages(cli, repo_root, monkeypatch):
    def boom(args):
        raise ZeroDivisionError("float division by zero")

    monkeypatch.setattr(cli_module, "run_appraise", boom)
    monkeypatch.delenv("REALOPT_DEBUG", raising=False)
    res = cli("appraise", repo_root / "projects" / "coating_line.yaml")
    assert res.code == 1
    assert "internal error (ZeroDivisionError: float division by zero)" in res.err
    assert "Traceback" not in res.err
    monkeypatch.setenv("REALOPT_DEBUG", "1")
    with pytest.raises(ZeroDivisionError):
        cli("appraise", repo_root / "projects" / "coating_line.yaml")


def test_nothing_is_written_to_disk(tmp_path, repo_root, cli, monkeypatch, engine):
    shutil.copy(repo_root / "projects" / "coating_line.yaml", tmp_path)
    monkeypatch.chdir(tmp_path)
    before = sorted(os.listdir(tmp_path))
    assert cli("check", "coating_line.yaml").code == 0
    assert cli("appraise", "coating_line.yaml").code == 0
    assert cli("appraise", "coating_line.yaml", "--json").code == 0
    assert sorted(os.listdir(tmp_path)) == before


def test_entry_points_and_no_plotting_import(cli_process, repo_root, engine):
    code = ("import sys; from realopt.cli import main; "
            "rc = main(['appraise', 'projects/coating_line.yaml']); "
            "print('PLOT' if any(m.startswith('matplotlib') for m in sys.modules) else 'NOPLOT'); "
            "sys.exit(rc)")
    import subprocess

    r = subprocess.run([sys.executable, "-c", code], cwd=repo_root, capture_output=True,
                       text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip().endswith("NOPLOT")
    res = cli_process("appraise", "projects/coating_line.yaml")
    assert res.code == 0 and "Expanded NPV" in res.out
    script = shutil.which("realopt")
    if script:
        r = subprocess.run([script, "check", "projects/coating_line.yaml"], cwd=repo_root,
                           capture_output=True, text=True, timeout=300)
        assert r.returncode == 0, r.stderr


def test_non_ascii_terminal(write_project, minimal_project_text, cli_process, engine):
    p = write_project(minimal_project_text.replace("Test plant", "Usine de Béziers – ligne 2 (€)"))
    res = cli_process("appraise", p, env={"PYTHONIOENCODING": "ascii"})
    assert res.code == 0, res.text
    _no_traceback(res)
    assert "Usine de B?ziers" in res.out


def test_check_reports_every_file(cli, repo_root):
    good = repo_root / "projects" / "coating_line.yaml"
    bad = MALFORMED / "reversed_window.yaml"
    res = cli("check", good, bad, good)
    assert res.code == 1
    assert res.out.count(f"{good}: valid") == 2
    assert f"{bad}:" in res.err and "the start after the end" in res.err


def _register_dummy(sub):
    p = sub.add_parser("dummy", help="a command added through COMMANDS")
    p.add_argument("word")
    p.set_defaults(run=lambda args: print(f"dummy {args.word}") or 0)


def test_a_command_is_added_in_one_place(cli, monkeypatch):
    monkeypatch.setattr(cli_module, "COMMANDS", cli_module.COMMANDS + ("test_cli:_register_dummy",))
    assert "dummy" in cli("--help").out
    res = cli("dummy", "hello")
    assert res.code == 0 and res.out == "dummy hello\n"


def test_report_guard_counts_the_reports_extra_solves(cli, repo_root, monkeypatch, engine,
                                                       tmp_path):
    # A time limit between the appraisal's estimate and the report's (appraisal + sensitivities)
    # lets appraise run but refuses report, before anything is written.
    from realopt.lattice import plan
    from realopt.outputs.sensitivity import report_solves

    path = repo_root / "projects" / "coating_line.yaml"
    project = realopt.load_project(path)
    pl = plan(project)
    report_estimate = pl.seconds_estimate * (1 + report_solves(project) / pl.solves)
    assert report_estimate > 10 * pl.seconds_estimate
    monkeypatch.setattr(cli_module, "TIME_LIMIT", 2 * pl.seconds_estimate)
    assert cli("appraise", path).code == 0
    out = tmp_path / "rep"
    res = cli("report", path, "-o", out)
    assert res.code == 1 and "the limit is" in res.err and "--allow-large" in res.err
    assert "Traceback" not in res.text and not out.exists()


def test_check_shows_the_estimated_volatility(cli, repo_root, engine):
    """Issue 8 item 9: `check` computes the simulated (or history) volatility to build the
    lattice; it prints that figure, the one `appraise` uses, with its standard error."""
    p = repo_root / "projects" / "flake_line.yaml"
    a = realopt.appraise(realopt.load_project(p))
    assert a.volatility_stderr is not None               # the demo's volatility is simulated
    out = " ".join(cli("check", p).out.split())
    assert f"estimated from simulation: {a.volatility:.1%} a year" in out
    assert f"(standard error {a.volatility_stderr:.1%})" in out


def test_headline_shows_base_stderr_and_headline_warnings(cli, repo_root, engine, monkeypatch):
    """Page one of the terminal output carries the base project, V0's standard error and
    the headline warnings when the result has them; tiny negatives print as 0.00."""
    from dataclasses import replace as dc_replace

    p = repo_root / "projects" / "coating_line.yaml"
    a = realopt.appraise(realopt.load_project(p))
    first = dc_replace(a.rights[0], shapley_value=-1e-12)
    a = dc_replace(a, rights=(first,) + a.rights[1:])
    object.__setattr__(a, "headline_warnings", ("Sell the line: proceeds after the last flow",))
    object.__setattr__(a, "base", "the plant in its run mode")
    object.__setattr__(a, "present_value_stderr", 0.123)
    assert not cli_module._base_is_not_plain(a.project)   # no switch: the base goes unsaid
    assert "Base project" not in cli_module.headline(a)
    monkeypatch.setattr(cli_module, "_base_is_not_plain", lambda project: True)
    text = cli_module.headline(a)
    head = text.split("When to use each right")[0]
    assert "Base project: the plant in its run mode" in head
    assert "\u00b1 0.12 (standard error)" in head
    assert "Sell the line: proceeds after the last flow" in head
    assert "-0.00" not in text
