"""``fieldrun run PROTOCOL --rig RIG``: one run, start to confirmed off.

Order of things, each a way out with its exit code (DESIGN.md):

1. read and compile protocol and rig (bad input: 2); the rig must not be marked
   unconfirmed (2, until ``fieldrun ack RIG``); ``--unattended`` refuses a rig whose
   host-loss cover is ``none`` and pauses without a timeout (2); an attended run on such a
   rig is warned loudly; ``--unguarded`` is refused unless every instrument reports itself
   simulated (2);
2. open the instruments (lock held, wrong identity: 2), create the run folder and its
   manifest, start recorder and console;
3. the engine runs with the signal handlers installed (0 completed, 3 watchdog, 4 operator,
   5 unsafe, 1 internal error);
4. afterwards: on exit 5 the rig is marked; alarms on a trip, an unconfirmed off or the end
   of an unattended run; the end record; the report (guarded: a failing report is logged
   and never replaces 3 or 5); the run folder path and a one-line outcome.
"""
from __future__ import annotations

import math
import os
import sys
from pathlib import Path

from ..errors import RefusedError

HELP = "run a protocol on a rig (simulated or real) under the watchdog"
DESCRIPTION = (HELP + ". The software is a second line behind the hardware interlocks; "
               "read safety.md before running on a real stand.")


def add_arguments(p) -> None:
    p.add_argument("protocol", metavar="PROTOCOL", help="protocol file (YAML)")
    p.add_argument("--rig", required=True, metavar="RIG", help="rig file (YAML)")
    p.add_argument("--unattended", action="store_true",
                   help="nobody at the stand: refuse host_loss none and pauses without a "
                        "timeout; raise the alarm at the end")
    p.add_argument("--speed", type=float, default=None, metavar="N",
                   help="simulated rig: pace the virtual clock at N times real time")
    p.add_argument("--unguarded", action="store_true",
                   help="simulation only: switch the software watchdog off (to see what it "
                        "prevents); refused unless every instrument is simulated")
    p.add_argument("--quiet", action="store_true", help="no live console")
    p.add_argument("--runs-dir", default="runs", metavar="DIR", help="where run folders go (runs)")
    p.add_argument("--seed", type=int, default=None, metavar="N",
                   help="simulated rig: seed of the simulation (default: the rig file's)")
    p.add_argument("--skip-pauses", action="store_true", help=argparse_suppress())
    p.add_argument("--no-report", action="store_true", help=argparse_suppress())


def argparse_suppress():
    import argparse
    return argparse.SUPPRESS


def _say(msg: str) -> None:
    _print(msg, "stderr")


def _print(msg: str, stream: str) -> None:
    """A dead terminal or pipe (EPIPE) never stops a run: the stream is swapped for
    /dev/null so nothing fails again, not even the interpreter's flush at exit."""
    try:
        print(msg, file=getattr(sys, stream), flush=True)
    except (BrokenPipeError, OSError):
        try:
            setattr(sys, stream, open(os.devnull, "w"))
        except OSError:
            pass


def _out(msg: str) -> None:
    _print(msg, "stdout")


def run(args, *, rig=None, limits=None, finished=None) -> int:
    """Run ``args.protocol`` on ``args.rig``. Other verbs that end in an ordinary run
    (replay) may hand in the ``rig`` already loaded (``args.rig`` still names its file),
    ``limits`` (name -> SI value) that replace the compiled ones, and a dict ``finished``
    that receives ``folder``, ``result`` and ``simulation`` once the run has ended."""
    from ..compiler import attach_timing_budget, compile_plan, unattended_problems
    from ..errors import ProtocolError
    from ..protocol import load_protocol
    from ..rig import load_rig
    from .. import statefile

    protocol = load_protocol(args.protocol)
    rig = rig if rig is not None else load_rig(args.rig)
    plan = compile_plan(protocol, rig)
    # the rig's timing budget goes in the manifest; a sample period it says cannot be met
    # is warned about (``fieldrun check`` refuses it): the loop logs missed cycles
    try:
        plan = attach_timing_budget(plan, rig, args.protocol)
    except ProtocolError as exc:
        _say(f"warning: {exc.problems[0]}" + (f" (and {len(exc.problems) - 1} more)"
                                             if len(exc.problems) > 1 else ""))
    if limits:
        import dataclasses
        from ..limits import stricter
        merged = dict(limits)
        # whatever a caller hands in, the rig's hard limits still bound it
        for name, bound in rig.hard_limits().items():
            if name in merged and bound is not None:
                merged[name] = stricter(name, float(merged[name]), float(bound))
        plan = dataclasses.replace(plan, limits=plan.limits.replace(**merged))
    state_dir = statefile.state_dir_for(args.rig, rig.name, _state_dir_of(rig, args.rig))
    statefile.refuse_if_marked(state_dir, args.rig)

    if args.speed is not None and not (args.speed > 0 and math.isfinite(args.speed)):
        raise RefusedError(f"--speed must be a positive number, got {args.speed!r}")
    if args.unattended:
        if rig.host_loss == "none":
            raise RefusedError(
                f"{args.rig}: host_loss is 'none': if this computer dies the supply keeps its "
                f"output on with nobody there. An unattended run needs a supply comm timeout "
                f"or a heartbeat interlock (host_loss: supply-timeout | heartbeat)")
        probs = unattended_problems(plan, args.protocol)
        if probs:
            raise ProtocolError(probs)
    elif rig.host_loss == "none":
        _say("!" * 78)
        _say(f"WARNING: {args.rig} has host_loss: none. If this computer or fieldrun dies, "
             f"the supply may KEEP ITS HIGH VOLTAGE ON. Stay at the stand; the hardware "
             f"interlock is your protection.")
        _say("!" * 78)

    from ..stand import all_report_simulated, build_stand
    built = build_stand(rig, speed=args.speed, seed=args.seed)
    try:
        return _run_built(args, protocol, rig, plan, built, state_dir, finished)
    finally:
        built.stand.close()


