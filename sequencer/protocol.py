"""The protocol language: what the supply does over time and which limits guard it.

A protocol file is YAML::

    name: condition-1h                 # optional; default: the file name without .yaml
    notes: free text                   # optional
    sample_period: "1 s"               # optional; default 1 s; steps may override (period:)
    limits:                            # optional; any parameter of sequencer.limits.PARAMS
      current_max: "50 uA"
    steps:                             # required, a list
      - ramp: {to: "600 V", rate: "5 V/s"}
      - dwell: {duration: "1 h"}
      - return: {rate: "20 V/s"}

Each step is a mapping with one key, the step kind, whose value holds the step's settings
(a kind whose settings are all optional may be written alone: ``- return``). The kinds and
their keys are declared in ``STEP_KINDS`` below, with units and defaults; that table is
the single place a step kind is defined (``docs/protocol-reference.md`` is written from
it, see ``reference_markdown``). Voltages are magnitudes (the rig file's polarity sets the
sign); a voltage setting marked "level" also takes a macroscopic field (``"2 V/um"``),
turned into volts with the rig's gap by the compiler.

``parse_protocol`` checks everything it can without a rig and raises one ``ProtocolError``
listing every problem found, each at its line and column.
"""
from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Callable, Dict, List, Mapping, Optional, Tuple

from .errors import ProtocolError
from .limits import PARAMS
from .quantities import Quantity
from .yamlsafe import Fields, Node, did_you_mean, load, load_text

REQUIRED = object()          # marker: the key has no default
SAMPLE_PERIOD_DEFAULT = 1.0  # s, common practice, no source
SAMPLE_PERIOD_MIN = 0.01     # s: below this no SCPI picoammeter answers in time (common practice)
SAMPLE_PERIOD_MAX = 60.0     # s: above this the watchdog sees too little (common practice)
MAX_STEPS = 10_000           # steps after unrolling repeats (a guard against typos)


def reduce_frozen(obj):
    """``__reduce__`` for a frozen dataclass holding read-only mappings: rebuild it from
    its fields with every mapping as a plain dict (``__post_init__`` wraps them again), so
    protocols and rigs pickle for campaign workers."""
    values = []
    for f in dataclasses.fields(obj):
        v = getattr(obj, f.name)
        values.append(dict(v) if isinstance(v, MappingProxyType) else v)
    return (obj.__class__, tuple(values))


@dataclass(frozen=True)
class Level:
    """A voltage, or a macroscopic field to be multiplied by the rig's gap."""
    value: float        # V, or V/m when is_field
    is_field: bool
    text: str

    def volts(self, gap_m: Optional[float]) -> Optional[float]:
        if not self.is_field:
            return self.value
        return None if gap_m is None else self.value * gap_m


@dataclass(frozen=True)
class Key:
    """One setting of a step kind. ``unit`` is "level" (a voltage or a field), an SI unit
    of ``quantities.UNIT_WORDS``, "int", "text" or "choice"."""
    name: str
    unit: str
    default: Any = REQUIRED
    doc: str = ""
    options: Tuple[str, ...] = ()
    positive: bool = False
    lo: Optional[float] = None
    hi: Optional[float] = None
    default_doc: str = ""      # how the default is shown in the reference (and its source)


@dataclass(frozen=True)
class Kind:
    name: str
    doc: str
    keys: Tuple[Key, ...]
    check: Optional[Callable[["Fields", Node, Dict[str, Any], Dict[str, Node]], None]] = None


@dataclass(frozen=True)
class Step:
    """One step as written (``repeat`` keeps its inner steps in ``steps``)."""
    kind: str
    line: int
    col: int
    params: Mapping[str, Any]
    period: Optional[float] = None      # s; None: the protocol's sample period
    label: str = ""
    steps: Tuple["Step", ...] = ()

    def __post_init__(self):
        object.__setattr__(self, "params", MappingProxyType(dict(self.params)))

    __reduce__ = reduce_frozen


