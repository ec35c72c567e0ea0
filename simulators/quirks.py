"""Quirks and scheduled faults of the simulated instruments.

Real instruments hang, lie, answer late and keep their output when the host dies; the
simulated ones do too, when the simulated rig file says so::

    simulation:
      seed: 7
      quirks:
        supply:
          latency: {dist: lognormal, median_s: 0.004, sigma: 0.6}
          faults:
            - {kind: late-reply, at_command: 40, delay_s: 3.0}
            - {kind: ignore-output-off, from_s: 120}
        ammeter:
          faults:
            - {kind: special-value, match: "READ", from_command: 10, count: 2, value: "+9.9E37"}
        gauge:
          faults:
            - {kind: never-answer, from_s: 300}

Every fault has a *kind* and a *schedule*. The schedule is any mix of

* ``from_s`` / ``until_s``: a window of time on the instrument's clock, in seconds from
  the moment the stand was built (so ``sim-serve`` on a wall clock counts from its start);
* ``at_command`` (only that command, or ``count`` commands from it) or ``from_command``
  (from it on, or for ``count`` commands): commands are counted per instrument, 1-based,
  one per line the instrument receives;
* ``probability``: inside the window, each command is hit with this probability;
* ``match``: only lines whose text starts with this (case-insensitive), e.g. ``"MEAS"``.

A fault without a schedule is active from the start. Every random draw comes from a
generator seeded with (seed, instrument, fault kind, command number), so a run replays
exactly whatever order the instruments are asked in.

Kinds (which instrument honours each is in ``KINDS``):

========================== =============================================================
``late-reply``             the reply comes ``delay_s`` (default 5) after the question
``never-answer``           the command is carried out, its reply never comes
``hang``                   nothing is carried out, nothing comes back (a wedged firmware)
``slow``                   every reply is ``delay_s`` (default 0.5) later than usual
``drop-connection``        the instrument drops the connection (``ConnectionResetError``)
``garbage``                the reply is replaced by seeded junk characters
``truncated``              the reply is cut short (seeded cut)
``special-value``          a numeric reply becomes ``value`` (default ``+9.9E37``)
``error-flood``            every command also queues a -300 device error (so the queue
                           overflows to -350)
``never-empty-errors``     ``SYST:ERR?`` never answers ``0,"No error"``
``ignore-output-off``      the supply accepts ``OUTP OFF`` and keeps its output on;
                           with ``lie: true`` it also answers ``OUTP?`` with 0
``drift``                  the supply's output drifts off its setpoint by ``rate_v_per_s``
                           (up to ``max_v``)
``ignore-comm-timeout``    the supply accepts ``SYST:COMM:TIM`` but its watchdog never
                           acts: the output stays on when the host goes silent
``left-shorted``           the ammeter's input short (zero check) cannot be lifted; with
                           ``lie: true`` it also answers ``SYST:ZCH?`` with 0
``filament-off``           the gauge's filament goes out (``FIL,OFF``)
========================== =============================================================

Not faults but settings in the same block: ``latency`` (a distribution of reply
latency for every query: ``constant`` (``value_s``), ``uniform`` (``low_s``,
``high_s``), ``normal`` (``mean_s``, ``sd_s``, clipped at 0), ``lognormal``
(``median_s``, ``sigma``), ``exponential`` (``mean_s``)), ``error_queue_length`` and
``single_client`` (sim-serve accepts one connection at a time; default true).
Host loss is a supply setting (``simulation: supply: host_loss: keep|off``, default
``keep``: the output stays on when the host vanishes unless the supply's communication
timeout was armed).
"""
from __future__ import annotations

import math
import zlib
from dataclasses import dataclass, field
from typing import Any, Dict, List, Mapping, Optional

import numpy as np

COMMON = {"late-reply", "never-answer", "hang", "slow", "drop-connection", "garbage",
          "truncated", "special-value", "error-flood", "never-empty-errors"}
KINDS = {
    "supply": COMMON | {"ignore-output-off", "drift", "ignore-comm-timeout"},
    "ammeter": COMMON | {"left-shorted"},
    "gauge": COMMON | {"filament-off"},
    "interlock": COMMON,
}
DISTS = {"constant", "uniform", "normal", "lognormal", "exponential"}
_SCHEDULE_KEYS = {"from_s", "until_s", "at_command", "from_command", "count",
                  "probability", "match"}


