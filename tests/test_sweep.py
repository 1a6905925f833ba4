"""realopt sweep: the grid, validation before any work, bit-for-bit points, and Dask for real.

The cluster tests start real components: a ``dask scheduler`` and two ``dask worker`` processes
on 127.0.0.1 (module fixture, bounded waits, always stopped), and the embedded LocalCluster of
``realopt sweep --workers 2`` in a subprocess. Every point is compared byte for byte with the
JSON text ``realopt appraise FILE --set ... --json`` prints (the command run for some points, the
same serializer in-process for the rest).
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from fractions import Fraction
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from realopt.jsontext import to_json
from realopt.project import load_project, parse_value
from realopt.sweep import grid, number_text, parse_vary, split_list
from realopt.errors import RealoptError

ROOT = Path(__file__).resolve().parents[1]
COATING = ROOT / "projects" / "coating_line.yaml"


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT)] + [p for p in [env.get("PYTHONPATH")] if p])
    env.pop("REALOPT_DEBUG", None)
    return env


def _run(*argv, timeout=180):
    r = subprocess.run([sys.executable, "-m", "realopt", *map(str, argv)], capture_output=True,
                       text=True, env=_env(), timeout=timeout, cwd=ROOT)
    return r.returncode, r.stdout, r.stderr


def _expected(path, over: dict) -> str:
    """What `realopt appraise path --set K=V ... --json` prints, made in-process."""
    from realopt.appraisal import appraise

    parsed = {k: parse_value(v, k) for k, v in over.items()}
    return to_json(appraise(load_project(str(path), parsed)).to_dict()) + "\n"


def _points(out: Path):
    return sorted((out / "points").glob("*.json"))


# ------------------------------------------------------------------------------------------
# The grid


def test_range_values_are_exact_decimals_and_read_back():
    # evenly spaced with both ends (docs/design.md, section 9); exact rational steps,
    # so 0.1:0.5:5 gives the decimals themselves, not accumulated float error (common practice)
    v = parse_vary("underlying.volatility=0.1:0.5:5")
    assert v.values == ("0.1", "0.2", "0.3", "0.4", "0.5")
    assert parse_vary("lattice.steps_per_year=12:48:4").values == ("12", "24", "36", "48")
    small = parse_vary("market.risk_free_rate=0:2e-5:3").values
    assert small == ("0.0", "1.0e-05", "2.0e-05")          # YAML reads 1e-05 as text
    assert [parse_value(x) for x in small] == [0.0, 1e-5, 2e-5]
    assert parse_vary("k=0.3:0.3:1").values == ("0.3",)


@settings(max_examples=200, deadline=None)
@given(st.floats(allow_nan=False, allow_infinity=False, width=64), st.booleans())
def test_number_text_reads_back_to_the_same_float(x, whole):
    text = number_text(Fraction(x), whole)
    back = parse_value(text)
    assert isinstance(back, (int, float)) and float(back) == x


def test_lists_keep_values_as_written_and_grid_order():
    assert split_list("[0, 2],[0, 3], {1: 5}") == ["[0, 2]", "[0, 3]", "{1: 5}"]
    a = parse_vary("rights.Sell the plant.window=[0, 2],[0, 3]")
    b = parse_vary("underlying.volatility=0.2,0.3")
    assert a.key == "rights.Sell the plant.window" and a.values == ("[0, 2]", "[0, 3]")
    assert grid([a, b]) == [("[0, 2]", "0.2"), ("[0, 2]", "0.3"), ("[0, 3]", "0.2"),
                            ("[0, 3]", "0.3")]


@pytest.mark.parametrize("text, words", [
    ("underlying.volatility=0.2:0.4:0", "N is 0"),
    ("underlying.volatility=0.2:0.4:-3", "1 or"),
    ("underlying.volatility=0.2:0.4:1", "cannot include both"),
    ("underlying.volatility", "expected KEY=START:STOP:N"),
    ("underlying.volatility=0.2,,0.3", "empty value"),
    ("underlying.volatility=0.2,0.2", "appears twice"),
])
def test_malformed_vary_is_refused(text, words):
    with pytest.raises(RealoptError, match=words):
        parse_vary(text)


# ------------------------------------------------------------------------------------------
# Refusals before any work (in-process: no cluster is ever started for these)


def test_bad_point_refused_with_its_key_value_before_anything_is_written(cli, tmp_path):
    out = tmp_path / "s"
    r = cli("sweep", COATING, "--vary", "underlying.volatility=0.3,0,-1", "-o", out, "--quiet")
    assert r.code == 1
    assert "point underlying.volatility=0:" in r.err and "point underlying.volatility=-1:" in r.err
    assert "above 0" in r.err and "nothing was run" in r.err
    assert "Traceback" not in r.err and not out.exists()
    r = cli("sweep", COATING, "--vary", "underlying.volatilty=0.2:0.4:2", "-o", out)
    assert r.code == 1 and "underlying.volatilty=0.2" in r.err
    assert "did you mean volatility" in r.err
    r = cli("sweep", COATING, "--vary", "lattice.steps_per_year=12:48:6", "-o", out)
    assert r.code == 1 and "lattice.steps_per_year=19.2" in r.err and "whole number" in r.err
    assert not out.exists()


def test_output_folder_holding_something_else_is_refused(cli, tmp_path):
    (tmp_path / "notes.txt").write_text("mine")
    r = cli("sweep", COATING, "--vary", "underlying.volatility=0.3", "-o", tmp_path)
    assert r.code == 1 and "not a realopt sweep" in r.err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]


def test_resume_refuses_a_folder_of_another_sweep(cli, tmp_path, minimal_project_text):
    import argparse

    from realopt.sweep import manifest_for, prepare_folder

    path = tmp_path / "p.yaml"
    path.write_text(minimal_project_text)
    out = tmp_path / "s"
    args = argparse.Namespace(file=str(path), steps_per_year=None)
    varies = [parse_vary("underlying.volatility=0.2,0.3")]
    prepare_folder(out, manifest_for(args, varies, []), resume=False)
    argv = ["sweep", path, "--vary", "underlying.volatility=0.2,0.3", "-o", out, "--resume"]
    r = cli(*argv[:3], "underlying.volatility=0.2,0.4", *argv[4:])
    assert r.code == 1 and "another grid" in r.err
    path.write_text(minimal_project_text.replace("0.25", "0.26"))
    r = cli(*argv)
    assert r.code == 1 and "earlier version of the project file" in r.err
    assert sorted(p.name for p in (out / "points").iterdir()) == []


def test_unreachable_scheduler_fails_fast_with_a_clear_message(cli, tmp_path):
    import socket

    with socket.socket() as s:              # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    t0 = time.monotonic()
    r = cli("sweep", COATING, "--vary", "underlying.volatility=0.3", "-o", tmp_path / "s",
            "--scheduler", f"tcp://127.0.0.1:{port}")
    assert time.monotonic() - t0 < 15
    assert r.code == 1 and "no Dask scheduler answered" in r.err and "Fix:" in r.err
    assert not (tmp_path / "s").exists()


# ------------------------------------------------------------------------------------------
# Resolved projects: workers read no file


HISTORY_PROJECT = """\
project: {name: Kiln line with a price history, currency: EUR, unit: million}
market: {risk_free_rate: 0.03, discount_rate: 0.09}
underlying:
  cash_flows: {file: forecast.csv, year: year, value: flow}
  terminal_value: 40.0
  volatility: {estimate: history, file: prices.csv, column: price, periods_per_year: 12}
