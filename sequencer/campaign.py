"""Campaigns: one protocol on many simulated fibres, each run guarded and unguarded.

Fibre k of a campaign with seed S is the simulated stand built with the integer seed drawn
from ``numpy.random.SeedSequence(S).spawn(N)[k]`` (its first 32-bit word): its emitter
ensemble (heights, radii, positions), its flicker and its ion hits all follow from that
one stream. The same fibre is run twice, through the real engine, drivers and simulated
instruments on a virtual clock:

* **guarded**: the watchdog with the protocol's limits, the supply's current limit set from
  the current ceiling (``drivers.roles.hardware_limits``), exactly as ``fieldrun run``;
* **unguarded**: no software watchdog, the supply's current limit at the rig's maximum
  (``fieldrun run --unguarded``).

A fibre's result depends only on the protocol, the rig and its own seed, never on which
worker ran it or when; results are put in fibre order. So on one build (same Python,
numpy and fieldrun) a campaign gives identical results on 1 or W workers, in a local
process pool or on a Dask cluster. Across builds (another numpy, another CPU's libm)
floating-point details may differ; that is outside this promise.

No run folders are written for the fibres (a campaign of 64 fibres would write 128); each
run is summarised in memory (outcome, the first stopping rule with its simulated time and
voltage, whether and when the simulated fibre was lost, peak current). The deadman is off:
it watches real time, and on a loaded machine its budgets could fire on a healthy
simulated run and make the results depend on the load; the simulated instruments never hang
unless a quirk asks them to.

What a campaign shows is the self-consistency of the cathode model and the watchdog (the
watchdog stops what the model says destroys a fibre), not the protection of real fibres.
"""
from __future__ import annotations

import math
import multiprocessing
import os
import statistics
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Dict, List, Optional, Sequence

import numpy as np

STOP_ACTIONS = ("trip", "ramp_down")


def fibre_seeds(seed: int, n: int) -> List[int]:
    """The stand seed of each of ``n`` fibres: the first 32-bit word of the k-th child of
    ``numpy.random.SeedSequence(seed)`` (independent streams, numpy's documented way)."""
    return [int(c.generate_state(1, dtype=np.uint32)[0])
            for c in np.random.SeedSequence(int(seed)).spawn(int(n))]


@dataclass(frozen=True)
class FibreJob:
    """Everything a worker needs for one fibre (plain text, so it pickles anywhere)."""

    index: int
    seed: int
    protocol_text: str
    protocol_file: str
    rig_text: str
    rig_file: str


class _Summary:
    """A recorder that keeps only what a campaign reports (the engine's recorder API)."""

    ok = True
    failed = False
    backlogged = False
    reason = None

    def __init__(self):
        self.peak_current = 0.0
        self.samples: Dict[int, float] = {}     # seq -> supply voltage (for the stop)
        self.stop: Optional[dict] = None
        self.last_t = 0.0

    def put_sample(self, s):
        i = s.current_a
        if isinstance(i, float) and math.isfinite(i) and i > self.peak_current:
            self.peak_current = i
        self.samples[s.seq] = (s.t, s.voltage_v)
        self.last_t = s.t
        return True

    def acted_on(self, tripped_on_seq, event_seq):
        """(time, supply voltage) of the sample a stop acted on: the tripped sample, else
        the last one recorded before the event (events carry the next sample's number)."""
        for seq in (tripped_on_seq, (event_seq - 1) if event_seq is not None else None):
            if seq is not None and seq in self.samples:
                return self.samples[seq]
        return (None, None)

    def put_event(self, ev):
        if self.stop is None and (ev.get("kind") == "trip" or (
                ev.get("kind") == "verdict" and ev.get("action") in STOP_ACTIONS)):
            self.stop = {"rule": ev.get("rule"), "action": ev.get("action", "trip"),
                         "t": ev.get("t"), "seq": ev.get("seq")}
        return True


def _num(x):
    return float(x) if isinstance(x, (int, float)) and math.isfinite(x) else None