class QuirkConfigError(ValueError):
    """A quirk block in a simulated rig file is wrong; the message names the place."""


def _crc(text: str) -> int:
    return zlib.crc32(text.encode())


@dataclass(frozen=True)
class Fault:
    kind: str
    from_s: Optional[float] = None
    until_s: Optional[float] = None
    first: Optional[int] = None      # first command number hit
    count: Optional[int] = None      # commands hit from ``first`` (None: no end)
    probability: float = 1.0
    match: Optional[str] = None
    options: Mapping[str, Any] = field(default_factory=dict)

    def option(self, name: str, default: Any = None) -> Any:
        return self.options.get(name, default)


def parse_fault(role: str, spec: Mapping[str, Any], where: str) -> Fault:
    if not isinstance(spec, Mapping) or "kind" not in spec:
        raise QuirkConfigError(f"{where}: a fault needs a 'kind'")
    kind = str(spec["kind"])
    if kind not in KINDS.get(role, COMMON):
        raise QuirkConfigError(f"{where}: fault kind '{kind}' is not known for the {role} "
                               f"(known: {', '.join(sorted(KINDS.get(role, COMMON)))})")
    if "at_command" in spec and "from_command" in spec:
        raise QuirkConfigError(f"{where}: give at_command or from_command, not both")
    first = spec.get("at_command", spec.get("from_command"))
    count = spec.get("count")
    if "at_command" in spec and count is None:
        count = 1
    try:
        fault = Fault(
            kind=kind,
            from_s=None if spec.get("from_s") is None else float(spec["from_s"]),
            until_s=None if spec.get("until_s") is None else float(spec["until_s"]),
            first=None if first is None else int(first),
            count=None if count is None else int(count),
            probability=float(spec.get("probability", 1.0)),
            match=None if spec.get("match") is None else str(spec["match"]).upper(),
            options={k: v for k, v in spec.items() if k not in _SCHEDULE_KEYS | {"kind"}},
        )
    except (TypeError, ValueError) as exc:
        raise QuirkConfigError(f"{where}: {exc}") from None
    if not 0.0 <= fault.probability <= 1.0:
        raise QuirkConfigError(f"{where}: probability must lie in [0, 1]")
    return fault


