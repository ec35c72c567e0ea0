"""The watchdog: every rule of ``sequencer.rules`` on every sample, one verdict out.

Plain logic: no I/O, no threads, no clock of its own. Time is the samples' ``t``, so the
same stream of Samples gives the same verdicts live in the engine's sample loop, offline over
a recorded run (``fieldrun whatif``) and in tests.

Per sample, ``judge(sample, ctx)`` runs all rules in the fixed order of ``rules.RULES`` and
returns the most severe verdict (CONTINUE < HOLD < BACK_OFF < RAMP_DOWN < TRIP), ties going
to the rule listed first. Then:

* TRIP latches: every later sample gets the same trip verdict back, whatever the rules say.
  A RAMP_DOWN latches too (it ends the run) and can still escalate to a TRIP.
* A HOLD (or a BACK_OFF and the HOLD after it) that lasts ``hold_max_time`` turns into a
  RAMP_DOWN by the ``hold_timeout`` rule, so an unattended run never waits forever.
* An event dict is produced only when the verdict changes (its action or its rule), in the
  form of a line of ``events.jsonl``: ``kind`` "trip" for a trip, else "verdict"; with
  ``seq, t, utc, action, rule, value, threshold, unit, message, release``. Collect them with
  ``events()`` or pass ``on_event``.
* A rule that raises is a defect; the watchdog then trips (rule ``watchdog_error``) rather
  than let the exception pass — fail safe. The property test asserts it never happens.

Context (``rules.Context``) carries the plan's intent per sample; build it with
``Context.for_step(segment.kind, segment.params, slew_v_per_s=...)``.
"""
from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass
from typing import Callable, Deque, Iterable, List, Optional, Tuple

from .errors import RefusedError
from .limits import PARAMS, Limits
from .rules import RULE_NAMES, RULES, Collapse, Context, NewMaximum, finite
from .sample import CONTINUE, Action, Sample, Verdict

RECENT = 20
"""How many verdict changes ``state.recent`` keeps for the console."""

HOLDING = (Action.HOLD, Action.BACK_OFF)


@dataclass(frozen=True)
class Hold:
    rule: str
    action: str
    message: str
    release: str


@dataclass(frozen=True)
class WatchdogState:
    """What the console shows: the present verdict, every active hold with its release
    condition, the recent verdict changes (event dicts) and the latched/collapsed marks."""

    verdict: Verdict
    holds: Tuple[Hold, ...]
    recent: Tuple[dict, ...]
    latched: bool
    collapsed: bool
    survived_max_current: Optional[float]
    seq: Optional[int]

    @property
    def action(self) -> Action:
        return self.verdict.action


def _clean(x):
    return float(x) if isinstance(x, (int, float)) and math.isfinite(x) else None


def verdict_event(sample: Sample, v: Verdict, previous: Optional[Verdict] = None) -> dict:
    """The events.jsonl line for a verdict change at ``sample`` (JSON-safe: NaN -> null)."""
    if v.action is Action.CONTINUE and previous is not None:
        rule, message = previous.rule, f"released: {previous.release or 'condition cleared'}"
    else:
        rule, message = v.rule, v.message
    return {
        "seq": sample.seq, "t": _clean(sample.t), "utc": _clean(sample.utc),
        "kind": "trip" if v.action is Action.TRIP else "verdict",
        "action": v.action.name.lower(), "rule": rule,
        "value": _clean(v.value), "threshold": _clean(v.threshold), "unit": v.unit,
        "message": message, "release": v.release,
    }


