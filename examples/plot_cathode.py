"""Figures of the simulated KL-F12 fibre cathode (Kestrel Lane cold-cathode lab, stand-B;
invented demo scenario): a two-slope Fowler–Nordheim plot from adsorbates, up/down
hysteresis after a long dwell, and flicker with bursts at fixed voltage.

    /work/venv/bin/python examples/plot_cathode.py [--out examples/figures] [--seed 12]

The data functions (``fn_sweep``, ``hysteresis``, ``flicker``) are separate from the
plotting so the tests can run them quickly on a small ensemble. Every run is seeded and the
seed printed; nothing depends on wall time.
"""
from __future__ import annotations

import argparse
import os
import sys

import numpy as np

if __package__ in (None, ""):
    sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from simulators.cathode import Cathode, CathodeParams  # noqa: E402
from simulators.chamber import Chamber  # noqa: E402

SAMPLE_S = 0.1


def _run(cathode, chamber, voltages, t0, samples_per_step):
    """Step through ``voltages`` at 10 Hz; returns (t_end, mean current per step, all
    samples as (t, V, I, p))."""
    t = t0
    means, rows = [], []
    I = 0.0
    for v in voltages:
        acc = []
        for _ in range(samples_per_step):
            t += SAMPLE_S
            p = chamber.advance(t, I, v)
            I = cathode.emit(v, t, p)
            acc.append(I)
            rows.append((t, v, I, p))
        means.append(float(np.mean(acc)))
    return t, np.array(means), np.array(rows)


def fn_sweep(seed=12, emitters=10000, adsorbates=True, v_lo=200.0, v_hi=900.0, steps=36,
             samples_per_step=10, **overrides):
    """A quick up-sweep; returns (volts, mean amps). With adsorbates the plot has two slopes."""
    cfg = {"emitters": emitters, "noise_level": 0.0, "burst_rate_hz": 0.0}
    if not adsorbates:
        cfg["adsorbate_shift_ev"] = 0.0
    cfg.update(overrides)
    cath = Cathode(CathodeParams.from_dict(cfg), np.random.default_rng(seed))
    volts = np.linspace(v_lo, v_hi, steps)
    _, amps, _ = _run(cath, Chamber({}), volts, 0.0, samples_per_step)
    return volts, amps


def hysteresis(seed=12, emitters=10000, v_lo=250.0, v_hi=650.0, steps=25, samples_per_step=10,
               dwell_s=600.0, **overrides):
    """Up-sweep, dwell at the top, down-sweep; returns (volts, up amps, down amps, cathode)."""
    cfg = {"emitters": emitters}
    cfg.update(overrides)
    cath = Cathode(CathodeParams.from_dict(cfg), np.random.default_rng(seed))
    ch = Chamber({})
    volts = np.linspace(v_lo, v_hi, steps)
    t, up, _ = _run(cath, ch, volts, 0.0, samples_per_step)
    t, _, _ = _run(cath, ch, [v_hi], t, int(round(dwell_s / SAMPLE_S)))
    t, down, _ = _run(cath, ch, volts[::-1], t, samples_per_step)
    return volts, up, down[::-1], cath


