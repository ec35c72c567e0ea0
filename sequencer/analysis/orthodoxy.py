"""Forbes's field-emission orthodoxy test.

R.G. Forbes, "Development of a simple quantitative test for lack of field emission
orthodoxy", Proc. R. Soc. A 469 (2013) 20130271. From the slope S_fit of a straight line
on a Fowler–Nordheim plot, the scaled barrier field at a point of the plot with abscissa
X = 1/V is

    f_extr = - s_t eta(phi) / (S_fit X)                        (Forbes 2013)

with eta(phi) = b c_S^2 / phi^(1/2) (physics.eta) and s_t = 0.95, the fixed "typical"
slope correction factor of the published test. (It follows from zeta = -S/(s b phi^(3/2))
and f = c_S^2 V / (phi^2 zeta).) Applied at the two ends of the fitted range it gives
f_low (lowest voltage, largest X) and f_high.

The published range limits, for phi = 4.50 eV (from memory: quoted here as we remember
Forbes 2013's table; check against the paper before relying on the exact digits):

    apparently reasonable   0.15 <= f <= 0.45   (both ends inside)
    clearly unreasonable    f_low < 0.10 or f_high > 0.75
    in between              anything else: the test is inconclusive

Other work functions: the limits are published as scaled fields, which already carry the
main dependence on phi; we apply the same f limits at any phi and say so in the result
(our assumption, flagged in every verdict made with phi != 4.50 eV).

Other plot forms, as later published by Forbes and co-workers (R.G. Forbes, Appl. Phys.
Lett. 114 (2019) 123101 for the MG plot): the same relation f = -s eta / (S X) with the
form's own slope correction, s = 1 for the MG plot (exact by construction) and, for the
Millikan–Lauritsen plot, s = s_ML(f) = 1 - f/6 + 2f/eta solved self-consistently
(physics.form_slope_correction with kappa = 0; our derivation, not a published table).
"""
from __future__ import annotations

from dataclasses import dataclass

from .. import physics

S_T = 0.95
PHI_OF_LIMITS = 4.50
REASONABLE = (0.15, 0.45)
UNREASONABLE_BELOW = 0.10
UNREASONABLE_ABOVE = 0.75
LIMITS_SOURCE = ("Forbes 2013, Proc. R. Soc. A 469, 20130271, limits for phi = 4.50 eV "
                 "(from memory)")

VERDICT_OK = "apparently reasonable"
VERDICT_BAD = "clearly unreasonable"
VERDICT_MID = "in between"


def extracted_scaled_field(slope: float, X: float, phi: float, form: str = "FN") -> float:
    """f_extr = -s eta(phi) / (slope X) (module docstring) for the plot form's s."""
    et = float(physics.eta(phi))
    if form == "FN":
        return -S_T * et / (slope * X)
    if form == "MG":
        return -et / (slope * X)
    if form == "ML":
        f = -et / (slope * X)
        for _ in range(60):
            new = -float(physics.form_slope_correction(f, phi, 0.0)) * et / (slope * X)
            if abs(new - f) < 1e-14:
                break
            f = new
        return f
    raise ValueError(f"unknown plot form {form!r}")


@dataclass(frozen=True)
class Orthodoxy:
    form: str
    phi: float
    f_low: float
    f_high: float
    verdict: str
    note: str

    def as_dict(self) -> dict:
        return dict(self.__dict__)


def judge(f_low: float, f_high: float) -> str:
    """Verdict from the two extracted scaled fields (limits in the module docstring)."""
    if not (f_low == f_low and f_high == f_high):       # NaN
        return VERDICT_BAD
    lo, hi = min(f_low, f_high), max(f_low, f_high)
    if lo < UNREASONABLE_BELOW or hi > UNREASONABLE_ABOVE:
        return VERDICT_BAD
    if REASONABLE[0] <= lo and hi <= REASONABLE[1]:
        return VERDICT_OK
    return VERDICT_MID


def check_segment(slope: float, x_min: float, x_max: float, phi: float, form: str = "FN") -> Orthodoxy:
    """The orthodoxy test on one fitted segment with abscissa range [x_min, x_max]."""
    if not slope < 0:
        return Orthodoxy(form, phi, float("nan"), float("nan"), VERDICT_BAD,
                         "the slope is not negative: this is not field emission of the "
                         "orthodox kind")
    f_low = extracted_scaled_field(slope, x_max, phi, form)
    f_high = extracted_scaled_field(slope, x_min, phi, form)
    note = (f"f from {f_low:.3f} to {f_high:.3f}; limits "
            f"{REASONABLE[0]:.2f}-{REASONABLE[1]:.2f} reasonable, <{UNREASONABLE_BELOW:.2f} or "
            f">{UNREASONABLE_ABOVE:.2f} unreasonable ({LIMITS_SOURCE})")
    if abs(phi - PHI_OF_LIMITS) > 1e-9:
        note += f"; applied at phi = {phi:g} eV as scaled-field limits (our assumption)"
    return Orthodoxy(form, float(phi), float(f_low), float(f_high), judge(f_low, f_high), note)