class Watchdog:
    """All rules over a stream of Samples.

    ``survived_max_current``: the highest current (A) this cathode has survived before
    (None: no history; the first current of the run is taken as the start).
    ``rules``: names of the rules to run (default all, in the fixed order); tests use one
    rule in isolation, ``whatif`` all.
    """

    def __init__(self, limits: Limits, survived_max_current: Optional[float] = None,
                 rules: Optional[Iterable[str]] = None,
                 on_event: Optional[Callable[[dict], None]] = None):
        self.limits = limits
        wanted = None if rules is None else set(rules)
        if wanted is not None and wanted - set(RULE_NAMES) - {"hold_timeout"}:
            raise KeyError(", ".join(sorted(wanted - set(RULE_NAMES) - {"hold_timeout"})))
        self.rules = []
        for cls in RULES:
            if wanted is not None and cls.name not in wanted:
                continue
            if cls is NewMaximum:
                self.rules.append(cls(limits, survived_max_current))
            else:
                self.rules.append(cls(limits))
        self.hold_timeout = wanted is None or "hold_timeout" in wanted
        self.on_event = on_event
        self._events: List[dict] = []
        self._recent: Deque[dict] = deque(maxlen=RECENT)
        self.verdict: Verdict = CONTINUE
        self.last_verdicts: Tuple[Verdict, ...] = ()
        self.latched: Optional[Verdict] = None
        self.hold_since: Optional[float] = None
        self.seq: Optional[int] = None

    # ------------------------------------------------------------------ judging
    def judge(self, sample: Sample, ctx: Optional[Context] = None) -> Verdict:
        ctx = ctx if ctx is not None else Context.for_step(sample.step_kind)
        verdicts = []
        for rule in self.rules:
            try:
                v = rule.judge(sample, ctx)
            except Exception as exc:  # noqa: BLE001 - fail safe, asserted never to happen
                v = Verdict(Action.TRIP, rule="watchdog_error", message=
                            f"rule {rule.name} failed: {exc!r}", release="none: a trip latches")
            verdicts.append(v)
        self.last_verdicts = tuple(verdicts)
        best = CONTINUE
        for v in verdicts:
            if v.action > best.action:
                best = v
        best = self._hold_timeout(sample, best)
        if self.latched is not None and best.action <= self.latched.action:
            best = self.latched
        elif best.action >= Action.RAMP_DOWN:
            self.latched = best
        self._emit(sample, best)
        self.seq = sample.seq
        return best

    def _hold_timeout(self, sample: Sample, best: Verdict) -> Verdict:
        if best.action not in HOLDING or not finite(sample.t):
            self.hold_since = None
            return best
        if self.hold_since is None:
            self.hold_since = sample.t
        held = sample.t - self.hold_since
        lim = self.limits.hold_max_time
        if self.hold_timeout and held >= lim:
            return Verdict(Action.RAMP_DOWN, rule="hold_timeout", value=held, threshold=lim,
                           unit="s", message=f"held too long (last by {best.rule}: "
                           f"{best.message}); ending the run",
                           release="none: a ramp-down ends the run")
        return best

    def _emit(self, sample: Sample, v: Verdict) -> None:
        prev = self.verdict
        self.verdict = v
        if (v.action, v.rule) == (prev.action, prev.rule):
            return
        ev = verdict_event(sample, v, prev)
        self._events.append(ev)
        self._recent.append(ev)
        if self.on_event is not None:
            self.on_event(ev)

    # ------------------------------------------------------------------ outputs
    def events(self) -> List[dict]:
        """Event dicts produced since the last call (verdict changes only)."""
        out, self._events = self._events, []
        return out

    @property
    def collapsed(self) -> bool:
        """True once the collapse rule fired: regulate and condition must not chase."""
        return any(isinstance(r, Collapse) and r.collapsed for r in self.rules)

    @property
    def state(self) -> WatchdogState:
        holds = tuple(Hold(v.rule, v.action.name.lower(), v.message, v.release)
                      for v in self.last_verdicts if v.action in HOLDING)
        survived = next((r.survived for r in self.rules if isinstance(r, NewMaximum)), None)
        return WatchdogState(verdict=self.verdict, holds=holds, recent=tuple(self._recent),
                             latched=self.latched is not None, collapsed=self.collapsed,
                             survived_max_current=survived, seq=self.seq)

    # ------------------------------------------------------------------ operator
    def tighten(self, param: str, value: float, rule: Optional[str] = None) -> Limits:
        """Move ``param`` to ``value`` if that is at least as strict; raise RefusedError
        otherwise (unknown name, NaN, or a loosening). Returns the new Limits."""
        if param not in PARAMS:
            raise RefusedError(f"no watchdog parameter named {param!r}")
        if rule is not None and rule != PARAMS[param].rule and not any(
                r.name == rule and param in r.params for r in RULES):
            raise RefusedError(f"rule {rule!r} does not read {param!r}")
        value = float(value)
        if not math.isfinite(value):
            raise RefusedError(f"{param}: {value!r} is not a number")
        if not self.limits.is_tighter(param, value):
            p = PARAMS[param]
            raise RefusedError(
                f"{param}: {value:g} {p.unit} would loosen it (now {self.limits.values[param]:g} "
                f"{p.unit}; only {p.tighter} values are stricter)")
        self.limits = self.limits.replace(**{param: value})
        for r in self.rules:
            r.lim = self.limits
        return self.limits


def judge_stream(samples: Iterable[Sample], limits: Limits,
                 contexts: Optional[Callable[[Sample], Context]] = None,
                 survived_max_current: Optional[float] = None,
                 rules: Optional[Iterable[str]] = None):
    """Judge a whole stream offline: returns (verdicts, events, watchdog)."""
    wd = Watchdog(limits, survived_max_current, rules=rules)
    out = []
    for s in samples:
        out.append(wd.judge(s, contexts(s) if contexts else None))
    return out, wd.events(), wd