@dataclass(frozen=True)
class Protocol:
    name: str
    steps: Tuple[Step, ...]
    sample_period: float = SAMPLE_PERIOD_DEFAULT
    limits: Mapping[str, float] = field(default_factory=dict)      # only those set
    limit_lines: Mapping[str, int] = field(default_factory=dict)
    notes: str = ""
    file: str = ""
    line: int = 1

    def __post_init__(self):
        object.__setattr__(self, "limits", MappingProxyType(dict(self.limits)))
        object.__setattr__(self, "limit_lines", MappingProxyType(dict(self.limit_lines)))

    __reduce__ = reduce_frozen


# ---------------------------------------------------------------------------------------
# The step kinds (the only table to extend when a kind is added; see docs/dev-protocol.md)
# ---------------------------------------------------------------------------------------

_CP = "common practice, no source"
_SLEW = "the `slew_max` limit"


def _check_ramp(f: Fields, node: Node, p: Dict[str, Any], nodes: Dict[str, Node]) -> None:
    if "step" in nodes and "settle" not in nodes:
        f.add(nodes["step"], "a stepped ramp needs 'settle' (the time at each step)",
              'add settle: "5 s"')
    if "settle" in nodes and "step" not in nodes:
        f.add(nodes["settle"], "'settle' belongs to a stepped ramp; give 'step' too",
              'add step: "10 V", or remove settle')
    if "step" not in nodes and "rate" not in nodes:
        f.add(node, "ramp needs 'rate' (or 'step' and 'settle' for a stepped ramp)",
              'e.g. rate: "5 V/s"')


def _check_sweep(f: Fields, node: Node, p: Dict[str, Any], nodes: Dict[str, Node]) -> None:
    has_step, has_points = "step" in nodes, "points" in nodes
    if has_step == has_points:
        f.add(node, "sweep needs exactly one of 'step' and 'points'",
              'e.g. step: "25 V" (even in V) or points: 20')
    if p.get("spacing") == "inverse" and has_step:
        f.add(nodes["step"], "a sweep even in 1/V takes 'points', not 'step'",
              "give points: N")
    start, stop = p.get("start"), p.get("stop")
    if isinstance(start, Level) and isinstance(stop, Level) and start.is_field == stop.is_field:
        if not stop.value > start.value:
            f.add(nodes["stop"], f"sweep stop {stop.text!r} must be above start "
                                 f"{start.text!r}",
                  "start is the low end; use direction: down to sweep downwards")
        step = p.get("step")
        if isinstance(step, Level) and step.is_field == start.is_field and stop.value > start.value:
            n = (stop.value - start.value) / step.value
            if abs(n - round(n)) > 1e-6 * max(1.0, n):
                f.add(nodes["step"], f"sweep step {step.text!r} does not fit the range "
                                     f"{start.text!r} to {stop.text!r} ({n:.3g} steps)",
                      "choose a step that divides stop - start, or give points")
            elif round(n) + 1 > 10_000:
                f.add(nodes["step"], f"sweep has {round(n) + 1} points", "at most 10000")
    if p.get("spacing") == "inverse" and isinstance(start, Level) and not start.value > 0:
        f.add(nodes.get("start", node), "a sweep even in 1/V needs start above 0 V", "")


def _check_condition(f: Fields, node: Node, p: Dict[str, Any], nodes: Dict[str, Node]) -> None:
    if "to" not in nodes and "current" not in nodes:
        f.add(node, "condition needs a target: 'to' (a voltage or field), 'current', or both",
              'e.g. to: "800 V"')
    if "to" not in nodes and "ceiling" not in nodes and "current" in nodes:
        f.add(node, "condition toward a current needs a voltage 'ceiling'",
              'e.g. ceiling: "900 V"')


def _check_wait(f: Fields, node: Node, p: Dict[str, Any], nodes: Dict[str, Node]) -> None:
    conds = [k for k in ("pressure_below", "current_stable") if k in nodes]
    if len(conds) != 1:
        f.add(node, "wait needs exactly one of 'pressure_below' and 'current_stable'",
              'e.g. pressure_below: "5e-5 Pa"')
    if "window" in nodes and "current_stable" not in nodes:
        f.add(nodes["window"], "'window' belongs to current_stable", "remove it")