def run_one(job: FibreJob, guarded: bool) -> Dict[str, Any]:
    """One run of one fibre; a plain dict (JSON-ready)."""
    from drivers.roles import hardware_limits
    from .compiler import compile_plan
    from .engine import Engine, EngineOptions
    from .protocol import protocol_from_text
    from .rig import rig_from_text
    from .stand import build_stand

    protocol = protocol_from_text(job.protocol_text, job.protocol_file)
    rig = rig_from_text(job.rig_text, job.rig_file)
    plan = compile_plan(protocol, rig)
    v_ovp, i_limit = hardware_limits(plan.peak_voltage, plan.limits.current_max,
                                     rig.voltage_max, rig.current_max)
    if not guarded:
        i_limit = rig.current_max
    built = build_stand(rig, seed=job.seed)
    rec = _Summary()
    watchdog = None
    if guarded:
        from .watchdog import Watchdog
        watchdog = Watchdog(plan.limits)
    try:
        eng = Engine(plan, built.stand, built.clock, recorder=rec, watchdog=watchdog,
                     options=EngineOptions(unguarded=not guarded, skip_pauses=True,
                                           v_ovp=v_ovp, i_limit=i_limit, deadman=False))
        res = eng.run()
    finally:
        built.stand.close()
    lost = [t for t, kind, _ in built.sim.cathode_events if kind == "fibre-lost"]
    out = {"outcome": res.outcome, "exit_code": res.exit_code,
           "confirmed_off": bool(res.confirmed_off), "samples": res.samples,
           "fibre_lost": bool(built.sim.fibre_lost),
           "lost_at_s": _num(lost[0]) if lost else None,
           "peak_current_a": float(rec.peak_current), "end_t_s": _num(rec.last_t),
           "rule": None, "action": None, "stop_t_s": None, "stop_voltage_v": None}
    if rec.stop is not None and res.outcome in ("tripped", "ramped-down"):
        t_stop, v_stop = rec.acted_on(res.tripped_on_seq, rec.stop["seq"])
        out.update(rule=rec.stop["rule"], action=rec.stop["action"],
                   stop_t_s=_num(t_stop if t_stop is not None else rec.stop["t"]),
                   stop_voltage_v=_num(v_stop))
    return out


def run_fibre(job: FibreJob) -> Dict[str, Any]:
    """Both runs of one fibre (the unit of work a worker gets)."""
    return {"fibre": job.index, "seed": job.seed,
            "guarded": run_one(job, guarded=True),
            "unguarded": run_one(job, guarded=False)}


# --------------------------------------------------------------------------- executing
def _progress_ctx(show: bool, total: int, what: str):
    if not show:
        return None
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
    import sys
    from rich.console import Console
    prog = Progress(TextColumn(what), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
                    console=Console(file=sys.stderr), transient=False)
    return prog


def execute(jobs: Sequence[FibreJob], workers: int = 1, dask: Any = None,
            progress: bool = False, on_result: Optional[Callable[[dict], None]] = None,
            pool_for_one: bool = False) -> List[dict]:
    """Run ``jobs``: in this process (``workers`` 1, unless ``pool_for_one``), a local
    process pool ('spawn' start method) of ``workers`` processes, or on a Dask cluster
    (``dask``: a scheduler address, or a ``distributed.Client``). Results in fibre order."""
    results: Dict[int, dict] = {}
    prog = _progress_ctx(progress, len(jobs), "fibres")
    task = None
    if prog is not None:
        prog.start()
        task = prog.add_task("fibres", total=len(jobs))

    def done(r):
        results[r["fibre"]] = r
        if on_result is not None:
            on_result(r)
        if prog is not None:
            prog.advance(task)

    try:
        if dask is not None:
            _execute_dask(jobs, dask, done)
        elif workers <= 1 and not pool_for_one:
            for job in jobs:
                done(run_fibre(job))
        else:
            ctx = multiprocessing.get_context("spawn")
            with ProcessPoolExecutor(max_workers=int(workers), mp_context=ctx) as pool:
                futures = [pool.submit(run_fibre, job) for job in jobs]
                for fut in as_completed(futures):
                    done(fut.result())
    finally:
        if prog is not None:
            prog.stop()
    return [results[j.index] for j in jobs]


def _execute_dask(jobs, dask, done) -> None:
    try:
        from distributed import Client
    except ImportError:   # pragma: no cover - installed with fieldrun's dependencies
        from .errors import RefusedError
        raise RefusedError("--dask needs the 'distributed' package") from None
    own = not isinstance(dask, Client)
    if own:
        try:
            client = Client(str(dask), timeout="10s", set_as_default=False)
        except (OSError, TimeoutError) as exc:
            from .errors import RefusedError
            raise RefusedError(f"cannot reach the Dask scheduler at {dask}: {exc}") from None
    else:
        client = dask
    try:
        futures = client.map(run_fibre, list(jobs), pure=False)
        for fut in futures:          # in fibre order; the cluster works on all at once
            done(fut.result())
    finally:
        if own:
            client.close()