investment: {cost: 60.0}
lattice: {steps_per_year: 12}
rights:
  - {name: Wait for the tender, type: defer, window: [0, 3]}
  - {name: Sell the kiln, type: abandon, salvage: 35.0, window: [0, 6]}
"""


def _history_project(folder: Path) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "forecast.csv").write_text(
        "year,flow\n" + "".join(f"{y},{6 + 0.5 * y}\n" for y in range(1, 9)))
    prices, p = [], 100.0
    for k in range(60):                     # a deterministic zig-zag series (invented)
        p *= 1.06 if k % 3 else 0.93
        prices.append(p)
    (folder / "prices.csv").write_text("month,price\n" + "".join(
        f"{k},{x:.4f}\n" for k, x in enumerate(prices)))
    path = folder / "kiln.yaml"
    path.write_text(HISTORY_PROJECT)
    return path


def test_resolved_project_needs_no_file_and_gives_the_same_bytes(tmp_path):
    from realopt.appraisal import appraise
    from realopt.fanout import resolve_for_workers

    path = _history_project(tmp_path / "p")
    project = load_project(path)
    before = to_json(appraise(project).to_dict())
    resolved = resolve_for_workers(project)
    (tmp_path / "p" / "prices.csv").unlink()
    (tmp_path / "p" / "forecast.csv").unlink()
    assert to_json(appraise(resolved).to_dict()) == before
    from realopt.underlying import _resolve
    _resolve.cache_clear()
    assert to_json(appraise(resolved).to_dict()) == before     # not from a cache
    with pytest.raises(RealoptError):
        appraise(project)                    # the unresolved project would read the file


# ------------------------------------------------------------------------------------------
# An external cluster: `dask scheduler` + two `dask worker` processes on 127.0.0.1


def _wait(cond, timeout, what):
    t0 = time.monotonic()
    while not cond():
        if time.monotonic() - t0 > timeout:
            raise TimeoutError(f"gave up waiting for {what} after {timeout} s")
        time.sleep(0.05)


@pytest.fixture(scope="module")
def dask_cluster(tmp_path_factory):
    pytest.importorskip("distributed")
    folder = tmp_path_factory.mktemp("cluster")
    sched_file = folder / "scheduler.json"
    procs = []
    logs = []

    def start(*argv):
        log = open(folder / f"log{len(procs)}.txt", "w")
        logs.append(log)
        procs.append(subprocess.Popen([*argv], stdout=log, stderr=subprocess.STDOUT,
                                      env=_env(), cwd=folder, start_new_session=True))
        return procs[-1]

    try:
        dask = [sys.executable, "-m", "distributed.cli.dask_scheduler"]
        start(*dask, "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
              "--scheduler-file", str(sched_file))
        _wait(lambda: sched_file.exists() and sched_file.stat().st_size > 0, 60, "the scheduler")
        address = json.loads(sched_file.read_text())["address"]
        workers = [start(sys.executable, "-m", "distributed.cli.dask_worker", address,
                         "--nthreads", "1", "--no-nanny", "--no-dashboard",
                         "--host", "127.0.0.1") for _ in range(2)]
        from distributed import Client

        with Client(address, timeout=20) as c:
            c.wait_for_workers(2, timeout=60)
        yield address, workers
    finally:
        for p in reversed(procs):
            if p.poll() is None:
                p.terminate()
        for p in procs:
            try:
                p.wait(3)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait(10)
        for log in logs:
            log.close()


def test_sweep_on_external_cluster_with_files_removed_once_started(dask_cluster, tmp_path):
    address, _ = dask_cluster
    path = _history_project(tmp_path / "p")
    out = tmp_path / "sweep"
    argv = [sys.executable, "-m", "realopt", "sweep", str(path), "--vary",
            "underlying.terminal_value=30:60:4", "--vary", "lattice.steps_per_year=60,72",
            "--scheduler", address, "-o", str(out), "--quiet"]
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=_env(), cwd=ROOT)
    try:
        _wait(lambda: (out / "points").is_dir() and _points(out), 120, "the first point")
        hidden = tmp_path / "hidden"
        hidden.mkdir()
        for name in ("forecast.csv", "prices.csv"):         # the analyst's files go away
            (tmp_path / "p" / name).rename(hidden / name)
        at_removal = len(_points(out))
        stdout, stderr = proc.communicate(timeout=180)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, stderr
    assert at_removal < 8                       # some points were computed after the removal
    for name in ("forecast.csv", "prices.csv"):
        (hidden / name).rename(tmp_path / "p" / name)
    files = _points(out)
    assert len(files) == 8
    import pandas as pd

    table = pd.read_csv(out / "sweep.csv", dtype=str)
    assert list(table.columns[:3]) == ["point", "underlying.terminal_value",
                                       "lattice.steps_per_year"]
    for _, row in table.iterrows():
        over = {"underlying.terminal_value": row["underlying.terminal_value"],
                "lattice.steps_per_year": row["lattice.steps_per_year"]}
        text = (out / "points" / f"{int(row['point']):06d}.json").read_text()
        assert text == _expected(path, over)
    # the real command, byte for byte, for two points
    for k in (0, 7):
        row = table.iloc[k]
        code, printed, _ = _run("appraise", path, "--set",
                                f"underlying.terminal_value={row['underlying.terminal_value']}",
                                "--set", f"lattice.steps_per_year={row['lattice.steps_per_year']}",
                                "--json")
        assert code == 0
        assert printed == (out / "points" / f"{k + 1:06d}.json").read_text()


def test_killed_worker_loses_nothing_and_each_point_arrives_once(dask_cluster, tmp_path):
    address, workers = dask_cluster
    out = tmp_path / "sweep"
    argv = [sys.executable, "-m", "realopt", "sweep", str(COATING), "--vary",
            "underlying.volatility=0.2:0.5:10", "--steps-per-year", "72",
            "--scheduler", address, "-o", str(out), "--quiet"]
    proc = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            env=_env(), cwd=ROOT)
    try:
        _wait(lambda: (out / "points").is_dir() and _points(out), 120, "the first point")
        workers[0].kill()                      # SIGKILL: whatever it held is lost
        at_kill = len(_points(out))
        stdout, stderr = proc.communicate(timeout=180)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, stderr
    assert at_kill < 10
    assert "10 points (10 computed now, 0 from an earlier run)" in stdout
    assert "duplicate" not in stdout + stderr
    files = _points(out)
    assert [f.name for f in files] == [f"{k:06d}.json" for k in range(1, 11)]
    values = parse_vary("underlying.volatility=0.2:0.5:10").values
    for f, v in zip(files, values):
        assert f.read_text() == _expected(COATING, {"underlying.volatility": v,
                                                    "lattice.steps_per_year": "72"})


# ------------------------------------------------------------------------------------------
# The embedded local cluster: interrupt and resume


def test_interrupted_local_sweep_resumes_computing_only_missing_points(tmp_path):
    psutil = pytest.importorskip("psutil")
    out = tmp_path / "sweep"
    argv = ["sweep", str(COATING), "--vary", "underlying.volatility=0.2:0.6:12",
            "--steps-per-year", "72", "--workers", "2", "-o", str(out)]
    proc = subprocess.Popen([sys.executable, "-m", "realopt", *argv], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=_env(), cwd=ROOT)
    children = []
    try:
        _wait(lambda: (out / "points").is_dir() and _points(out), 120, "the first point")
        children = psutil.Process(proc.pid).children(recursive=True)
        proc.send_signal(signal.SIGINT)
        stdout, stderr = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130, stderr
    assert "--resume" in stderr and "Traceback" not in stderr, stderr
    have = len(_points(out))
    assert 0 < have < 12
    assert not (out / "sweep.csv").exists()
    gone, alive = psutil.wait_procs(children, timeout=20)    # the local cluster is shut down
    for p in alive:
        p.kill()
    assert not alive
    code, stdout, stderr = _run(*argv, "--resume", "--quiet")
    assert code == 0, stderr
    assert f"12 points ({12 - have} computed now, {have} from an earlier run)" in stdout
    # progress bar on stderr of the first run: points done, rate, time left
    values = parse_vary("underlying.volatility=0.2:0.6:12").values
    files = _points(out)
    assert len(files) == 12
    for f, v in zip(files, values):
        assert f.read_text() == _expected(COATING, {"underlying.volatility": v,
                                                    "lattice.steps_per_year": "72"})
    import pandas as pd

    csv = pd.read_csv(out / "sweep.csv", dtype={"underlying.volatility": str})
    pq = pd.read_parquet(out / "sweep.parquet")
    assert list(csv["underlying.volatility"]) == list(values)
    assert [parse_value(v) for v in values] == list(pq["underlying.volatility"])
    for col in ("present_value", "investment_pv", "static_npv", "expanded_npv",
                "flexibility_value", "shapley_value: Add a second shift", "decision_today"):
        assert col in csv.columns and col in pq.columns
    first = json.loads(files[0].read_text())
    assert csv["expanded_npv"].iloc[0] == first["expanded_npv"]      # CSV floats round-trip
    assert pq["expanded_npv"].iloc[0] == first["expanded_npv"]
    assert (out / "sweep.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the same folder again without --resume is refused (nothing is overwritten)
    code, _, stderr = _run(*argv, "--quiet")
    assert code == 1 and "--resume" in stderr


def test_progress_bar_shows_done_rate_and_time_left():
    import io

    from realopt.fanout import Progress

    buf = io.StringIO()
    bar = Progress(4, "points", stream=buf)
    for k in range(1, 5):
        time.sleep(0.01)
        bar.update(k)
    bar.close()
    lines = buf.getvalue().splitlines()
    assert lines[0].startswith("[") and "0/4 points" in lines[0]
    assert any("2/4 points" in x and "/s" in x and "left" in x for x in lines)
    assert lines[-1].endswith("done")


def test_sweep_chart_for_the_report(tmp_path):
    import pandas as pd

    from realopt.outputs.figures import render
    from realopt.outputs.sweep_figures import sweep_chart

    folder = tmp_path / "s"
    folder.mkdir()
    rows = [{"point": i + 1, "underlying.volatility": v, "market.discount_rate": d,
             "expanded_npv": 10 + v - d, "static_npv": 5.0, "flexibility_value": 5 + v - d,
             "decision_today": "wait: keep the right to invest" if v > 0.3 else "invest now"}
            for i, (v, d) in enumerate((v, d) for v in (0.2, 0.3, 0.4) for d in (0.05, 0.07))]
    pd.DataFrame(rows).to_parquet(folder / "sweep.parquet")
    (folder / ".realopt-sweep").write_text(json.dumps({
        "file": "x.yaml", "vary": [["underlying.volatility", ["0.2", "0.3", "0.4"]],
                                   ["market.discount_rate", ["0.05", "0.07"]]]}))
    chart = sweep_chart(folder)
    assert chart.slug == "sweep" and "6 points" in chart.caption
    png = render(chart, dpi=60, page_dpi=60)[0]
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    with pytest.raises(RealoptError, match="not a finished realopt sweep"):
        sweep_chart(tmp_path / "nothing")


def test_a_cluster_with_another_realopt_is_refused():
    import realopt
    from realopt.fanout import _check_workers

    class FakeClient:
        def __init__(self, found):
            self.found = found

        def run(self, func):
            if isinstance(self.found, Exception):
                raise self.found
            return self.found

    _check_workers(FakeClient({"tcp://a:1": realopt.__version__}), "tcp://s:1")    # fine
    with pytest.raises(RealoptError, match="run realopt 0.0.1"):
        _check_workers(FakeClient({"tcp://a:1": realopt.__version__, "tcp://b:1": "0.0.1"}),
                       "tcp://s:1")
    with pytest.raises(RealoptError, match="cannot import realopt"):
        _check_workers(FakeClient({"tcp://a:1": ""}), "tcp://s:1")
    with pytest.raises(RealoptError, match="cannot run realopt"):
        _check_workers(FakeClient(ModuleNotFoundError("No module named 'realopt'")), "tcp://s:1")