def _check_regulate(f: Fields, node: Node, p: Dict[str, Any], nodes: Dict[str, Node]) -> None:
    fl, ce = p.get("floor"), p.get("ceiling")
    if isinstance(fl, Level) and isinstance(ce, Level) and fl.is_field == ce.is_field \
            and fl.value >= ce.value:
        f.add(nodes.get("floor", node), f"regulate floor {fl.text!r} must be below the "
                                        f"ceiling {ce.text!r}", "")


_PERIOD = Key("period", "s", None, "sample period of this step", positive=True,
              default_doc="the protocol's `sample_period`")
_LABEL = Key("label", "text", "", "a short name shown in the plan and the console",
             default_doc="none")
COMMON_KEYS = (_PERIOD, _LABEL)

STEP_KINDS: Mapping[str, Kind] = MappingProxyType({k.name: k for k in [
    Kind("ramp", "change the voltage to a level at a rate, or in steps with a settle "
                 "time; optionally stop early when a current is reached", (
        Key("to", "level", REQUIRED, "the voltage (or field) to ramp to"),
        Key("rate", "V/s", None, "ramp rate", positive=True,
            default_doc=f"required for a continuous ramp; a stepped ramp moves at {_SLEW}"),
        Key("step", "level", None, "step size of a stepped ramp", positive=True,
            default_doc="none (continuous)"),
        Key("settle", "s", None, "time at each step of a stepped ramp, counted from the "
                                 "moment the step is set", positive=True,
            default_doc="required with step"),
        Key("until_current", "A", None, "stop the ramp early once the emission current "
                                        "reaches this", positive=True,
            default_doc="none (ramp to the end)"),
    ), _check_ramp),
    Kind("dwell", "hold the present voltage for a duration", (
        Key("duration", "s", REQUIRED, "how long to hold", positive=True),
    )),
    Kind("sweep", "an I-V curve: measure at points from start to stop (for hysteresis, "
                  "direction up-down)", (
        Key("start", "level", REQUIRED, "low end of the sweep"),
        Key("stop", "level", REQUIRED, "high end of the sweep"),
        Key("step", "level", None, "spacing between points (even in V)", positive=True,
            default_doc="give step or points"),
        Key("points", "int", None, "number of points from start to stop", lo=2, hi=10_000,
            default_doc="give step or points"),
        Key("spacing", "choice", "linear", "points even in V (linear) or in 1/V (inverse, "
                                           "even on a Fowler-Nordheim plot)",
            options=("linear", "inverse")),
        Key("settle", "s", 1.0, "wait at each point before sampling", positive=True,
            default_doc=f"1 s ({_CP})"),
        Key("samples", "int", 1, "samples taken at each point, one per sample period",
            lo=1, hi=10_000, default_doc="1"),
        Key("direction", "choice", "up", "up: start to stop; down: stop to start; up-down: "
                                         "start to stop and back",
            options=("up", "down", "up-down")),
        Key("repeats", "int", 1, "how many times the whole pass is made", lo=1, hi=1000,
            default_doc="1"),
        Key("rate", "V/s", None, "rate of the moves between points", positive=True,
            default_doc=_SLEW),
    ), _check_sweep),
    Kind("return", "ramp back to 0 V at a rate", (
        Key("rate", "V/s", None, "ramp-down rate", positive=True, default_doc=_SLEW),
    )),
    Kind("rest", "output on at 0 V for a duration (the voltage must already be 0 V)", (
        Key("duration", "s", REQUIRED, "how long to rest", positive=True),
    )),
    Kind("regulate", "hold a target emission current for a duration, moving the voltage "
                     "between a floor and a ceiling", (
        Key("current", "A", REQUIRED, "target emission current", positive=True),
        Key("duration", "s", REQUIRED, "how long to hold the current", positive=True),
        Key("ceiling", "level", REQUIRED, "highest voltage the loop may set"),
        Key("floor", "level", Level(0.0, False, "0 V"), "lowest voltage the loop may set",
            default_doc="0 V"),
        Key("max_step", "V", 2.0, "largest voltage change per sample", positive=True,
            default_doc=f"2 V ({_CP})"),
    ), _check_regulate),
    Kind("condition", "step toward a target voltage or current, advancing only when the "
                      "current has been stable; back off after bursts, with a retry budget", (
        Key("to", "level", None, "target voltage (or field)", default_doc="none"),
        Key("current", "A", None, "target emission current", positive=True,
            default_doc="none"),
        Key("ceiling", "level", None, "highest voltage (needed when only a current target "
                                      "is given)", default_doc="the `to` target"),
        Key("start", "level", None, "voltage to begin from",
            default_doc="the voltage the previous step ended at"),
        Key("step", "V", 10.0, "voltage step between stable plateaus", positive=True,
            default_doc=f"10 V ({_CP})"),
        Key("stable", "", 0.05, "relative fluctuation (std/mean of I) counted as stable",
            positive=True, hi=1.0, default_doc=f"5 % ({_CP})"),
        Key("stable_time", "s", 60.0, "how long the current must stay stable before the "
                                      "next step", positive=True,
            default_doc=f"60 s ({_CP})"),
        Key("backoff", "V", 50.0, "how far to step back after a burst", positive=True,
            default_doc=f"50 V ({_CP})"),
        Key("retries", "int", 5, "back-offs allowed before the step gives up", lo=0,
            hi=1000, default_doc=f"5 ({_CP})"),
        Key("timeout", "s", REQUIRED, "longest the step may take", positive=True),
        Key("rate", "V/s", None, "rate of the moves", positive=True, default_doc=_SLEW),
    ), _check_condition),
    Kind("wait", "hold the present voltage until the pressure is low enough or the "
                 "current is stable, with a timeout", (
        Key("pressure_below", "Pa", None, "wait until the pressure is below this",
            positive=True, default_doc="give one condition"),
        Key("current_stable", "", None, "wait until the relative fluctuation of the "
                                        "current over `window` is below this",
            positive=True, hi=1.0, default_doc="give one condition"),
        Key("window", "s", 30.0, "window of current_stable", positive=True,
            default_doc=f"30 s ({_CP})"),
        Key("timeout", "s", REQUIRED, "longest the wait may take", positive=True),
    ), _check_wait),
    Kind("pause", "hold the present voltage, watchdog running, until the operator "
                  "resumes (`--unattended` refuses a pause without a timeout)", (
        Key("timeout", "s", None, "resume by itself after this long", positive=True,
            default_doc="none: waits for the operator"),
        Key("message", "text", "paused for the operator", "shown to the operator",
            default_doc='"paused for the operator"'),
    )),
    Kind("repeat", "run a block of steps several times", (
        Key("times", "int", REQUIRED, "how many times", lo=1, hi=10_000),
        Key("steps", "steps", REQUIRED, "the block: a list of steps"),
    )),
]})


