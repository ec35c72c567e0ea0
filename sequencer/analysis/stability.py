"""Stability of the current during a dwell (hold step).

- mean current, relative fluctuation std/mean;
- drift: least-squares slope of I(t), given in A/h and as a fraction of the mean per hour;
- bursts: runs of consecutive readings more than 5 robust standard deviations (1.4826 MAD,
  F.R. Hampel, J. Am. Stat. Assoc. 69 (1974) 383) away from an 11-point running median;
  their number and largest relative size;
- overlapping Allan deviation of the fractional current y = I/mean at tau = m tau_0,
  m = 1, 2, 4, ... (IEEE Std 1139-2008; W.J. Riley, NIST Special Publication 1065 (2008),
  eq. 13), which separates white noise (slope -1/2) from flicker (flat) and drift (+1);
- the noise power spectral density of y by Welch's method (scipy.signal.welch; P.D. Welch,
  IEEE Trans. Audio Electroacoust. 15 (1967) 70).
Readings are taken as evenly spaced at the median interval; at least 8 are needed.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import ndimage, signal

BURST_SIGMAS = 5.0
MEDIAN_WINDOW = 11


def allan_deviation(y, tau0: float):
    """Overlapping Allan deviation of fractional values y sampled every tau0 s (Riley 2008).
    Returns (taus, adev)."""
    y = np.asarray(y, dtype=float)
    N = y.size
    x = np.concatenate([[0.0], np.cumsum(y) * tau0])        # phase, N + 1 points
    taus, adev = [], []
    m = 1
    while 2 * m <= N // 1 and N + 1 - 2 * m >= 2 and m <= N // 3:
        d = x[2 * m:] - 2 * x[m:-m] + x[:-2 * m]
        tau = m * tau0
        taus.append(tau)
        adev.append(math.sqrt(float(np.mean(d * d)) / (2 * tau * tau)))
        m *= 2
    return np.array(taus), np.array(adev)


def dwell_stability(t, I) -> dict:
    """The numbers of the module docstring for one dwell (t in s, I in A)."""
    t = np.asarray(t, dtype=float)
    I = np.asarray(I, dtype=float)
    ok = np.isfinite(t) & np.isfinite(I)
    t, I = t[ok], I[ok]
    if I.size < 8:
        return {"n": int(I.size), "note": "fewer than 8 readings: no stability figures"}
    mean = float(np.mean(I))
    std = float(np.std(I, ddof=1))
    dur = float(t[-1] - t[0])
    slope = float(np.polyfit(t - t[0], I, 1)[0]) if dur > 0 else math.nan
    med = ndimage.median_filter(I, size=min(MEDIAN_WINDOW, I.size | 1), mode="nearest")
    r = I - med
    sig = 1.4826 * float(np.median(np.abs(r - np.median(r))))
    out_idx = np.abs(r) > BURST_SIGMAS * sig if sig > 0 else np.zeros(I.size, bool)
    bursts = []
    k = 0
    while k < I.size:
        if out_idx[k]:
            j = k
            while j + 1 < I.size and out_idx[j + 1]:
                j += 1
            bursts.append((float(t[k]), float(np.max(np.abs(r[k:j + 1]))) / abs(mean) if mean else math.nan))
            k = j + 1
        else:
            k += 1
    dts = np.diff(t)
    tau0 = float(np.median(dts)) if dts.size else math.nan
    y = I / mean if mean else I
    taus, adev = allan_deviation(y, tau0) if tau0 > 0 else (np.array([]), np.array([]))
    freq, psd = (signal.welch(y - np.mean(y), fs=1.0 / tau0, nperseg=min(256, y.size))
                 if tau0 > 0 else (np.array([]), np.array([])))
    return {
        "n": int(I.size), "duration_s": dur, "mean_a": mean, "std_a": std,
        "relative_fluctuation": std / mean if mean else math.nan,
        "drift_a_per_h": slope * 3600.0, "drift_per_h": slope * 3600.0 / mean if mean else math.nan,
        "bursts": len(bursts), "largest_burst_relative": max((b[1] for b in bursts), default=0.0),
        "burst_times_s": [b[0] for b in bursts][:50], "sample_interval_s": tau0,
        "allan_tau_s": taus.tolist(), "allan_deviation": adev.tolist(),
        "psd_freq_hz": freq[1:].tolist()[:128], "psd_per_hz": psd[1:].tolist()[:128],
    }
