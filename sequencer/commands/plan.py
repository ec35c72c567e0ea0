"""``fieldrun plan PROTOCOL --rig RIG [--json]``: the schedule a protocol makes on a rig.

Prints each segment (kind, source line, sample period, nominal duration, voltage range,
peak, samples) as a table, then the totals: nominal duration (h:mm:ss), peak voltage and
sample count. ``--json`` prints ``Plan.to_json()`` instead.

Timing budget: ``sequencer.compiler.attach_timing_budget`` asks the drivers layer
(``drivers.timing``) for the worst-case time one sample takes on this rig (integration,
reply and serial transfer times from each instrument's dialect) and refuses a sample period
that cannot hold it.
"""
from __future__ import annotations

from typing import Mapping, Optional

from ..quantities import format_duration, format_si

HELP = "show the schedule a protocol makes on a rig (durations, voltages, samples)"
DESCRIPTION = ("Compile PROTOCOL against RIG and show every segment with its nominal "
               "duration, voltage range and sample count, then the totals. Durations are "
               "nominal: holds and back-offs lengthen a run, never shorten it.")


def add_arguments(parser) -> None:
    parser.add_argument("protocol", metavar="PROTOCOL", help="protocol file")
    parser.add_argument("--rig", metavar="RIG", required=True, help="rig file")
    parser.add_argument("--json", action="store_true", help="print the plan as JSON")


def timing_budget(plan, rig) -> Optional[Mapping[str, float]]:
    """THE HOOK where the drivers layer adds the timing budget of one sample on ``rig``
    (see ``sequencer.compiler.attach_timing_budget``, which fills ``plan.timing_budget``
    and refuses a sample period that cannot be met)."""
    from ..compiler import attach_timing_budget
    return attach_timing_budget(plan, rig).timing_budget


def build(protocol_path: str, rig_path: str):
    """(plan, rig) with the timing budget filled in where the drivers provide one."""
    from ..compiler import compile_plan
    from ..protocol import load_protocol
    from ..rig import load_rig
    rig = load_rig(rig_path)
    plan = compile_plan(load_protocol(protocol_path), rig)
    from ..compiler import attach_timing_budget
    return attach_timing_budget(plan, rig, protocol_path), rig


def _v(x: float) -> str:
    return format_si(x, "V")


def _notes(seg) -> str:
    p = seg.params
    if seg.kind == "ramp":
        bits = [f"{format_si(p['rate'], 'V/s')}"] if p["step_v"] is None else \
            [f"steps of {_v(p['step_v'])}, {format_si(p['settle_s'], 's')} each"]
        if p.get("until_current") is not None:
            bits.append(f"until {format_si(p['until_current'], 'A')}")
        return ", ".join(bits)
    if seg.kind == "sweep":
        return (f"{len(p['points'])} points, {p['samples_per_point']} samples each, "
                f"settle {format_si(p['settle_s'], 's')}")
    if seg.kind == "return":
        return format_si(p["rate"], "V/s")
    if seg.kind == "regulate":
        return (f"{format_si(p['target_current'], 'A')}, {_v(p['v_floor'])} to "
                f"{_v(p['v_ceiling'])}")
    if seg.kind == "condition":
        tgt = [x for x in (p["v_target"] and _v(p["v_target"]),
                           p["i_target"] and format_si(p["i_target"], "A")) if x]
        return f"toward {' / '.join(tgt)}; duration is its timeout"
    if seg.kind == "wait":
        unit = "Pa" if p["until"] == "pressure_below" else ""
        return f"{p['until']} {format_si(p['value'], unit)}; duration is its timeout"
    if seg.kind == "pause":
        if p["timeout_s"] is None:
            return "NO TIMEOUT: waits for the operator (counted as 0; --unattended refuses)"
        return f"resumes by itself after {format_duration(p['timeout_s'])}"
    return ""


def render(plan, rig, console) -> None:
    from rich.table import Table
    table = Table(title=f"{plan.name} on {rig.name} (sample {plan.sample_id or '-'})")
    for col, justify in (("#", "right"), ("step", "left"), ("line", "right"),
                         ("period", "right"), ("duration", "right"), ("V from", "right"),
                         ("V to", "right"), ("V peak", "right"), ("samples", "right"),
                         ("notes", "left")):
        table.add_column(col, justify=justify, no_wrap=col != "notes")
    for s in plan.segments:
        table.add_row(str(s.index), s.label, str(s.source_line),
                      format_si(s.sample_period, "s"), format_duration(s.nominal_duration),
                      _v(s.v_start), _v(s.v_end), _v(s.v_peak), str(s.nominal_samples),
                      _notes(s))
    console.print(table)
    sign = "+" if plan.polarity > 0 else "-"
    console.print(f"total nominal duration {format_duration(plan.total_duration)}  "
                  f"peak {_v(plan.peak_voltage)} (output {sign})  "
                  f"samples {plan.sample_count}")
    lim = plan.limits
    console.print(f"limits: current_max {format_si(lim.current_max, 'A')}, voltage_max "
                  f"{_v(lim.voltage_max)}, power_max {format_si(lim.power_max, 'W')}, "
                  f"pressure_max {format_si(lim.pressure_max, 'Pa')}, slew_max "
                  f"{format_si(lim.slew_max, 'V/s')}")
    if plan.timing_budget:
        parts = ", ".join(f"{k} {v * 1000:.1f} ms" for k, v in plan.timing_budget.items()
                          if k != "total")
        total = plan.timing_budget.get("total", 0.0)
        console.print(f"timing budget of one sample: {total * 1000:.1f} ms worst case "
                      f"({parts}); shortest sample period "
                      f"{min(s.sample_period for s in plan.segments):g} s")
    else:
        console.print("timing budget of one sample: not computed (drivers layer)")
    from ..compiler import unattended_problems
    for p in unattended_problems(plan, plan.name):
        console.print(f"note: line {p.line}: {p.message}")


def run(args) -> int:
    plan, rig = build(args.protocol, args.rig)
    if args.json:
        print(plan.to_json())
        return 0
    import sys
    from ..console import rich_console
    # a broken pipe (``fieldrun plan ... | head``) ends the verb quietly with exit 0, not
    # rich's own SystemExit(1), which reads as an internal error
    console = rich_console(sys.stdout, force_terminal=None, highlight=False)
    if not console.is_terminal:
        console = rich_console(sys.stdout, force_terminal=None, width=160, highlight=False)
    render(plan, rig, console)
    return 0