# ---------------------------------------------------------------------------------------
# Reading
# ---------------------------------------------------------------------------------------

def _read_key(f: Fields, key: Key, node: Node, what: str) -> Any:
    label = f"{what}: {key.name}"
    if key.unit == "level":
        q = f.quantity(node, label, "V", alternatives=("V/m",), positive=key.positive)
        if q is None:
            return None
        assert isinstance(q, Quantity)
        return Level(q.value, q.unit == "V/m", q.text)
    if key.unit == "int":
        return f.integer(node, label, lo=int(key.lo) if key.lo is not None else None,
                         hi=int(key.hi) if key.hi is not None else None)
    if key.unit == "text":
        return f.text(node, label, allow_empty=True)
    if key.unit == "choice":
        return f.choice(node, label, key.options)
    return f.quantity(node, label, key.unit, positive=key.positive, at_most=key.hi)


def _read_step(f: Fields, node: Node, where: str, depth: int) -> Optional[Step]:
    kinds = list(STEP_KINDS)
    if node.kind == "scalar" and not node.is_null:
        name, body = node.value, None
        key_node = node
    elif node.kind == "map" and len(node.items()) == 1:
        key_node, body = node.items()[0]
        name = key_node.value
    elif node.kind == "map" and len(node.items()) > 1:
        names = [k for k in node.keys() if k in STEP_KINDS]
        hint = ("indent the settings under the kind, e.g. '- ramp: {to: \"600 V\", "
                "rate: \"5 V/s\"}'" if len(names) == 1 else
                "each list item is one step: '- kind: {settings}'")
        f.add(node, f"{where} has several keys ({', '.join(node.keys())}); a step is one "
                    "kind with its settings", hint)
        return None
    else:
        f.add(node, f"{where} must be a step such as '- dwell: {{duration: \"10 min\"}}'", "")
        return None
    if name not in STEP_KINDS:
        f.add(key_node, f"unknown step kind {name!r}",
              did_you_mean(name, kinds) or ("known kinds: " + ", ".join(kinds)))
        return None
    kind = STEP_KINDS[name]
    what = f"{where} ({name})"
    allowed = [k.name for k in kind.keys] + [k.name for k in COMMON_KEYS]
    if body is None or body.is_null:
        nodes: Dict[str, Node] = {}
    else:
        got = f.mapping(body, what, allowed)
        if got is None:
            return None
        nodes = got
    params: Dict[str, Any] = {}
    ok = True
    for key in kind.keys:
        if key.name not in nodes:
            if key.default is REQUIRED:
                f.add(body if body is not None and not body.is_null else key_node,
                      f"{what} needs {key.name!r}", key.doc)
                ok = False
            params[key.name] = None if key.default is REQUIRED else key.default
            continue
        if key.unit == "steps":
            continue
        v = _read_key(f, key, nodes[key.name], what)
        if v is None and key.unit != "text":
            ok = False
        params[key.name] = v
    period = _read_key(f, _PERIOD, nodes["period"], what) if "period" in nodes else None
    if period is not None and not (SAMPLE_PERIOD_MIN <= period <= SAMPLE_PERIOD_MAX):
        f.add(nodes["period"], f"{what}: period must be between {SAMPLE_PERIOD_MIN:g} s and "
                               f"{SAMPLE_PERIOD_MAX:g} s", "")
        period = None
    label = _read_key(f, _LABEL, nodes["label"], what) if "label" in nodes else ""
    inner: Tuple[Step, ...] = ()
    if name == "repeat" and "steps" in nodes:
        inner_nodes = f.sequence(nodes["steps"], f"{what} steps", nonempty=True)
        if inner_nodes is None:
            ok = False
        else:
            parts = [_read_step(f, n, f"{where}.{i}", depth + 1)
                     for i, n in enumerate(inner_nodes, 1)]
            if any(p is None for p in parts):
                ok = False
            inner = tuple(p for p in parts if p is not None)
    if kind.check is not None:   # cross-key rules run even when a key was bad
        kind.check(f, body if body is not None and not body.is_null else key_node,
                   params, nodes)
    if not ok:
        return None
    return Step(name, key_node.line, key_node.col, params, period, label or "", inner)


