"""Values exchanged with the instrument roles, and the role interfaces.

Every value is SI (V, A, Pa, s). Implementations: ``drivers.supply.ScpiSupply``,
``drivers.ammeter.ScpiAmmeter``, ``drivers.gauge.AsciiGauge``,
``drivers.interlock.LineInterlock``; build them with ``drivers.open_instrument``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import List, Optional, Tuple

OVERFLOW = "overflow"
OVERFLOW_NEGATIVE = "overflow-negative"
INVALID = "invalid"


@dataclass(frozen=True)
class Identity:
    """``*IDN?`` split into its four fields (IEEE 488.2 §10.14, from memory)."""

    maker: str
    model: str
    serial: str
    firmware: str
    raw: str
    simulated: bool


@dataclass(frozen=True)
class SupplyState:
    output_on: bool
    cc: bool
    tripped: bool
    interlock_open: Optional[bool]
    raw: dict


@dataclass(frozen=True)
class CurrentReading:
    """One ammeter reading. ``value`` is NaN when ``flag`` is set (never a fake number)."""

    value: float
    range_a: float
    flag: Optional[str]
    t: float


@dataclass(frozen=True)
class PressureReading:
    """``pa`` is NaN unless ``state`` is "ok" or "under-range" (then an upper bound)."""

    pa: float
    state: str
    t: float


@dataclass(frozen=True)
class SafeOffReport:
    """What ``safe_off()`` did. ``steps`` are (step, ok, detail) in the order tried."""

    instrument: str
    confirmed: bool
    voltage_v: float
    output_on: Optional[bool]
    steps: Tuple[Tuple[str, bool, str], ...]
    escalated: bool
    t: float


@dataclass(frozen=True)
class ArmReport:
    """What ``arm()`` programmed and read back, in order."""

    instrument: str
    identity: Identity
    v_ovp: float
    i_limit: float
    comm_timeout_s: Optional[float]
    steps: Tuple[Tuple[str, str], ...] = field(default=())


class Supply:
    """High-voltage supply role (interface)."""

    latched: bool

    def identify(self) -> Identity: raise NotImplementedError  # noqa: E704
    def arm(self, v_ovp: float, i_limit: float, comm_timeout_s: Optional[float] = None,
            near_zero_v: Optional[float] = None) -> ArmReport: raise NotImplementedError  # noqa: E704
    def set_voltage(self, v: float) -> None: raise NotImplementedError  # noqa: E704
    def set_current_limit(self, a: float) -> None: raise NotImplementedError  # noqa: E704
    def set_ovp(self, v: float) -> None: raise NotImplementedError  # noqa: E704
    def output(self, on: bool) -> None: raise NotImplementedError  # noqa: E704
    def measure_voltage(self) -> float: raise NotImplementedError  # noqa: E704
    def measure_current(self) -> float: raise NotImplementedError  # noqa: E704
    def state(self) -> SupplyState: raise NotImplementedError  # noqa: E704
    def safe_off(self) -> SafeOffReport: raise NotImplementedError  # noqa: E704
    def abort(self) -> None: raise NotImplementedError  # noqa: E704
    def close(self) -> None: raise NotImplementedError  # noqa: E704


class Ammeter:
    """Picoammeter role (interface)."""

    def identify(self) -> Identity: raise NotImplementedError  # noqa: E704
    def configure(self, range_a: Optional[float] = None, nplc: float = 1.0,
                  line_hz: float = 50.0) -> None: raise NotImplementedError  # noqa: E704
    def verify_config(self) -> dict: raise NotImplementedError  # noqa: E704
    def read(self) -> CurrentReading: raise NotImplementedError  # noqa: E704
    def read_burst(self, n: int) -> List[CurrentReading]: raise NotImplementedError  # noqa: E704


class Gauge:
    """Vacuum gauge role (interface)."""

    def read(self) -> PressureReading: raise NotImplementedError  # noqa: E704


class Interlock:
    """Digital interlock lines (interface)."""

    def chain_closed(self) -> bool: raise NotImplementedError  # noqa: E704
    def heartbeat(self) -> None: raise NotImplementedError  # noqa: E704
    def inhibit(self, on: bool) -> None: raise NotImplementedError  # noqa: E704


def hardware_limits(peak_v: float, ceiling_a: float, rig_max_v: float, rig_max_a: float,
                    current_factor: float = 1.3, ovp_margin: float = 0.05,
                    ovp_margin_min_v: float = 10.0) -> Tuple[float, float]:
    """The supply's hardware limits for a plan, as ``(v_ovp, i_limit)`` for ``arm()``.

    * current limit = ``current_factor`` x the software current ceiling, the factor
      between 1.2 and 1.5, so the software rule acts before the supply goes into
      constant-current mode; never above the rig's maximum current;
    * over-voltage limit just above the plan's peak (``ovp_margin`` of it, at least
      ``ovp_margin_min_v``), never above the rig's maximum voltage.

    Raises ``ValueError`` (a plan or rig mistake) when the factor is outside 1.2..1.5 or
    the plan itself exceeds the rig.
    """
    if not 1.2 <= current_factor <= 1.5:
        raise ValueError(f"current limit factor {current_factor} outside 1.2..1.5")
    if not (peak_v >= 0 and ceiling_a > 0 and rig_max_v > 0 and rig_max_a > 0):
        raise ValueError("peak, ceiling and rig maxima must be positive")
    if peak_v > rig_max_v:
        raise ValueError(f"plan peak {peak_v:g} V exceeds the rig's maximum {rig_max_v:g} V")
    if ceiling_a > rig_max_a:
        raise ValueError(f"current ceiling {ceiling_a:g} A exceeds the rig's maximum {rig_max_a:g} A")
    v_ovp = min(peak_v + max(ovp_margin * peak_v, ovp_margin_min_v), rig_max_v)
    i_limit = min(current_factor * ceiling_a, rig_max_a)
    return v_ovp, i_limit
