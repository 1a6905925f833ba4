"""Shared fixtures for the test suite (append your own below; keep each one documented).

* ``repo_root`` / ``demo_projects``: paths in this checkout;
* ``engine``: the valuation engine module, or a skip when this checkout does not have it yet;
* ``write_project``: write YAML text (dedented) to a file in ``tmp_path`` and return its path;
* ``cli``: run ``realopt.cli.main`` in-process, returns (code, out, err);
* ``cli_process``: run ``python -m realopt`` in a fresh interpreter (the real entry point).
"""
from __future__ import annotations

import importlib.util
import os
import subprocess
import sys
import textwrap
from dataclasses import dataclass
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

# A small valid project used as the starting point of many loader tests (invented figures).
MINIMAL_PROJECT = """\
project:
  name: Test plant
  currency: EUR
  unit: million
market:
  risk_free_rate: 0.04
  discount_rate: 0.10
underlying:
  cash_flows: {1: 10.0, 2: 12.0, 3: 12.0}
  terminal_value: 60.0
  volatility: 0.25
investment:
  cost: 70.0
rights:
  - name: Expand the plant
    type: expand
    scale: 0.5
    cost: 30.0
    window: [1, 3]
  - name: Sell the plant
    type: abandon
    salvage: {0: 50.0, 3: 40.0}
    window: [0, 3]
"""


@pytest.fixture
def repo_root() -> Path:
    return ROOT


@pytest.fixture
def demo_projects() -> list[Path]:
    """The lattice demos (simulation demos: ``simulation_demos``, tests/test_simulation.py)."""
    return [p for p in sorted((ROOT / "projects").glob("*.yaml"))
            if "\nvaluation: simulation" not in p.read_text()]


@pytest.fixture
def simulation_demos() -> list[Path]:
    return [p for p in sorted((ROOT / "projects").glob("*.yaml"))
            if "\nvaluation: simulation" in p.read_text()]


@pytest.fixture
def minimal_project_text() -> str:
    return MINIMAL_PROJECT


@pytest.fixture
def engine():
    """realopt.appraisal, or skip the test when the engine is not in this checkout."""
    if importlib.util.find_spec("realopt.appraisal") is None:
        pytest.skip("the valuation engine (realopt.appraisal) is not in this checkout yet")
    import realopt.appraisal

    return realopt.appraisal


@pytest.fixture
def write_project(tmp_path):
    def write(text: str, name: str = "project.yaml") -> Path:
        path = tmp_path / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(text), encoding="utf-8")
        return path

    return write


@dataclass
class CliResult:
    code: int
    out: str
    err: str

    @property
    def text(self) -> str:
        return self.out + self.err


@pytest.fixture
def cli(capsys):
    """Run the command line in-process: cli('check', path) -> CliResult."""
    from realopt.cli import main

    def run(*argv) -> CliResult:
        capsys.readouterr()
        code = main([str(a) for a in argv])
        cap = capsys.readouterr()
        return CliResult(code, cap.out, cap.err)

    return run


@pytest.fixture
def cli_process():
    """Run ``python -m realopt ARGS`` in a new interpreter: the path a user takes."""

    def run(*argv, cwd=ROOT, env=None, timeout=300) -> CliResult:
        full_env = dict(os.environ)
        full_env.pop("REALOPT_DEBUG", None)
        full_env.update(env or {})
        r = subprocess.run([sys.executable, "-m", "realopt", *map(str, argv)], cwd=cwd,
                           capture_output=True, text=True, env=full_env, timeout=timeout,
                           encoding="utf-8", errors="replace")
        return CliResult(r.returncode, r.stdout, r.stderr)

    return run