def _count(steps: Tuple[Step, ...]) -> int:
    n = 0
    for s in steps:
        if s.kind == "repeat":
            n += s.params["times"] * _count(s.steps)
        else:
            n += 1
        if n > MAX_STEPS:
            return n
    return n


TOP_KEYS = ("name", "notes", "sample_period", "limits", "steps")


def read_limits(f: Fields, node: Optional[Node], what: str = "limits"
                ) -> Tuple[Dict[str, float], Dict[str, int]]:
    """A ``limits`` block: parameter name -> SI value (units from ``PARAMS``)."""
    values: Dict[str, float] = {}
    lines: Dict[str, int] = {}
    nodes = f.mapping(node, what, list(PARAMS)) if node is not None else None
    for name, vnode in (nodes or {}).items():
        p = PARAMS[name]
        unit = p.unit
        label = f"{what}: {name}"
        v = f.quantity(vnode, label, unit, positive=name != "supply_cc_trips",
                       at_most=1.0 if name.endswith("_fraction") else None)
        if v is None:
            continue
        if name == "supply_cc_trips" and v not in (0.0, 1.0):
            f.add(vnode, f"{label} must be 0 or 1", "1 trips on constant-current mode")
            continue
        values[name] = v
        lines[name] = vnode.line
    return values, lines