# --------------------------------------------------------------------------- summary
def summarise(fibres: List[dict]) -> Dict[str, Any]:
    """Counts and figures for each arm (guarded, unguarded)."""
    out = {}
    for arm in ("guarded", "unguarded"):
        runs = [f[arm] for f in fibres]
        rules: Dict[str, int] = {}
        for r in runs:
            if r["rule"]:
                rules[r["rule"]] = rules.get(r["rule"], 0) + 1
        stops = [r["stop_t_s"] for r in runs if r["stop_t_s"] is not None]
        losses = [r["lost_at_s"] for r in runs if r["lost_at_s"] is not None]
        peaks = [r["peak_current_a"] for r in runs]
        outcomes: Dict[str, int] = {}
        for r in runs:
            outcomes[r["outcome"]] = outcomes.get(r["outcome"], 0) + 1
        out[arm] = {
            "runs": len(runs),
            "fibres_lost": sum(1 for r in runs if r["fibre_lost"]),
            "outcomes": dict(sorted(outcomes.items())),
            "stops_by_rule": dict(sorted(rules.items())),
            "median_stop_t_s": statistics.median(stops) if stops else None,
            "median_loss_t_s": statistics.median(losses) if losses else None,
            "median_peak_current_a": statistics.median(peaks) if peaks else None,
            "max_peak_current_a": max(peaks) if peaks else None,
            "all_confirmed_off": all(r["confirmed_off"] for r in runs),
        }
    return out


@dataclass
class Campaign:
    protocol: str
    rig: str
    seed: int
    fibres: List[dict]
    summary: Dict[str, Any]
    workers: int
    where: str
    wall_s: float

    def results(self) -> Dict[str, Any]:
        """What must not depend on the workers (compared in the tests)."""
        return {"fibres": self.fibres, "summary": self.summary}

    def to_dict(self) -> Dict[str, Any]:
        return {"campaign": {"protocol": self.protocol, "rig": self.rig, "seed": self.seed,
                             "fibres": len(self.fibres), "seed_rule":
                                 "fibre k: numpy.random.SeedSequence(seed).spawn(N)[k]",
                             "workers": self.workers, "where": self.where,
                             "wall_s": self.wall_s,
                             "note": "results do not depend on the workers on one build; "
                                     "self-consistency of model and watchdog, not "
                                     "protection of real fibres"},
                **self.results()}


def make_jobs(protocol_path, rig_path, fibres: int, seed: int) -> List[FibreJob]:
    ptext = Path(protocol_path).read_text(encoding="utf-8")
    rtext = Path(rig_path).read_text(encoding="utf-8")
    return [FibreJob(k, s, ptext, str(protocol_path), rtext, str(rig_path))
            for k, s in enumerate(fibre_seeds(seed, fibres))]


def run_campaign(protocol_path, rig_path, fibres: int, seed: int = 1, workers: int = 1,
                 dask: Any = None, progress: bool = False, pool_for_one: bool = False) -> Campaign:
    jobs = make_jobs(protocol_path, rig_path, fibres, seed)
    t0 = time.perf_counter()
    res = execute(jobs, workers=workers, dask=dask, progress=progress, pool_for_one=pool_for_one)
    wall = time.perf_counter() - t0
    where = (f"dask {dask if isinstance(dask, str) else 'client'}" if dask is not None
             else ("this process" if workers <= 1 and not pool_for_one
                   else f"local process pool of {workers}"))
    return Campaign(str(protocol_path), str(rig_path), int(seed), res, summarise(res),
                    int(workers), where, wall)


def default_workers(fibres: int) -> int:
    return max(1, min(int(fibres), os.cpu_count() or 1))


