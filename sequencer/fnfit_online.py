"""An incremental Fowler–Nordheim fit with forgetting, and a robust residual scale.

The Fowler–Nordheim form I = A V^2 exp(-B/V) is a straight line in FN coordinates,
ln(I/V^2) = a + b (1/V) with b = -B (Fowler & Nordheim, Proc. R. Soc. Lond. A 119 (1928)
173; the "FN plot" of the trade). The watchdog detrends ln I against this line so that a
spike is judged against what the cathode is expected to emit at the present voltage, not
against the raw current, which rises steeply on every ramp.

``FNFit`` is an immutable value: ``add(t, v, i)`` returns a new fit. Points are weighted by
exp(-(t_now - t_k) / memory_s) in sample time, so the fit follows a cathode that conditions
over minutes. The weighted means and central sums are updated in the numerically stable
incremental form (West, Commun. ACM 22 (1979) 532, weighted Welford update), so a fit at
nearly constant voltage does not lose its digits to cancellation.

At constant voltage the slope is undefined (no spread in 1/V); the fit then keeps the last
slope it could determine and detrends against the weighted mean, which is what a dwell
needs. The robust sigma is 1.4826 x the median absolute deviation of recent residuals
(the factor makes MAD consistent with a normal sigma; Rousseeuw & Croux, J. Am. Stat. Assoc.
88 (1993) 1273), floored at ``SIGMA_FLOOR`` so a noiseless stream does not call every tiny
step a spike.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Optional, Tuple

MEMORY_S = 60.0
"""Forgetting time of the fit in sample time (s). Common practice, no source: long enough
to average a minute of noise, short enough to follow conditioning."""

MIN_WEIGHT = 5.0
"""Effective number of points before the fit predicts anything."""

MIN_REL_SPREAD = 2e-3
"""Relative spread of 1/V (std/mean) below which the slope is not re-estimated."""

MAD_COUNT = 31
"""Number of recent residuals the robust sigma is taken over."""

MIN_RESIDUALS = 5
"""Residuals needed before the robust sigma is trusted."""

SIGMA_FLOOR = 0.01
"""Smallest robust sigma of ln I (1 % of the current). Common practice, no source: about
the reading-to-reading scatter of an electrometer on a suitable range."""

MAD_TO_SIGMA = 1.4826

MODEL_REL = 0.25
"""Relative uncertainty of the fit's prediction of how ln I changes when the voltage
changes (common practice, no source): a conditioning fibre's FN slope drifts by tens of
percent within the fit's memory, so the change predicted across a voltage step is trusted
to about a quarter of itself (a 10 % spike on a 5 V-per-sample ramp near 1.4 kV is still
called). It widens the scale a reading is judged on by
MODEL_REL x |predicted change since the last learned voltage|: a step of a stepped ramp or
a condition step is not a spike, while a jump at constant voltage is judged on the noise
alone."""

LEVEL_SHIFT_SAMPLES = 3
"""Consecutive spike readings at constant voltage after which the detrender accepts the
new level (an emitter activated or burned and the current stays there): longer than an
arc burst lasts at a sample period of a fraction of a second to seconds. Common practice,
no source. The level change itself is the ``step_up`` and ``collapse`` rules' business."""


def ln_or_nan(x: float) -> float:
    """ln x for a finite positive x, else NaN (never raises)."""
    if isinstance(x, (int, float)) and math.isfinite(x) and x > 0.0:
        return math.log(x)
    return math.nan


