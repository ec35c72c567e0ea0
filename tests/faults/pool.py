"""Run the selected catalogue rows of one test module in parallel subprocesses.

Each row is a whole ``fieldrun run`` process, so rows are independent; running a few at a
time keeps the suite inside its CI budget on two cores (most of a row's real time is spent
waiting on sub-second instrument timeouts, not computing).
"""
from __future__ import annotations

import os
import sys
import time
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Callable, Dict, Iterable

import pytest

WORKERS = max(2, min(4, (os.cpu_count() or 2) + 1))


def params(rows) -> list:
    """pytest parameters of ``rows``; a row with a known gap is a strict xfail."""
    out = []
    for f in rows:
        marks = [pytest.mark.xfail(strict=True, reason=f.known_gap)] if f.known_gap else []
        out.append(pytest.param(f, id=f.id, marks=marks))
    return out


def selected(request, name: str = "fault") -> set:
    """Ids of the rows whose tests of this module were selected in this session."""
    ids = set()
    for item in request.session.items:
        cs = getattr(item, "callspec", None)
        if cs is not None and item.module is request.module and name in cs.params:
            ids.add(cs.params[name].id)
    return ids


def _timed(run, f, case_dir):
    t0 = time.monotonic()
    try:
        return run(f, case_dir)
    finally:   # printed for whoever tunes the suite; never asserted
        print(f"fault {f.id}: {time.monotonic() - t0:.1f} s real time", file=sys.stderr)


def launch(rows: Iterable, run: Callable, base, wanted: set) -> Dict[str, Future]:
    ex = ThreadPoolExecutor(WORKERS)
    # the slowest rows first, so the pool is not left waiting on one at the end
    rows = sorted((f for f in rows if f.id in wanted), key=lambda f: -f.cost)
    futs = {f.id: ex.submit(_timed, run, f, base / f.id) for f in rows}
    ex.shutdown(wait=False)
    return futs


def module_runs(rows, run: Callable, label: str):
    """A module-scoped fixture ``runs``: the selected rows of ``rows`` started in parallel
    (id -> Future of an ``outcome.Observed``)."""
    @pytest.fixture(scope="module")
    def runs(request, tmp_path_factory):
        return launch(rows, run, tmp_path_factory.mktemp(label), selected(request))
    return runs


def check_row(fault, runs) -> None:
    """Check one row's run against its expected outcome, record the result, assert."""
    from . import outcome, results
    obs = runs[fault.id].result()
    problems = outcome.check(fault, obs)
    results.record(fault, obs.summary(), problems, {"samples": obs.samples, **obs.detail})
    assert not problems, f"{fault.id}: {problems}\nstderr: {obs.stderr[-1500:]}"