# --------------------------------------------------------------------------- output
def table(c: Campaign):
    """A rich Table of the two arms side by side."""
    from rich.table import Table

    def si(x, unit, fmt=".3g"):
        return "-" if x is None else f"{x:{fmt}} {unit}"

    def rules(d):
        return ", ".join(f"{k} {v}" for k, v in d.items()) or "-"

    g, u = c.summary["guarded"], c.summary["unguarded"]
    n = len(c.fibres)
    t = Table(title=f"campaign: {Path(c.protocol).name} on {n} simulated fibres (seed {c.seed})")
    t.add_column("")
    t.add_column("guarded", justify="right")
    t.add_column("unguarded", justify="right")
    t.add_row("fibres lost", f"{g['fibres_lost']} of {n}", f"{u['fibres_lost']} of {n}")
    t.add_row("outcomes", rules(g["outcomes"]), rules(u["outcomes"]))
    t.add_row("stops by rule", rules(g["stops_by_rule"]), rules(u["stops_by_rule"]))
    t.add_row("median time to stop", si(g["median_stop_t_s"], "s", ".1f"), si(u["median_stop_t_s"], "s", ".1f"))
    t.add_row("median time of loss", si(g["median_loss_t_s"], "s", ".1f"), si(u["median_loss_t_s"], "s", ".1f"))
    t.add_row("median peak current", si(g["median_peak_current_a"], "A"), si(u["median_peak_current_a"], "A"))
    t.add_row("highest peak current", si(g["max_peak_current_a"], "A"), si(u["max_peak_current_a"], "A"))
    t.add_row("output confirmed off", "all" if g["all_confirmed_off"] else "NOT ALL",
              "all" if u["all_confirmed_off"] else "NOT ALL")
    return t


def plot(c: Campaign, path) -> Path:
    """Four panels: fates, stops by rule, time to stop / loss, peak current per fibre."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(2, 2, figsize=(10, 7))
    arms = ("guarded", "unguarded")
    colours = {"guarded": "tab:blue", "unguarded": "tab:red"}
    n = len(c.fibres)
    # fates
    a = ax[0][0]
    kinds = ["lost", "completed", "tripped", "ramped-down", "other"]
    width = 0.4
    for j, arm in enumerate(arms):
        runs = [f[arm] for f in c.fibres]
        counts = [sum(r["fibre_lost"] for r in runs)]
        for k in kinds[1:4]:
            counts.append(sum(1 for r in runs if r["outcome"] == k and not r["fibre_lost"]))
        counts.append(n - sum(counts))
        a.bar(np.arange(len(kinds)) + (j - 0.5) * width, counts, width, label=arm, color=colours[arm])
    a.set_xticks(np.arange(len(kinds)), ["fibre lost", "completed", "tripped", "ramped down", "other"])
    a.set_ylabel("fibres")
    a.set_title("what became of each fibre")
    a.legend()
    # stops by rule
    a = ax[0][1]
    rules = sorted({r for arm in arms for r in c.summary[arm]["stops_by_rule"]})
    for j, arm in enumerate(arms):
        vals = [c.summary[arm]["stops_by_rule"].get(r, 0) for r in rules]
        a.bar(np.arange(len(rules)) + (j - 0.5) * width, vals, width, label=arm, color=colours[arm])
    if rules:
        a.set_xticks(np.arange(len(rules)), rules)
    else:
        a.set_xticks([])
        a.text(0.5, 0.5, "no run was stopped by a rule", ha="center", va="center",
               transform=a.transAxes)
    a.set_ylabel("runs")
    a.set_title("runs stopped, by watchdog rule")
    # times
    a = ax[1][0]
    stop_t = [f["guarded"]["stop_t_s"] for f in c.fibres if f["guarded"]["stop_t_s"] is not None]
    loss_t = [f["unguarded"]["lost_at_s"] for f in c.fibres if f["unguarded"]["lost_at_s"] is not None]
    data, labels = [], []
    if stop_t:
        data.append(stop_t)
        labels.append("guarded: watchdog stop")
    if loss_t:
        data.append(loss_t)
        labels.append("unguarded: fibre lost")
    if data:
        a.hist(data, bins=min(20, max(3, n // 2)), label=labels,
               color=["tab:blue", "tab:red"][:len(data)] if len(data) == 2 else None)
        a.legend()
    a.set_xlabel("simulated time (s)")
    a.set_ylabel("fibres")
    a.set_title("time to the watchdog's stop / to the loss")
    # peak current
    a = ax[1][1]
    idx = np.arange(n)
    for arm in arms:
        a.semilogy(idx, [max(f[arm]["peak_current_a"], 1e-15) for f in c.fibres], "o",
                   label=arm, color=colours[arm])
    a.set_xlabel("fibre")
    a.set_ylabel("peak current (A)")
    a.set_title("peak current of each run")
    a.legend()
    fig.suptitle(f"{Path(c.protocol).name}: {n} simulated fibres, seed {c.seed} "
                 f"(self-consistency of model and watchdog, not real fibres)", fontsize=10)
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
