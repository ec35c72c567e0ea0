"""The simulated carbon-nanotube fibre cathode: an ensemble of emitters on a fibre facing a
flat anode, advanced sample by sample.

``CathodeParams`` is the frozen parameter set (built from the rig file's ``simulation:
cathode:`` mapping, every key documented in ``PARAMS``); ``FITTABLE`` names the ones a user
can fit from I–V data, the rest only shape the model. ``Cathode(params, rng)`` holds the
state (emitter geometry, tip temperatures, adsorbate coverage, contact temperature, noise)
and ``emit(v_supply, t, pressure_pa)`` returns the current at time t.

Speed: the emission current is a steep function of each emitter's field, so at any voltage
only a few emitters matter. The enhancement factors are kept sorted; the active set (the
emitters whose current can reach 1e-6 of the largest one) is chosen from a bound on the
sorted list and recomputed only when the voltage has moved, an emitter changed or some
simulated seconds have passed. Everything per sample is vectorised over the active set;
inactive emitters are at the fibre temperature and their adsorbate coverage is brought up
to date lazily (exactly, Langmuir kinetics being linear). All equations are in
``simulators.equations`` and ``sequencer.physics``.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping

import numpy as np

from sequencer import physics as P
from simulators import equations as EQ


class CathodeParamError(ValueError):
    """A bad ``simulation: cathode:`` entry (one clear line for the user)."""


# name, default, unit, fittable, doc
PARAMS: tuple[tuple[str, Any, str, bool, str], ...] = (
    ("emitters", 10000, "", False, "number of emitters in the ensemble (1e3 to 1e5)"),
    ("end_fraction", 0.3, "", False, "share of the emitters on the fibre's rounded end (the rest on its sides)"),
    ("fibre_radius_m", 50e-6, "m", False, "fibre radius"),
    ("side_length_m", 1e-3, "m", False, "length of fibre side (behind the end) that carries emitters"),
    ("gap_m", 500e-6, "m", False, "distance fibre end to flat anode"),
    ("neighbour_density_m2", 1e10, "1/m^2", False, "areal density of the nanotube forest around each emitter (sets the screening spacing)"),
    ("height_median_m", 2e-6, "m", True, "median emitter height (enhancement-factor distribution)"),
    ("height_sigma", 0.6, "", True, "log-normal sigma of emitter heights (enhancement-factor distribution)"),
    ("radius_median_m", 5e-9, "m", True, "median emitter tip radius (enhancement-factor distribution)"),
    ("radius_sigma", 0.25, "", True, "log-normal sigma of tip radii (enhancement-factor distribution)"),
    ("area_scale", 1.0, "", True, "effective emission area as a multiple of pi r^2"),
    ("noise_level", 0.03, "", True, "rms of the multiplicative 1/f flicker (natural-log units)"),
    ("burst_rate_hz", 0.05, "1/s", True, "ion-induced emitter changes per second at 10 uA and 1e-5 Pa (scales with current x pressure)"),
    ("work_function_ev", 4.8, "eV", False, "clean work function"),
    ("adsorbate_shift_ev", -0.7, "eV", False, "work-function change at full adsorbate coverage (0 switches adsorbates off)"),
    ("initial_coverage", 0.9, "", False, "adsorbate coverage at the start (0..1)"),
    ("desorption_energy_ev", 0.95, "eV", False, "adsorbate desorption activation energy"),
    ("desorption_prefactor_hz", 1e13, "1/s", False, "attempt frequency of desorption"),
    ("site_density_m2", 1e19, "1/m^2", False, "adsorption sites per area"),
    ("gas", {"H2O": 0.65, "H2": 0.25, "CO": 0.10}, "", False, "residual-gas composition (fractions of the total pressure)"),
    ("sticking", {"H2O": 0.5, "H2": 0.01, "CO": 0.1, "O2": 0.1, "CO2": 0.05, "N2": 0.01, "CH4": 0.01, "Ar": 0.0, "He": 0.0}, "", False, "sticking coefficient by species"),
    ("gas_temperature_k", 295.0, "K", False, "residual-gas and room temperature"),
    ("resistivity_ohm_m", 3e-7, "ohm m", False, "emitter resistivity at room temperature"),
    ("resistivity_tcr_per_k", 3e-4, "1/K", False, "temperature coefficient of emitter resistivity"),
    ("thermal_conductivity_w_mk", 300.0, "W/(m K)", False, "emitter thermal conductivity"),
    ("emissivity", 0.8, "", False, "emitter emissivity (radiation loss)"),
    ("sublimation_temperature_k", 2800.0, "K", False, "failure temperature in clean vacuum"),
    ("oxidation_temperature_k", 900.0, "K", False, "failure temperature in a strongly oxidising gas"),
    ("oxidation_half_pressure_pa", 1e-3, "Pa", False, "oxidising partial pressure halfway between the two"),
    ("space_charge_length_radii", 1.0, "", False, "length of the local planar diode at each apex, in tip radii"),
    ("burst_gain", 2.0, "", False, "extra current in the sample an emitter burns, as a multiple of its current"),
    ("activation_probability", 0.5, "", False, "share of ion hits that sharpen an emitter (the rest blunt it)"),
    ("series_resistance_ohm", 1e5, "ohm", False, "ballast and lead resistance in series with the gap"),
    ("fibre_resistance_ohm", 50.0, "ohm", False, "fibre resistance (heats the contact)"),
    ("contact_resistance_ohm", 200.0, "ohm", False, "fibre-to-holder contact resistance"),
    ("contact_conductance_w_k", 5e-4, "W/K", False, "heat loss of the contact node"),
    ("contact_time_constant_s", 5.0, "s", False, "thermal time constant of the contact"),
    ("contact_melting_k", 456.0, "K", False, "contact melting point (Sn-Pb eutectic solder, 183 C, from memory); above it the fibre is lost"),
    ("noise_corners_hz", [1e-3, 5.0], "Hz", False, "band of the 1/f flicker"),
    ("noise_poles", 6, "", False, "number of AR(1) processes summed for the flicker"),
    ("reselect_s", 10.0, "s", False, "longest simulated time between choices of the active emitters"),
    ("single_tip", None, "", False, "validation mode: {beta, gap_m, work_function_ev, area_m2, exact}; no ensemble, fibre or noise"),
)
FITTABLE: tuple[str, ...] = tuple(p[0] for p in PARAMS if p[3])
_DEFAULTS = {p[0]: p[1] for p in PARAMS}
_SINGLE_TIP_KEYS = {"beta": 1000.0, "gap_m": 500e-6, "work_function_ev": 4.5, "area_m2": 1e-16, "exact": True}


@dataclass(frozen=True)
class CathodeParams:
    """Frozen cathode parameters. Build with ``CathodeParams.from_dict(mapping)``; unknown
    keys and bad values raise ``CathodeParamError`` with one line naming the key."""
    values: Mapping[str, Any] = field(default_factory=lambda: MappingProxyType(dict(_DEFAULTS)))

    @classmethod
    def from_dict(cls, d: Mapping[str, Any] | None = None) -> "CathodeParams":
        d = dict(d or {})
        unknown = sorted(set(d) - set(_DEFAULTS))
        if unknown:
            raise CathodeParamError(f"simulation.cathode: unknown key {unknown[0]!r} "
                                    f"(known: {', '.join(sorted(_DEFAULTS))})")
        vals = dict(_DEFAULTS)
        for k, v in d.items():
            default = _DEFAULTS[k]
            if k == "single_tip":
                vals[k] = cls._single_tip(v)
            elif isinstance(default, dict):
                if not isinstance(v, Mapping):
                    raise CathodeParamError(f"simulation.cathode.{k}: expected a mapping")
                bad = [s for s in v if s not in EQ.MOLAR_MASS_G]
                if bad:
                    raise CathodeParamError(f"simulation.cathode.{k}: unknown gas {bad[0]!r} "
                                            f"(known: {', '.join(EQ.MOLAR_MASS_G)})")
                vals[k] = {str(s): float(x) for s, x in v.items()}
            elif isinstance(default, list):
                try:
                    vals[k] = [float(x) for x in v]
                except (TypeError, ValueError):
                    raise CathodeParamError(f"simulation.cathode.{k}: expected a list of numbers") from None
            else:
                try:
                    x = float(v)
                except (TypeError, ValueError):
                    raise CathodeParamError(f"simulation.cathode.{k}: expected a number, got {v!r}") from None
                if not math.isfinite(x):
                    raise CathodeParamError(f"simulation.cathode.{k}: must be finite")
                vals[k] = int(x) if isinstance(default, int) else x
        p = cls(values=MappingProxyType(vals))
        p._check()
        return p

    @staticmethod
    def _single_tip(v):
        if v is None or v is False:
            return None
        if v is True:
            v = {}
        if not isinstance(v, Mapping):
            raise CathodeParamError("simulation.cathode.single_tip: expected a mapping or true")
        bad = sorted(set(v) - set(_SINGLE_TIP_KEYS))
        if bad:
            raise CathodeParamError(f"simulation.cathode.single_tip: unknown key {bad[0]!r}")
        out = dict(_SINGLE_TIP_KEYS)
        out.update({k: (bool(x) if k == "exact" else float(x)) for k, x in v.items()})
        return out

    def _check(self):
        v = self.values
        positive = ("fibre_radius_m", "neighbour_density_m2", "side_length_m", "gap_m", "height_median_m", "radius_median_m",
                    "area_scale", "work_function_ev", "desorption_prefactor_hz", "site_density_m2",
                    "gas_temperature_k", "resistivity_ohm_m", "thermal_conductivity_w_mk",
                    "sublimation_temperature_k", "oxidation_temperature_k", "oxidation_half_pressure_pa",
                    "space_charge_length_radii", "contact_conductance_w_k", "contact_time_constant_s",
                    "contact_melting_k", "reselect_s")
        for k in positive:
            if not v[k] > 0:
                raise CathodeParamError(f"simulation.cathode.{k}: must be > 0, got {v[k]!r}")
        nonneg = ("height_sigma", "radius_sigma", "noise_level", "burst_rate_hz", "burst_gain",
                  "series_resistance_ohm", "fibre_resistance_ohm", "contact_resistance_ohm", "emissivity")
        for k in nonneg:
            if not v[k] >= 0:
                raise CathodeParamError(f"simulation.cathode.{k}: must be >= 0, got {v[k]!r}")
        for k in ("end_fraction", "initial_coverage", "activation_probability"):
            if not 0 <= v[k] <= 1:
                raise CathodeParamError(f"simulation.cathode.{k}: must be between 0 and 1, got {v[k]!r}")
        if not 1 <= v["emitters"] <= 1_000_000:
            raise CathodeParamError("simulation.cathode.emitters: must be between 1 and 1e6")
        if v["work_function_ev"] + v["adsorbate_shift_ev"] <= 1.0:
            raise CathodeParamError("simulation.cathode.adsorbate_shift_ev: leaves a work function below 1 eV")
        lo_hi = v["noise_corners_hz"]
        if len(lo_hi) != 2 or not 0 < lo_hi[0] < lo_hi[1]:
            raise CathodeParamError("simulation.cathode.noise_corners_hz: expected [low, high] with 0 < low < high")
        if v["noise_poles"] < 1:
            raise CathodeParamError("simulation.cathode.noise_poles: must be >= 1")

    def __getattr__(self, name):
        try:
            return self.__dict__["values"][name]
        except KeyError:
            raise AttributeError(name) from None

    def fitted(self) -> dict:
        """The user-fittable subset, by name."""
        return {k: self.values[k] for k in FITTABLE}


# references for the ion-hit rate (burst_rate_hz is given at these)
_I_REF = 1e-5
_P_REF = 1e-5
_SELECT_DROP = math.log(1e6)   # skip emitters below 1e-6 of the largest
_SELECT_MARGIN = 1.5           # extra e-folds kept, for the voltage drift allowed before reselection
_RESELECT_DV = 0.02            # reselect when the voltage moved by 2 %
_MAX_HITS_PER_SAMPLE = 20      # ion events per call at most (a storm drops the rest)
_R_MIN = 0.4e-9                # smallest tip radius an ion hit can leave


def _mg_scaled(F, c1, bphi, pre):
    """Murphy–Good with Forbes's 2006 v(f) and t(f), inlined from
    sequencer.physics.murphy_good_j for speed, with per-emitter constants c1 = c_S^2/phi^2,
    bphi = b phi^(3/2) and prefactor pre (a/phi x area x thermal factor): returns
    (pre F^2/t^2 exp(-v bphi/F), t, d ln J / d ln F ~= 2 + s(f) bphi / F, s = 1 - f/6).
    f is clipped at 1 (the barrier vanishes), as in sequencer.physics."""
    f = np.minimum(c1 * F, 1.0)
    lf = np.log(f)
    v = 1.0 - f + f * lf / 6.0
    tt = 1.0 + f / 9.0 - f * lf / 18.0
    return pre * np.square(F / tt) * np.exp(-v * bphi / F), tt, 2.0 + (1.0 - f / 6.0) * bphi / F


class Cathode:
    """The simulated fibre cathode. ``emit(v_supply, t, pressure_pa)`` returns the current
    (A) at time t, advancing the state from the previous call. Attributes: ``lost`` (the
    fibre is gone and emits nothing), ``events`` (list of (t, kind, detail)),
    ``contact_temperature`` (K), ``gap_voltage`` (V, last sample), ``active_count``."""

    def __init__(self, params: CathodeParams | Mapping | None = None, rng: np.random.Generator | None = None):
        if not isinstance(params, CathodeParams):
            params = CathodeParams.from_dict(params)
        self.params = params
        self.rng = rng if rng is not None else np.random.default_rng(0)
        self.lost = False
        self.events: list[tuple[float, str, dict]] = []
        self.gap_voltage = 0.0
        self.active_count = 0
        self._t = None
        p = params
        self.contact_temperature = p.gas_temperature_k
        self._single = p.single_tip
        if self._single is not None:
            return
        self._build_ensemble()
        taus_lo, taus_hi = 1.0 / (2 * np.pi * p.noise_corners_hz[1]), 1.0 / (2 * np.pi * p.noise_corners_hz[0])
        n = int(p.noise_poles)
        self._taus = np.geomspace(taus_lo, taus_hi, n) if n > 1 else np.array([taus_hi])
        self._x = self.rng.standard_normal(n)
        self._noise_dt = None
        self._hit_budget = self.rng.exponential()
        self._R = p.series_resistance_ohm + p.fibre_resistance_ohm + p.contact_resistance_ohm
        self._k_ads_per_pa = float(EQ.adsorption_rate(1.0, p.gas, p.sticking, p.gas_temperature_k, p.site_density_m2))
        self._ox_fraction = sum(f for sp, f in p.gas.items() if sp in EQ.OXIDISING)
        self._k_ads = 0.0
        self._active = np.zeros(0, dtype=np.intp)
        self._v_sel = None
        self._t_sel = -math.inf
        self._dirty = True
        self._last_current = 0.0
        self._version = 0
        self._solved = None
        self._solved_v = None
        self._solved_version = -1
        self._heat_Tb = -1.0
        self._kdes_active = None
        self._kdes_max = 0.0
        self._T_max = 0.0
        self._cov_dt = 0.0
        self._dF = np.zeros(0)
        self._theta_solved = np.zeros(0)
        self._adsorbates = p.adsorbate_shift_ev != 0
        self._burst_rate = p.burst_rate_hz
        self._reselect_s = p.reselect_s
        self._r_contact_total = p.fibre_resistance_ohm + p.contact_resistance_ohm

    # ---------------------------------------------------------------- ensemble
    def _build_ensemble(self):
        p, rng = self.params, self.rng
        N = int(p.emitters)
        n_end = int(round(N * p.end_fraction))
        R = p.fibre_radius_m
        on_end = np.arange(N) < n_end
        u = rng.random(N)
        # setback behind the fibre apex: uniform in height on the hemispherical cap
        # (equal areas, Archimedes), uniform along the side
        self.setback = np.where(on_end, R * u, R + p.side_length_m * u)
        self.spacing = EQ.nearest_neighbour_spacing(1.0 - rng.random(N), p.neighbour_density_m2)
        self.r = p.radius_median_m * np.exp(p.radius_sigma * rng.standard_normal(N))
        self.h = np.maximum(p.height_median_m * np.exp(p.height_sigma * rng.standard_normal(N)), 10 * self.r)
        self.on_end = on_end
        self.fibre_field = (EQ.hyperboloid_apex_field_per_volt(R, p.gap_m)
                            * EQ.hyperboloid_surface_field_ratio(self.setback, R, p.gap_m))
        self.alive = np.ones(N, dtype=bool)
        self.theta = np.full(N, float(p.initial_coverage))
        self._t_cov = np.zeros(N)
        self.T = np.full(N, p.gas_temperature_k)
        self._theta_sc = np.ones(N)
        self._phi_clean = p.work_function_ev
        self._recompute(np.arange(N))

    def _recompute(self, idx):
        """Enhancement (beta, 1/m: apex field per gap volt) and area of emitters ``idx``."""
        p = self.params
        if not hasattr(self, "beta"):
            N = self.h.size
            self.beta = np.zeros(N)
            self.area = np.zeros(N)
            self.cross = np.zeros(N)
        h, r = self.h[idx], self.r[idx]
        beta = self.fibre_field[idx] * EQ.post_enhancement(h, r) * EQ.screening_factor(self.spacing[idx], h)
        alive = self.alive[idx]
        self.beta[idx] = np.where(alive, beta, 0.0)
        self.area[idx] = np.where(alive, p.area_scale * np.pi * r * r, 0.0)
        self.cross[idx] = np.pi * r * r
        self._order = np.argsort(-self.beta, kind="stable")
        self._beta_sorted = self.beta[self._order]
        self._dirty = True

    @property
    def enhancement_factors(self) -> np.ndarray:
        """Dimensionless apex enhancement of each emitter relative to the planar gap field
        V/d (sorted, largest first)."""
        return self._beta_sorted * self.params.gap_m if self._single is None else np.array([self._single["beta"]])

    # ---------------------------------------------------------------- helpers
    def _phi(self, idx):
        return self._phi_clean + self.params.adsorbate_shift_ev * self.theta[idx]

    def _select(self, v, t):
        """Choose the emitters whose current at supply voltage v can reach 1e-6 of the largest."""
        self._v_sel, self._t_sel, self._dirty = v, t, False
        order, bs = self._order, self._beta_sorted
        n_alive = int(np.count_nonzero(bs > 0))
        if n_alive == 0 or v <= 0:
            self._set_active(np.zeros(0, dtype=np.intp))
            return
        top = order[:min(32, n_alive)]
        with np.errstate(divide="ignore"):
            ln_ref = float(np.max(np.log(self.area[top] * P.murphy_good_j(self.beta[top] * v, self._phi(top)))))
        if not ln_ref > math.log(1e-30):
            self._set_active(np.zeros(0, dtype=np.intp))
            return
        thr = ln_ref - _SELECT_DROP - _SELECT_MARGIN
        # bound over the sorted list: largest area, lowest work function, thermal factor <= 1.2
        phi_lo = float(np.min(self._phi(order[:n_alive]))) if self.params.adsorbate_shift_ev < 0 else self._phi_clean
        a_hi = float(np.max(self.area))
        grid = np.geomspace(bs[n_alive - 1], bs[0], 64)
        with np.errstate(divide="ignore"):
            bound = np.log(1.2 * a_hi * P.murphy_good_j(grid * v, phi_lo))
        above = np.nonzero(bound >= thr)[0]
        b_cut = grid[max(above[0] - 1, 0)] if above.size else bs[0]
        k = int(np.searchsorted(-bs[:n_alive], -b_cut, side="right"))
        cand = order[:max(k, top.size)]
        i_cand = self.area[cand] * P.murphy_good_j(self.beta[cand] * v, self._phi(cand))
        # keep what can reach 1e-6 of the total (with a margin for the drift allowed
        # before the next selection); the rest is skipped
        keep = i_cand >= float(i_cand.sum()) * math.exp(-_SELECT_DROP - _SELECT_MARGIN)
        self._set_active(cand[keep])

    def _set_active(self, new):
        old = self._active
        if old.size:
            gone = np.setdiff1d(old, new, assume_unique=True)
            if gone.size:
                self.T[gone] = self.contact_temperature
        if new.size:
            self._bring_coverage_up_to_date(new)
        self._active = new
        self.active_count = int(new.size)
        self._kdes_active = None
        self._cov_dt = 0.0
        self._version += 1

    def _bring_coverage_up_to_date(self, idx, t=None):
        """Advance the coverage of ``idx`` from its last update at the fibre temperature."""
        p = self.params
        t = self._t if t is None else t
        if t is None or p.adsorbate_shift_ev == 0:
            return
        dt = t - self._t_cov[idx]
        k_des = EQ.desorption_rate(self.contact_temperature, p.desorption_energy_ev, p.desorption_prefactor_hz)
        self.theta[idx] = EQ.coverage_step(self.theta[idx], self._k_ads, k_des, dt)
        self._t_cov[idx] = t

    # ---------------------------------------------------------------- one sample
    def emit(self, v_supply: float, t: float, pressure_pa: float) -> float:
        """Current (A) leaving the cathode at time t with the supply at ``v_supply`` (V, a
        magnitude) and the chamber at ``pressure_pa``. Advances the state from the last call.

        Work is skipped when nothing it depends on has changed: the gap solve is reused
        while the supply voltage and the emitter state (``_version``: selection, geometry,
        tip temperatures, coverage) are unchanged, the heat balance while the currents and
        the fibre temperature are, and the coverage of the active emitters is advanced in
        batches (exactly) once it can have relaxed by 1 %."""
        t = float(t)
        dt = 0.0 if self._t is None else max(t - self._t, 0.0)
        self._t = t
        v = max(float(v_supply), 0.0)
        if self._single is not None:
            return self._emit_single(v)
        if self.lost:
            self.gap_voltage = v
            return 0.0
        p = self.params
        pressure = max(float(pressure_pa), 0.0)
        self._k_ads = pressure * self._k_ads_per_pa          # Hertz–Knudsen arrival is linear in p
        T_fail = float(EQ.failure_temperature(pressure * self._ox_fraction, p.sublimation_temperature_k,
                                              p.oxidation_temperature_k, p.oxidation_half_pressure_pa))
        # ion back-bombardment: events at a rate proportional to pressure x current
        if self._burst_rate > 0 and self._last_current > 0 and dt > 0:
            self._hit_budget -= self._burst_rate * (pressure / _P_REF) * (self._last_current / _I_REF) * dt
            hit = []
            while self._hit_budget <= 0 and len(hit) < _MAX_HITS_PER_SAMPLE:
                i_hit = self._ion_hit(t)
                if i_hit is not None:
                    hit.append(i_hit)
                self._hit_budget += self.rng.exponential()
            if self._hit_budget <= 0:          # a storm: the rest of this interval is dropped
                self._hit_budget = self.rng.exponential()
            if hit:
                self._recompute(np.unique(np.array(hit)))
        if self._dirty or self._v_sel is None or t - self._t_sel >= self._reselect_s \
                or abs(v - self._v_sel) > _RESELECT_DV * max(self._v_sel, 1e-9):
            if self._adsorbates:
                self._advance_coverage(dt)
                self._bring_coverage_up_to_date(np.arange(self.h.size))
            self._select(v, t)
        elif self._adsorbates:
            self._advance_coverage(dt)
        burst = 0.0
        flick = self._flicker(dt)
        for _ in range(8):          # burns change the ensemble: solve again in the same sample
            if v != self._solved_v or self._version != self._solved_version:
                self._solved = self._solve(v)
                self._solved_v, self._solved_version = v, self._version
                fresh = True
            else:
                fresh = False
            I, I_each = self._solved[0], self._solved[1]
            if fresh or abs(self.contact_temperature - self._heat_Tb) > 0.5:
                burned = self._heat(I_each, self._solved[3], self._solved[4], dt, T_fail, flick)
            else:
                burned = self._over(T_fail, flick)
            if burned is None:
                break
            burst += self._burn(burned, I_each, t, T_fail)
            self._select(v, t)
        self._last_current = I
        # contact: I^2 (R_fibre + R_contact), first-order with a time constant of seconds
        if dt > 0:
            self.contact_temperature = float(EQ.lumped_temperature_step(
                self.contact_temperature, p.gas_temperature_k, I * I * self._r_contact_total,
                p.contact_conductance_w_k, p.contact_time_constant_s, dt))
            if self.contact_temperature > p.contact_melting_k:
                self.lost = True
                self.events.append((t, "fibre-lost", {"contact_temperature_k": self.contact_temperature,
                                                      "current_a": I}))
                self.gap_voltage = v
                self._last_current = 0.0
                return 0.0
        return (I + burst) * flick

    def _emit_single(self, v):
        s = self._single
        self.gap_voltage = v
        F = s["beta"] * v / s["gap_m"]
        return float(P.murphy_good_j(F, s["work_function_ev"], exact=s["exact"]) * s["area_m2"])

    def _currents(self, vg, beta, c1, bphi, pre):
        """Currents of the active emitters at gap voltage vg and d ln I / d ln V_g."""
        F = beta * vg
        I, tt, dlog = _mg_scaled(F, c1, bphi, pre)
        return I, F, tt, dlog

    def _solve(self, v):
        """Self-consistent gap voltage V_g = V - I(V_g) R (safeguarded Newton inside the
        bracket [0, V]; the residual V_g + I R - V is monotonic in V_g)."""
        a = self._active
        if a.size == 0 or v <= 0:
            self.gap_voltage = v
            self._dF = np.zeros(0)
            return 0.0, np.zeros(0), np.zeros(0), np.zeros(0), np.zeros(0)
        p = self.params
        self._theta_solved = self.theta[a]
        phi = self._phi(a)
        beta = self.beta[a]
        c1 = P.CS2 / (phi * phi)
        bphi = P.B_FN * phi * np.sqrt(phi)
        vg = min(self.gap_voltage, v) if self.gap_voltage > 0 else v
        # decay width (sequencer.physics.decay_width) and the Murphy–Good thermal–field
        # factor p / sin p, p = pi k T / d_F <= 0.8 (sequencer.physics.thermal_field_factor),
        # from the previous tip temperatures; inlined for speed
        F0 = beta * vg
        f0 = np.minimum(c1 * F0, 1.0)
        dF = (2.0 / 3.0) * F0 / (P.B_FN * np.sqrt(phi) * (1.0 + f0 / 9.0 - f0 * np.log(f0) / 18.0))
        self._T_used = self.T[a]          # tip temperatures the thermal factor was taken at
        pth = np.minimum(np.pi * P.K_B_EV * self._T_used / dF, 0.8)
        self._dF = dF
        pre = P.A_FN / phi * self.area[a] * (pth / np.sin(pth))
        R = self._R
        lo, hi = 0.0, v
        for _ in range(60):
            I_each, F, tt, dlog = self._currents(vg, beta, c1, bphi, pre)
            I_each = self._space_charge(I_each, F, a, beta, c1, bphi, pre)
            I = float(I_each.sum())
            r = vg + I * R - v
            if abs(r) <= 1e-5 * v or hi - lo <= 1e-12 * v:   # 1e-5 V/V: ~2e-4 in current
                break
            if r > 0:
                hi = vg
            else:
                lo = vg
            dI = float(np.dot(I_each, dlog)) / vg
            nxt = vg - r / (1.0 + R * dI)
            vg = nxt if lo < nxt < hi else 0.5 * (lo + hi)
        self.gap_voltage = vg
        return I, I_each, F, phi, tt

    def _space_charge(self, I_each, F, a, beta, c1, bphi, pre):
        """Per-emitter space charge: where it matters (J/J_CL of the local diode > 1e-5),
        replace the Laplace apex field by the self-consistent surface field of the exact
        planar relation (simulators.equations.space_charge_surface_field), warm-started
        from the emitter's last value."""
        area = self.area[a]
        L = self.params.space_charge_length_radii * self.r[a]
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = EQ.space_charge_ratio(I_each / area, F, L)
        strong = np.nonzero(ratio > 1e-5)[0]
        if strong.size == 0:
            return I_each
        ar, b_c1, b_bphi, b_pre = area[strong], c1[strong], bphi[strong], pre[strong]

        b_pre_j = b_pre / ar

        def j_and_slope(E):
            J, _, n = _mg_scaled(E, b_c1, b_bphi, b_pre_j)
            return J, n

        idx = a[strong]
        _, J, theta = EQ.space_charge_surface_field(F[strong], L[strong], j_and_slope, self._theta_sc[idx])
        self._theta_sc[idx] = theta
        out = I_each.copy()
        out[strong] = J * ar
        return out

    def _heat(self, I_each, phi, tt, dt, T_fail, flick=1.0):
        """Quasi-static tip temperatures of the active emitters (1-D fin: Joule with
        temperature-dependent resistivity, Nottingham at the apex, radiation, base at the
        fibre temperature). Returns the positions (in the active set) of emitters above
        the failure temperature, or None."""
        a = self._active
        Tb = self.contact_temperature
        self._heat_Tb = Tb
        if a.size == 0:
            return None
        p = self.params
        r, cross = self.r[a], self.cross[a]
        kA = p.thermal_conductivity_w_mk * cross
        dF = self._dF                     # decay width (eV) from _solve
        T0 = T = self.T[a]
        for _ in range(3):
            rho = EQ.resistivity(p.resistivity_ohm_m, p.resistivity_tcr_per_k, Tb + (2.0 / 3.0) * (T - Tb),
                                 p.gas_temperature_k)
            q = I_each * I_each * rho / cross
            p_tip = I_each * EQ.nottingham_energy_ev(T, dF)
            g, T_lin = EQ.radiation_linearised(np.maximum(T, Tb), p.gas_temperature_k, p.emissivity, 2 * np.pi * r)
            T_new = np.maximum(EQ.fin_tip_temperature(Tb, q, p_tip, self.h[a], kA, g, T_lin), 1.0)
            converged = float(np.max(np.abs(T_new - T))) < 5.0
            T = T_new
            if converged:
                break
        self.T[a] = T
        self._T_max = float(T.max())
        if float(np.abs(T - T0).max()) > 0.5:      # the thermal–field factor moved (by ~1e-4): solve again
            self._version += 1
            self._kdes_active = None
        return self._over(T_fail, flick)

    def _over(self, T_fail, flick=1.0):
        """Emitters above the failure temperature. The flicker modulates the emission, so
        the check uses the tip's excess temperature scaled as the Joule heat, by the square
        of the flicker factor: a hot emitter can be pushed over by a flicker peak."""
        a = self._active
        if a.size == 0:
            return None
        Tb = self.contact_temperature
        f2 = flick * flick
        if Tb + (self._T_max - Tb) * f2 <= T_fail:
            return None
        over = np.nonzero(Tb + (self.T[a] - Tb) * f2 > T_fail)[0]
        return over if over.size else None

    def _burn(self, pos, I_each, t, T_fail):
        """Emitters above the failure temperature shorten or vanish with a short burst."""
        p = self.params
        idx = self._active[pos]
        burst = 0.0
        for j, i in zip(pos, idx):
            i = int(i)
            burst += p.burst_gain * float(I_each[j])
            new_h = self.h[i] * self.rng.uniform(0.2, 0.6)
            outcome = "shortened"
            if new_h < 20 * self.r[i]:
                self.alive[i] = False
                outcome = "vanished"
            self.events.append((t, "burn", {"emitter": i, "current_a": float(I_each[j]),
                                            "temperature_k": float(self.T[i]), "failure_k": T_fail,
                                            "on_end": bool(self.on_end[i]), "outcome": outcome}))
            self.h[i] = max(new_h, 10 * self.r[i])
            self.T[i] = self.contact_temperature
        self._recompute(idx)
        return burst

    def _ion_hit(self, t):
        """An ion back-bombards an emitter chosen by its share of the current: it sharpens
        it (activation) or blunts and shortens it (degradation)."""
        a = self._active
        if a.size == 0:
            return None
        p = self.params
        cur = self._solved[1] if self._solved is not None and self._solved[1].size == a.size else np.ones(a.size)
        total = float(cur.sum())
        k = int(np.searchsorted(np.cumsum(cur), self.rng.random() * total)) if total > 0 else 0
        i = int(a[min(k, a.size - 1)])
        if self.rng.random() < p.activation_probability:
            # sharper, down to a single-walled tube's radius (~0.4 nm, common practice)
            self.r[i] = max(self.r[i] * self.rng.uniform(0.4, 0.8), _R_MIN)
            self.h[i] = max(self.h[i], 10 * self.r[i])
            kind = "sharpened"
        else:
            self.h[i] = max(self.h[i] * self.rng.uniform(0.5, 0.9), 10 * self.r[i])
            kind = "blunted"
        self.events.append((t, "ion-hit", {"emitter": i, "effect": kind}))
        return i

    def _advance_coverage(self, dt):
        """Adsorbate coverage of the active emitters at their tip temperatures (Arrhenius
        desorption, Hertz–Knudsen arrival; exact Langmuir steps), in batches: the elapsed
        time is accumulated until the coverage can have relaxed by 1 %."""
        a = self._active
        if a.size == 0:
            return
        p = self.params
        if self._kdes_active is None:
            k = EQ.desorption_rate(self.T[a], p.desorption_energy_ev, p.desorption_prefactor_hz)
            self._kdes_active = k
            # emitters that desorb within milliseconds sit at their equilibrium coverage
            # (set now); the batching follows the slower ones
            fast = k > 200.0
            if fast.any():
                af = a[fast]
                self.theta[af] = self._k_ads / (self._k_ads + k[fast])
                self._t_cov[af] = self._t
                slow = k[~fast]
                self._kdes_max = float(slow.max()) if slow.size else 0.0
            else:
                self._kdes_max = float(k.max())
        self._cov_dt += dt
        if self._cov_dt * (self._k_ads + self._kdes_max) < 0.01:
            return
        old = self.theta[a]
        new = EQ.coverage_step(old, self._k_ads, self._kdes_active, self._cov_dt)
        self.theta[a] = new
        self._t_cov[a] = self._t
        self._cov_dt = 0.0
        # the currents are solved again once the work function has moved by 1e-4 eV
        # (a relative current change of about 1e-3, well inside the flicker)
        ref = self._theta_solved
        if ref.size != new.size or float(np.max(np.abs(new - ref))) * abs(p.adsorbate_shift_ev) > 1e-4:
            self._version += 1

    def _flicker(self, dt):
        """Multiplicative 1/f flicker: exp(sigma x - sigma^2/2), x the normalised sum of
        seeded AR(1) processes (simulators.equations.ar1_coefficients)."""
        s = self.params.noise_level
        if s == 0:
            return 1.0
        if dt > 0:
            if dt != self._noise_dt:
                self._noise_a, self._noise_b = EQ.ar1_coefficients(dt, self._taus)
                self._noise_dt = dt
            self._x = self._noise_a * self._x + self._noise_b * self.rng.standard_normal(self._x.size)
        xs = float(self._x.sum()) / math.sqrt(self._x.size)
        return math.exp(s * xs - 0.5 * s * s)