def parse_protocol(root: Node, file: str = "<protocol>") -> Protocol:
    """Check and read a protocol tree; raise one ``ProtocolError`` with every problem."""
    f = Fields(file)
    f.refuse_other_kind(root, "instruments", "steps",
                        "this is a rig file (it lists 'instruments'), not a protocol",
                        "the protocol is the one listing 'steps': fieldrun run PROTOCOL --rig RIG")
    top = f.mapping(root, "protocol", TOP_KEYS, required=("steps",))
    if top is None:
        f.raise_if_any()
        raise ProtocolError([])  # pragma: no cover - mapping() always records a problem
    default_name = Path(file).stem if file and not file.startswith("<") else "protocol"
    name = f.text(top.get("name"), "name", pattern=r"[\w][\w .+-]{0,79}",
                  hint="letters, digits, spaces, '.', '+', '-' and '_', at most 80") \
        if "name" in top else default_name
    notes = f.text(top.get("notes"), "notes", allow_empty=True, max_len=20_000) \
        if "notes" in top else ""
    period = SAMPLE_PERIOD_DEFAULT
    if "sample_period" in top:
        v = f.quantity(top["sample_period"], "sample_period", "s", positive=True)
        if v is not None and not (SAMPLE_PERIOD_MIN <= v <= SAMPLE_PERIOD_MAX):
            f.add(top["sample_period"], f"sample_period must be between "
                                        f"{SAMPLE_PERIOD_MIN:g} s and {SAMPLE_PERIOD_MAX:g} s",
                  "")
        elif v is not None:
            period = v
    limits, lines = read_limits(f, top.get("limits"))
    steps: Tuple[Step, ...] = ()
    seq = f.sequence(top.get("steps"), "steps", nonempty=True) if "steps" in top else None
    if seq is not None:
        parts = [_read_step(f, n, f"step {i}", 1) for i, n in enumerate(seq, 1)]
        steps = tuple(p for p in parts if p is not None)
        if len(steps) == len(parts) and _count(steps) > MAX_STEPS:
            f.add(top["steps"], f"the steps unroll to more than {MAX_STEPS} steps",
                  "check the repeat counts")
    f.raise_if_any()
    return Protocol(name=name or default_name, steps=steps, sample_period=period,
                    limits=limits, limit_lines=lines, notes=notes or "", file=file,
                    line=root.line)


def load_protocol(path) -> Protocol:
    root, _ = load(path)
    return parse_protocol(root, str(path))


def protocol_from_text(text: str, file: str = "<protocol>") -> Protocol:
    return parse_protocol(load_text(text, file), file)


# ---------------------------------------------------------------------------------------
# The reference page, written from the table above
# ---------------------------------------------------------------------------------------

def _unit_doc(key: Key) -> str:
    return {"level": "V or V/m (a field, times the rig's gap)", "int": "whole number",
            "text": "text", "choice": " \\| ".join(key.options), "steps": "list of steps",
            "": "plain number or %"}.get(key.unit, key.unit)


def _default_doc(key: Key) -> str:
    if key.default_doc:
        return key.default_doc
    if key.default is REQUIRED:
        return "**required**"
    if key.default is None:
        return "none"
    return str(key.default)


def reference_markdown() -> str:
    """The step-kind and limits tables of docs/protocol-reference.md."""
    return steps_markdown() + "\n" + limits_markdown()


def steps_markdown() -> str:
    """One table per step kind, written from ``STEP_KINDS``."""
    out: List[str] = []
    for kind in STEP_KINDS.values():
        out.append(f"### `{kind.name}`\n\n{kind.doc[0].upper() + kind.doc[1:]}.\n")
        out.append("| key | unit | default | meaning |\n|---|---|---|---|")
        for key in kind.keys + COMMON_KEYS:
            out.append(f"| `{key.name}` | {_unit_doc(key)} | {_default_doc(key)} | {key.doc} |")
        out.append("")
    return "\n".join(out)


def limits_markdown() -> str:
    """The ``limits`` table, written from ``sequencer.limits.PARAMS``."""
    out: List[str] = []
    out.append("| key | unit | default | tighter | rule | meaning | default's source |")
    out.append("|---|---|---|---|---|---|---|")
    for p in PARAMS.values():
        unit = p.unit or "plain number or %"
        out.append(f"| `{p.name}` | {unit} | {p.default:g} | {p.tighter} | {p.rule} | "
                   f"{p.doc} | {p.source} |")
    return "\n".join(out) + "\n"


if __name__ == "__main__":  # regenerate the tables of docs/protocol-reference.md
    print(reference_markdown())