def flicker(seed=12, emitters=10000, volts=650.0, duration_s=300.0, ramp_s=20.0, **overrides):
    """Ramp to ``volts``, then hold; returns (t, I, burn times, cathode, start of the hold)
    with times counted from the start of the hold."""
    cfg = {"emitters": emitters}
    cfg.update(overrides)
    cath = Cathode(CathodeParams.from_dict(cfg), np.random.default_rng(seed))
    ch = Chamber({})
    n_ramp = int(round(ramp_s / SAMPLE_S))
    t, _, _ = _run(cath, ch, np.linspace(0.0, volts, n_ramp), 0.0, 1)
    t_hold = t
    n_before = len(cath.events)
    _, _, rows = _run(cath, ch, [volts], t, int(round(duration_s / SAMPLE_S)))
    burns = np.array([e[0] for e in cath.events[n_before:] if e[1] == "burn"])
    return rows[:, 0] - t_hold, rows[:, 2], burns - t_hold, cath, t_hold


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=os.path.join(os.path.dirname(os.path.abspath(__file__)), "figures"))
    ap.add_argument("--seed", type=int, default=12)
    a = ap.parse_args(argv)
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    os.makedirs(a.out, exist_ok=True)
    print(f"seed {a.seed}; figures into {a.out}")

    # 1. two-slope FN plot
    fig, ax = plt.subplots(figsize=(7, 5))
    for ads, label, mark in ((True, "with adsorbates (initial coverage 0.9)", "o"),
                             (False, "clean (adsorbates off)", "s")):
        v, i = fn_sweep(seed=a.seed, adsorbates=ads)
        ok = i > 0
        line, = ax.plot(1e3 / v[ok], np.log(i[ok] / v[ok] ** 2), mark + "-", ms=4, label=label)
        if ads:       # the two straight parts, fitted
            for lo, hi in ((200.0, 380.0), (420.0, 560.0)):
                sel = ok & (v >= lo) & (v <= hi)
                x = 1e3 / v[sel]
                k, c = np.polyfit(x, np.log(i[sel] / v[sel] ** 2), 1)
                xx = np.linspace(x.min() - 0.25, x.max() + 0.25, 2)
                ax.plot(xx, k * xx + c, "--", color="grey", lw=1)
                ax.annotate(f"slope {k * 1e3:.0f} V", (xx.mean(), k * xx.mean() + c),
                            textcoords="offset points", xytext=(8, 8), fontsize=9, color="dimgrey")
    ax.set_xlabel("1000 / V  (1/kV)")
    ax.set_ylabel("ln(I / V²)  (I in A, V in V)")
    ax.set_title("KL-F12 (simulated): Fowler–Nordheim plot of a quick up-sweep")
    ax.grid(alpha=0.3)
    ax.legend()
    fig.tight_layout()
    fig.savefig(os.path.join(a.out, "fn_two_slopes.png"), dpi=110)
    plt.close(fig)

    # 2. hysteresis after a dwell
    v, up, down, cath = hysteresis(seed=a.seed)
    fig, ax = plt.subplots(figsize=(7, 5))
    ax.semilogy(v, up, "o-", ms=4, label="up-sweep")
    ax.semilogy(v, down, "s-", ms=4, label="down-sweep after a 10-minute dwell at the top")
    ax.set_xlabel("supply voltage (V)")
    ax.set_ylabel("current (A)")
    ax.set_title(f"KL-F12 (simulated): up/down sweeps ({sum(e[1] == 'burn' for e in cath.events)} emitters burned)")
    ax.grid(alpha=0.3, which="both")
    ax.legend()
    fig.tight_layout()
    fig.savefig(os.path.join(a.out, "hysteresis.png"), dpi=110)
    plt.close(fig)

    # 3. flicker at fixed voltage
    t, i, burns, cath, t_hold = flicker(seed=a.seed)
    hits = [e[0] - t_hold for e in cath.events if e[1] == "ion-hit" and e[0] >= t_hold]
    fig, (ax, zoom) = plt.subplots(2, 1, figsize=(8, 6.5), sharex=True,
                                   gridspec_kw={"height_ratios": [1.2, 1]})
    for axis in (ax, zoom):
        axis.plot(t, i * 1e6, lw=0.6, label="current")
        for k, tb in enumerate(burns):
            axis.axvline(tb, color="tab:red", lw=0.8, alpha=0.5, label="emitter burned" if k == 0 else None)
        for k, th in enumerate(hits):
            axis.axvline(th, color="grey", ls=":", lw=0.8, label="ion hit" if k == 0 else None)
        axis.grid(alpha=0.3)
    med = float(np.median(i)) * 1e6
    zoom.set_ylim(0.6 * med, 1.4 * med)
    zoom.set_xlabel("time at fixed voltage (s)")
    ax.set_ylabel("current (µA)")
    zoom.set_ylabel("current (µA), zoomed")
    ax.set_title("KL-F12 (simulated): flicker and bursts at 650 V, 1e-5 Pa")
    ax.legend(loc="upper right")
    fig.tight_layout()
    fig.savefig(os.path.join(a.out, "flicker.png"), dpi=110)
    plt.close(fig)
    print("wrote fn_two_slopes.png, hysteresis.png, flicker.png")
    return 0


if __name__ == "__main__":
    sys.exit(main())
