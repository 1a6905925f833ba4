"""Many appraisals on Dask (``dask.distributed``): the plumbing shared by sweeps and portfolios.

* :func:`resolve_for_workers` turns a validated project into one that reads no file when valued
  (forecast files are read by the loader already; a volatility estimated from a price history is
  read here, on the analyst's machine, and carried as its number), so a cluster's workers need no
  access to the analyst's files.
* :func:`dask_client` opens an embedded local cluster of worker processes (one thread each), or
  connects to the scheduler at an address, failing within a few seconds with a clear message.
* :func:`run_all` sends one task per item, hands each result to a callback as it arrives (in
  arrival order, each exactly once: a task whose worker dies is recomputed by the scheduler), and
  draws a progress bar on stderr.

Workers run :func:`appraise_text`: the JSON text of ``realopt appraise --json`` for one project,
made by :func:`realopt.jsontext.to_json` as the command line makes it, so the bytes are the same.
"""
from __future__ import annotations

import math
import os
import sys
import time
import uuid
from contextlib import contextmanager
from dataclasses import replace

from .errors import RealoptError

CONNECT_TIMEOUT = 3.0       # seconds to reach a --scheduler before giving up
WORKER_WAIT = 15.0          # seconds to wait for a connected cluster to have a worker


# ------------------------------------------------------------------------------------------
# Resolved projects


class Resolver:
    """Reads each price history once per run: ``resolver(project)`` returns the project with
    every file-based estimate replaced by its numbers (raises ValuationError as the appraisal
    would, e.g. for a history of fewer than three prices)."""

    def __init__(self):
        self._seen: dict = {}

    def __call__(self, project):
        u = project.underlying
        est = u.volatility_estimate
        if est is None or est.method != "history" or est.resolved is not None:
            return project
        key = (est.file, est.column, est.periods_per_year)
        if key not in self._seen:
            from .drivers import history_volatility

            self._seen[key] = tuple(float(x) for x in history_volatility(*key))
        est = replace(est, resolved=self._seen[key])
        return replace(project, underlying=replace(u, volatility_estimate=est))


def resolve_for_workers(project):
    """``project`` with nothing left to read from disk (see :class:`Resolver`)."""
    return Resolver()(project)


# ------------------------------------------------------------------------------------------
# Work done on a worker


def appraise_text(project) -> tuple[str, str]:
    """On a worker: ("ok", the JSON text of ``realopt appraise --json`` without its final
    newline) or ("error", the message of a valuation error)."""
    from .appraisal import appraise
    from .jsontext import to_json

    try:
        return "ok", to_json(appraise(project).to_dict())
    except RealoptError as err:
        return "error", str(err)


# ------------------------------------------------------------------------------------------
# The cluster


def default_workers(tasks: int) -> int:
    """One worker process per core, no more than there are tasks."""
    return max(1, min(os.cpu_count() or 1, tasks))


@contextmanager
def dask_client(workers: int | None = None, scheduler: str | None = None, tasks: int = 1):
    """A ``distributed.Client``: on the cluster at ``scheduler`` (e.g. tcp://10.0.0.5:8786), or
    on an embedded LocalCluster of ``workers`` processes (default: one per core) with one thread
    each (an appraisal is single-threaded numpy). Everything started here is closed on exit,
    including on Ctrl-C."""
    import logging

    import dask
    from distributed import Client

    settings = {"distributed.admin.tick.limit": "1h",
                "distributed.comm.timeouts.connect": f"{CONNECT_TIMEOUT:g}s",
                # the local workers allocate as this process does: the nanny's default
                # MALLOC_TRIM_THRESHOLD_ (64 kB) hands every freed array back to the system,
                # and a simulation appraisal's large per-date arrays then fault their pages in
                # again (measured on the river demo: 13 million page faults, about 4x the time)
                "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}
    if not scheduler:                      # no dashboard here, so no use for the profiler
        settings["distributed.worker.profile.enabled"] = False
    with dask.config.set(settings):
        cluster = None
        if scheduler:
            try:
                client = Client(scheduler, timeout=CONNECT_TIMEOUT)
            except (OSError, TimeoutError, ValueError) as err:
                raise RealoptError(
                    f"--scheduler {scheduler}: no Dask scheduler answered within "
                    f"{CONNECT_TIMEOUT:g} s ({type(err).__name__}: {_first_line(err)}). Fix: "
                    "check the address (tcp://HOST:PORT, as printed by `dask scheduler`) and "
                    "that the scheduler runs and is reachable, or leave out --scheduler to use "
                    "a local cluster on this machine.") from None
            try:
                client.wait_for_workers(1, timeout=WORKER_WAIT)
            except (TimeoutError, OSError):
                client.close()
                raise RealoptError(
                    f"--scheduler {scheduler}: the scheduler has no workers (waited "
                    f"{WORKER_WAIT:g} s). Fix: start some with `dask worker {scheduler}`.") \
                    from None
            try:
                _check_workers(client, scheduler)
            except BaseException:
                client.close()
                raise
        else:
            from distributed import LocalCluster

            n = workers or default_workers(tasks)
            cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                                   dashboard_address=None, silence_logs=logging.CRITICAL,
                                   host="127.0.0.1")
            client = Client(cluster)
        try:
            yield client
        except BaseException:
            # stopping early (Ctrl-C, an error): the shutdown's own complaints are noise
            logging.getLogger("distributed").setLevel(logging.CRITICAL)
            raise
        finally:
            try:
                client.close(timeout=10)
            finally:
                if cluster is not None:
                    cluster.close(timeout=10)