class Quirks:
    """The quirks of one instrument. ``tick(t, line)`` is called once per command;
    ``hit(kind)`` then says whether a fault of that kind strikes this command."""

    def __init__(self, role: str, spec: Optional[Mapping[str, Any]] = None, seed: int = 0):
        spec = dict(spec or {})
        self.role = role
        self.seed = int(seed)
        where = f"simulation.quirks.{role}"
        unknown = set(spec) - {"latency", "faults", "error_queue_length", "single_client"}
        if unknown:
            raise QuirkConfigError(f"{where}: unknown key(s) {', '.join(sorted(unknown))}")
        self.latency = dict(spec.get("latency") or {"dist": "constant", "value_s": 0.0})
        if self.latency.get("dist", "constant") not in DISTS:
            raise QuirkConfigError(f"{where}.latency: dist must be one of {sorted(DISTS)}")
        self.faults: List[Fault] = [parse_fault(role, f, f"{where}.faults[{i}]")
                                    for i, f in enumerate(spec.get("faults") or [])]
        self._kinds = {f.kind for f in self.faults}
        self.error_queue_length = int(spec.get("error_queue_length", 10))
        self.single_client = bool(spec.get("single_client", True))
        #: clock reading that schedule times count from (the stand's start)
        self.origin = 0.0
        self.n = 0                  # commands received so far
        self.t = 0.0
        self.line = ""
        self.log: List[tuple] = []  # (t, command number, kind) of every fault that struck

    # -- per-command state
    def tick(self, t: float, line: str) -> int:
        self.n += 1
        self.t = t - self.origin
        self.line = line
        return self.n

    def _rng(self, *keys: int) -> np.random.Generator:
        return np.random.default_rng([self.seed & 0xFFFFFFFF, _crc(self.role), *keys])

    def _active(self, f: Fault, t: float, n: int, line: str) -> bool:
        if f.from_s is not None and t < f.from_s:
            return False
        if f.until_s is not None and t >= f.until_s:
            return False
        if f.first is not None:
            if n < f.first or (f.count is not None and n >= f.first + f.count):
                return False
        if f.match is not None and not line.strip().upper().startswith(f.match):
            return False
        if f.probability < 1.0:
            return self._rng(_crc(f.kind), n).random() < f.probability
        return True

    def find(self, kind: str, t: Optional[float] = None, n: Optional[int] = None,
             line: Optional[str] = None) -> Optional[Fault]:
        """The first fault of ``kind`` active at (t, n, line) (default: this command)."""
        if kind not in self._kinds:
            return None
        t = self.t if t is None else t - self.origin
        n = self.n if n is None else n
        line = self.line if line is None else line
        for f in self.faults:
            if f.kind == kind and self._active(f, t, n, line):
                return f
        return None

    def hit(self, kind: str) -> Optional[Fault]:
        """Like ``find`` for this command, and logs the strike."""
        f = self.find(kind)
        if f is not None:
            self.log.append((self.t, self.n, kind))
        return f

    def active_at(self, kind: str, t: float) -> Optional[Fault]:
        """A fault of ``kind`` active at time ``t`` regardless of commands (for states
        like drift or a filament that went out, which do not need a command to act)."""
        if kind not in self._kinds:
            return None
        t = t - self.origin
        for f in self.faults:
            if f.kind != kind:
                continue
            if f.from_s is not None and t < f.from_s:
                continue
            if f.until_s is not None and t >= f.until_s:
                continue
            if f.first is not None and (self.n < f.first or
                                        (f.count is not None and self.n >= f.first + f.count)):
                continue
            return f
        return None

    # -- reply shaping
    def draw_latency(self, n: int) -> float:
        """Reply latency of command ``n`` from the configured distribution (seconds)."""
        d = self.latency
        dist = d.get("dist", "constant")
        if dist == "constant":
            return max(0.0, float(d.get("value_s", 0.0)))
        rng = self._rng(_crc("latency"), n)
        if dist == "uniform":
            return float(rng.uniform(float(d.get("low_s", 0.0)), float(d.get("high_s", 0.01))))
        if dist == "normal":
            return max(0.0, float(rng.normal(float(d.get("mean_s", 0.005)), float(d.get("sd_s", 0.001)))))
        if dist == "lognormal":
            return float(float(d.get("median_s", 0.005)) * math.exp(float(d.get("sigma", 0.5)) * rng.standard_normal()))
        return float(rng.exponential(float(d.get("mean_s", 0.005))))

    def reply_delay(self, n: int, t: float, line: str, is_query: bool) -> float:
        """Total extra latency of the reply to command ``n`` at clock time ``t``
        (``math.inf``: never)."""
        if self.find("never-answer", t, n, line) or self.find("hang", t, n, line):
            return math.inf
        delay = self.draw_latency(n) if is_query else 0.0
        late = self.find("late-reply", t, n, line)
        if late is not None:
            delay += float(late.option("delay_s", 5.0))
        slow = self.find("slow", t, n, line)
        if slow is not None:
            delay += float(slow.option("delay_s", 0.5))
        return delay

    def shape_reply(self, reply: str) -> str:
        """Apply garbage / truncation / special values to this command's reply."""
        f = self.hit("special-value")
        if f is not None and _looks_numeric(reply):
            reply = str(f.option("value", "+9.9E37"))
        f = self.hit("truncated")
        if f is not None and reply:
            cut = int(self._rng(_crc("truncated"), self.n).integers(0, max(1, len(reply))))
            reply = reply[:cut]
        f = self.hit("garbage")
        if f is not None:
            rng = self._rng(_crc("garbage"), self.n)
            alphabet = np.frombuffer(b"#$%&()*<>@[]^_{}|~0123456789ABCDEFxyz,.;:!", dtype=np.uint8)
            length = int(rng.integers(1, 24))
            reply = bytes(rng.choice(alphabet, size=length)).decode("ascii")
        return reply


def _looks_numeric(text: str) -> bool:
    try:
        float(text.split(",")[0])
        return True
    except ValueError:
        return False


def quirks_for(role: str, simulation: Optional[Mapping[str, Any]], seed: int) -> Quirks:
    """The ``Quirks`` of ``role`` from a rig file's ``simulation`` block."""
    block = (simulation or {}).get("quirks") or {}
    if not isinstance(block, Mapping):
        raise QuirkConfigError("simulation.quirks: must be a mapping of instrument -> quirks")
    unknown = set(block) - set(KINDS)
    if unknown:
        raise QuirkConfigError(f"simulation.quirks: unknown instrument(s) {', '.join(sorted(unknown))}")
    return Quirks(role, block.get(role), seed)