@dataclass(frozen=True)
class FNFit:
    """Weighted, forgetting least-squares line ln(I/V^2) = a + b/V."""

    memory_s: float = MEMORY_S
    t_last: float = math.nan
    w: float = 0.0            # total weight
    mx: float = 0.0           # weighted mean of x = 1/V
    my: float = 0.0           # weighted mean of y = ln(I/V^2)
    cxx: float = 0.0          # weighted central sums
    cxy: float = 0.0
    slope: Optional[float] = None   # last well-determined b (V)
    v_last: float = math.nan        # voltage of the last point added

    def add(self, t: float, v: float, i: float) -> "FNFit":
        """The fit with the point (V, I) at sample time ``t`` added; unchanged for an
        unusable point (V or I not finite and positive, t not finite)."""
        y = ln_or_nan(i) - 2.0 * ln_or_nan(v)
        if not (math.isfinite(y) and math.isfinite(t)):
            return self
        x = 1.0 / v
        decay = 1.0
        if math.isfinite(self.t_last) and t > self.t_last and self.memory_s > 0:
            decay = math.exp(-(t - self.t_last) / self.memory_s)
        w0, cxx, cxy = self.w * decay, self.cxx * decay, self.cxy * decay
        w = w0 + 1.0
        dx, dy = x - self.mx, y - self.my
        mx = self.mx + dx / w
        my = self.my + dy / w
        cxx += dx * (x - mx)
        cxy += dx * (y - my)
        slope = self.slope
        var_x = cxx / w
        if var_x > 0 and mx > 0 and math.sqrt(var_x) / mx >= MIN_REL_SPREAD and w >= MIN_WEIGHT:
            slope = cxy / cxx
        t_last = t if not math.isfinite(self.t_last) else max(t, self.t_last)
        return replace(self, t_last=t_last, w=w, mx=mx, my=my, cxx=cxx, cxy=cxy, slope=slope,
                       v_last=v)

    @property
    def ready(self) -> bool:
        return self.w >= MIN_WEIGHT

    def predict_ln_i(self, v: float) -> float:
        """Expected ln I at voltage ``v`` (NaN until ready)."""
        lv = ln_or_nan(v)
        if not (self.ready and math.isfinite(lv)):
            return math.nan
        b = self.slope if self.slope is not None else 0.0
        return self.my + b * (1.0 / v - self.mx) + 2.0 * lv

    def dlni_dv(self, v: float) -> float:
        """Local FN slope d ln I / dV = 2/V - b/V^2 (from I = A V^2 exp(b/V)); NaN when
        the slope is not known."""
        if self.slope is None or not (math.isfinite(v) and v > 0):
            return math.nan
        return 2.0 / v - self.slope / (v * v)


@dataclass(frozen=True)
class Residuals:
    """The last ``MAD_COUNT`` residuals and their robust sigma."""

    values: Tuple[float, ...] = ()

    def add(self, r: float) -> "Residuals":
        if not math.isfinite(r):
            return self
        return Residuals((self.values + (r,))[-MAD_COUNT:])

    @property
    def sigma(self) -> float:
        """1.4826 * MAD, floored at SIGMA_FLOOR; NaN with too few residuals."""
        if len(self.values) < MIN_RESIDUALS:
            return math.nan
        return max(robust_sigma(self.values), SIGMA_FLOOR)


def median(xs) -> float:
    s = sorted(xs)
    n = len(s)
    m = n // 2
    return s[m] if n % 2 else 0.5 * (s[m - 1] + s[m])


def robust_sigma(xs) -> float:
    """1.4826 x the median absolute deviation of ``xs`` (0 for fewer than one value)."""
    if not xs:
        return 0.0
    med = median(xs)
    return MAD_TO_SIGMA * median([abs(x - med) for x in xs])


@dataclass(frozen=True)
class Judged:
    """What the detrender says about one current reading."""

    ln_i: float
    expected: float      # predicted ln I (NaN until the fit is ready)
    residual: float      # ln_i - expected
    sigma: float         # robust sigma before this reading
    z: float             # residual / sigma (NaN when unknown)


@dataclass(frozen=True)
class Detrender:
    """FN fit + residual scale; ``judge`` scores a reading against the past, then
    ``learn`` adds it (callers skip ``learn`` for a spike, so spikes do not bend the fit)."""

    fit: FNFit = FNFit()
    residuals: Residuals = Residuals()

    def judge(self, v: float, i: float) -> Judged:
        ln_i = ln_or_nan(i)
        expected = self.fit.predict_ln_i(v)
        r = ln_i - expected
        sigma = self.residuals.sigma
        before = self.fit.predict_ln_i(self.fit.v_last)
        if self.fit.slope is None and math.isfinite(self.fit.v_last) and \
                abs(v - self.fit.v_last) > 1e-6 * abs(self.fit.v_last):
            # no FN slope known yet (only one voltage seen): nothing can be predicted at
            # another voltage, so a reading there cannot be called a spike; learning it
            # gives the fit the spread it needs for a slope
            expected = math.nan
            r = math.nan
        elif math.isfinite(sigma) and math.isfinite(before) and math.isfinite(expected):
            sigma = math.hypot(sigma, MODEL_REL * (expected - before))
        z = r / sigma if (math.isfinite(r) and math.isfinite(sigma)) else math.nan
        return Judged(ln_i, expected, r, sigma, z)

    def learn(self, t: float, v: float, i: float, judged: Judged) -> "Detrender":
        return Detrender(self.fit.add(t, v, i), self.residuals.add(judged.residual))

    def rebase(self, t: float, v: float, i: float) -> "Detrender":
        """Accept a new current level at ``v``: the fit restarts from this point keeping
        its slope (the level moved, the FN slope did not), the residual scale is kept.
        It predicts again after ``MIN_WEIGHT`` points."""
        fresh = FNFit(memory_s=self.fit.memory_s, slope=self.fit.slope)
        return Detrender(fresh.add(t, v, i), self.residuals)