def worker_version() -> str:
    """On a worker: the realopt version it imports ('' if it cannot import realopt)."""
    try:
        import realopt
    except ImportError:
        return ""
    return realopt.__version__


def _check_workers(client, scheduler) -> None:
    """Refuse a cluster whose workers lack realopt or run another version of it (their points
    would not be this machine's appraisals)."""
    from . import __version__

    try:
        found = client.run(worker_version)
    except Exception as err:        # a worker that cannot even unpickle this function
        raise RealoptError(f"--scheduler {scheduler}: the workers cannot run realopt "
                           f"({type(err).__name__}: {_first_line(err)}). Fix: install realopt "
                           f"{__version__} on every worker machine") from None
    bad = {w: v for w, v in found.items() if v != __version__}
    if bad:
        w, v = next(iter(bad.items()))
        raise RealoptError(
            f"--scheduler {scheduler}: {len(bad)} of {len(found)} workers "
            + (f"cannot import realopt (e.g. {w})" if not v else
               f"run realopt {v} (e.g. {w}), this machine {__version__}")
            + f". Fix: install realopt {__version__} on every worker machine, so that every "
            "point is the appraisal this machine would make")


def _first_line(err) -> str:
    text = str(err).strip().splitlines()
    return text[0] if text else "no answer"


def run_all(client, func, items, on_result, label: str = "points", quiet: bool = False):
    """Submit ``func(item)`` for each ``(key, item)`` of ``items`` and call
    ``on_result(key, value)`` as each finishes (arrival order, each once). Raises RealoptError if
    a task keeps killing its workers. Returns the number of results."""
    from distributed import as_completed
    from distributed.scheduler import KilledWorker

    items = list(items)
    bar = Progress(len(items), label, quiet=quiet)
    futures, keys = [], {}
    stamp = uuid.uuid4().hex[:12]            # task keys unique on a shared scheduler
    for key, item in items:
        fut = client.submit(func, item, key=f"realopt-{label}-{stamp}-{key}", pure=False)
        futures.append(fut)
        keys[fut.key] = key
    del items
    done = 0
    try:
        for fut in as_completed(futures):
            try:
                value = fut.result()
            except KilledWorker:
                raise RealoptError(
                    f"{label} {keys[fut.key]}: its appraisal ended the worker processes that "
                    "ran it several times (often a lack of memory). Fix: use a smaller "
                    "--steps-per-year, or fewer workers per machine.") from None
            on_result(keys[fut.key], value)
            fut.release()
            done += 1
            bar.update(done)
    finally:
        bar.close()
    return done


# ------------------------------------------------------------------------------------------
# Progress bar


class Progress:
    """``[#####.....]  7/16 points  2.3/s  about 4 s left`` on stderr: redrawn in place on a
    terminal, a line at each tenth otherwise."""

    def __init__(self, total: int, label: str, stream=None, quiet: bool = False):
        self.total, self.label, self.quiet = total, label, quiet
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.start = time.monotonic()
        self.last_tenth = -1
        self.last_draw = 0.0
        self.update(0)

    def text(self, done: int) -> str:
        elapsed = time.monotonic() - self.start
        width = 24
        fill = int(width * done / self.total) if self.total else width
        rate = done / elapsed if elapsed > 0 and done else 0.0
        left = (self.total - done) / rate if rate else math.nan
        eta = ("done" if done == self.total else
               "time left unknown" if math.isnan(left) else f"about {_duration(left)} left")
        return (f"[{'#' * fill}{'.' * (width - fill)}] {done}/{self.total} {self.label}  "
                f"{rate:.2f}/s  {eta}")

    def update(self, done: int) -> None:
        if self.quiet:
            return
        now = time.monotonic()
        if self.tty:
            if done == self.total or now - self.last_draw > 0.1:
                self.stream.write("\r" + self.text(done).ljust(78))
                self.stream.flush()
                self.last_draw = now
            return
        tenth = int(10 * done / self.total) if self.total else 10
        if tenth != self.last_tenth:
            self.last_tenth = tenth
            self.stream.write(self.text(done) + "\n")
            self.stream.flush()

    def close(self) -> None:
        if self.tty and not self.quiet:
            self.stream.write("\n")
            self.stream.flush()


def _duration(s: float) -> str:
    if s < 90:
        return f"{s:.0f} s"
    if s < 5400:
        return f"{s / 60:.0f} min"
    return f"{s / 3600:.1f} h"