def _state_dir_of(rig, rig_path):
    sd = getattr(rig, "state_dir", None)
    if not sd:
        return None
    p = Path(sd)
    if not p.is_absolute():
        p = Path(rig_path).resolve().parent / p
    name = rig.name or Path(rig_path).stem
    return p / "".join(c if c.isalnum() or c in "-_" else "-" for c in name)


def _run_built(args, protocol, rig, plan, built, state_dir, finished=None) -> int:
    from .. import runfolder, statefile
    from ..alarms import raise_alarm
    from ..control import ControlChannel
    from ..engine import Engine, EngineOptions, EXIT_UNSAFE, EXIT_WATCHDOG
    from ..recorder import Recorder
    from ..signals import SignalGuard, StopFlags
    from ..stand import all_report_simulated

    stand, clock = built.stand, built.clock
    if rig.host_loss == "heartbeat" and stand.interlock is None:
        raise RefusedError(f"{args.rig}: host_loss is 'heartbeat' but the rig has no interlock "
                           f"line to drive it; the claimed host-loss cover does not exist")
    if args.unguarded and not (built.simulated and all_report_simulated(stand)):
        raise RefusedError("--unguarded removes the software watchdog and is allowed only "
                           "when every instrument reports itself simulated")

    from drivers.roles import hardware_limits
    v_ovp, i_limit = hardware_limits(plan.peak_voltage, plan.limits.current_max,
                                     rig.voltage_max, rig.current_max)
    if args.unguarded:
        i_limit = rig.current_max    # nothing but the supply's own limit, at the rig maximum

    try:
        folder = runfolder.create_run_folder(args.runs_dir, protocol.name)
        copies = runfolder.copy_inputs(folder, protocol=args.protocol, rig=args.rig)
    except OSError as exc:
        raise RefusedError(f"cannot create the run folder under {args.runs_dir}: {exc}") from None
    manifest = {
        "protocol": {"name": protocol.name, "file": str(args.protocol)},
        "rig": {"name": rig.name, "file": str(args.rig), "host_loss": rig.host_loss,
                "polarity": rig.polarity, "series_resistance_ohm": rig.series_resistance_ohm},
        "sample": {"id": rig.sample_id},
        "plan": {"duration_s": plan.total_duration, "peak_voltage_v": plan.peak_voltage,
                 "steps": [{"index": s.index, "kind": s.kind, "label": s.label,
                            "duration_s": s.nominal_duration} for s in plan.segments]},
        "limits": dict(plan.limits.values),
        "timing_budget_s": dict(plan.timing_budget) if plan.timing_budget else None,
        "arm": {"v_ovp": v_ovp, "i_limit": i_limit,
                "comm_timeout_s": _comm_timeout(rig)},
        "instruments": stand.identities,
        "simulated": built.simulated,
        "seed": built.sim.seed if built.sim is not None else None,
        "unguarded": bool(args.unguarded),
        "unattended": bool(args.unattended),
        "speed": args.speed,
        "inputs": copies,
    }
    runfolder.write_manifest(folder, manifest)
    rec = Recorder(folder, clock)
    console = None
    try:
        from ..console import Console
        console = Console(quiet=args.quiet, title=f"{protocol.name} on {rig.name}")
        console.start()
    except Exception:   # noqa: BLE001 - no console is no reason to stop a run
        console = None

    watchdog = None
    if not args.unguarded:
        from ..watchdog import Watchdog
        watchdog = Watchdog(plan.limits)

    flags = StopFlags()
    end_state = {"done": False}

    def on_stuck(deadman):
        # the loop never came back from a blocked call even after abort(): write the end
        # record, raise the alarm and leave; the output state is what the deadman found
        ok = deadman.confirmed_off
        code = EXIT_WATCHDOG if ok else EXIT_UNSAFE
        if not ok:
            statefile.mark_unconfirmed(state_dir, folder, "deadman: loop stuck, off unconfirmed")
        raise_alarm([rig.notify.on_unsafe if not ok else rig.notify.on_trip],
                    f"fieldrun: {rig.name}: the sample loop hung; output "
                    f"{'confirmed off' if ok else 'NOT confirmed off'}",
                    outcome="tripped" if ok else "unsafe", run=str(folder), rig=rig.name,
                    on_event=rec.put_event)
        rec.end(outcome="tripped" if ok else "unsafe", exit_code=code,
                reason="the sample loop hung in an instrument call", confirmed_off=ok)
        _say(str(folder))
        os._exit(code)

    options = EngineOptions(
        unguarded=args.unguarded, skip_pauses=bool(getattr(args, "skip_pauses", False)),
        v_ovp=v_ovp, i_limit=i_limit, comm_timeout_s=_comm_timeout(rig),
        control=ControlChannel(folder), stop=flags, on_deadman_stuck=on_stuck)
    engine = Engine(plan, stand, clock, recorder=rec, console=console, watchdog=watchdog,
                    options=options)
    # the handlers stay in place until the end record is written: a Ctrl-C after the run
    # must not turn its exit code into 4
    with SignalGuard(flags):
        result = engine.run()
        code = result.exit_code
        if code == EXIT_UNSAFE:
            statefile.mark_unconfirmed(state_dir, folder, result.reason)
        notify = rig.notify
        alarms = []
        if code == EXIT_UNSAFE:
            alarms.append(notify.on_unsafe or notify.on_trip)
        elif result.outcome in ("tripped", "ramped-down"):
            alarms.append(notify.on_trip)
        if args.unattended and notify.on_end:
            alarms.append(notify.on_end)
        for argv in alarms:
            raise_alarm([argv] if argv else [],
                        f"fieldrun: {rig.name}: {result.outcome}: {result.reason}",
                        outcome=result.outcome, run=str(folder), rig=rig.name,
                        on_event=rec.put_event)
        if console is not None:
            try:
                console.stop()
            except Exception:   # noqa: BLE001
                pass
        sim_truth = {}
        if built.sim is not None:
            lost = [t for t, kind, _ in built.sim.cathode_events if kind == "fibre-lost"]
            sim_truth = {"fibre_lost": bool(built.sim.fibre_lost),
                         "lost_at_s": lost[0] if lost else None, "seed": built.sim.seed}
        rec.end(outcome=result.outcome, exit_code=code, reason=result.reason,
                confirmed_off=result.confirmed_off, samples_taken=result.samples,
                tripped_on_seq=result.tripped_on_seq, simulation=sim_truth or None)
    if finished is not None:
        finished.update(folder=folder, result=result, simulation=sim_truth or None)
    if getattr(args, "no_report", False) or not getattr(args, "report", True):
        report_note = "no report (asked)"
    else:
        report_note = _write_report(folder)
    _out(str(folder))
    verb = getattr(args, "verb", None) or "run"      # replay ends in an ordinary run
    line = (f"fieldrun {verb}: {result.outcome} (exit {code}): {result.reason}; "
            f"{result.samples} samples, output {'confirmed off' if result.confirmed_off else 'NOT CONFIRMED OFF'}")
    if report_note:
        line += f"; {report_note}"
    _out(line)
    if code == EXIT_UNSAFE:
        _say(f"UNSAFE: the rig is marked; check the stand in person, then: fieldrun ack {args.rig}")
    return code


def _comm_timeout(rig):
    return float(rig.host_loss_timeout_s) if rig.host_loss == "supply-timeout" else None


def _write_report(folder) -> str:
    """The analysis helper's report, guarded: its failure is a note, never an exit code."""
    try:
        from ..report import write_report
    except ImportError:
        return "no report (analysis not installed)"
    try:
        out = write_report(folder)
        return f"report {out}" if out else "report written"
    except KeyboardInterrupt:
        return "report interrupted (fieldrun report RUN writes it later)"
    except Exception as exc:   # noqa: BLE001 - a failing report never changes the outcome
        return f"report failed: {exc}"
