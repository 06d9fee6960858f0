"""From unwrapped phase to a field map in Hz, with its uncertainty.

Field
-----
The phase of a gradient echo grows linearly with the echo time at the
off-resonance frequency, ``phi(TE) = phi0 + 2 pi f TE``, so two echoes give

    ``f = dphi / (2 pi dTE)``   (Hz; ``dTE = TE2 - TE1`` in s)

(Bernstein, King & Zhou 2004, ch. 13).

Despiking
---------
A voxel is an isolated outlier (a single-voxel cycle error or a noise spike)
when it misses every one-sided linear prediction from its measured
neighbours, ``2 f[x+1] - f[x+2]`` along the six axis directions, by more
than ``max(6 s, 0.15 / dTE, 5 sigma_f)`` (``s`` = 1.4826 x the median
absolute residual from the neighbourhood median inside the mask, a robust
standard deviation; ``0.15 / dTE`` Hz is about one radian of phase; a direct
field map, without echo times, uses a floor of 100 Hz instead; ``sigma_f``
is the voxel's own uncertainty).  A phase-derived outlier first gets the
whole cycle ``k / dTE`` that brings it back onto a prediction, if one does;
otherwise it takes the median of its measured neighbours (common practice).
Linear predictions, not the median, decide: next to air cavities a true peak
of the field sits far above the median of its neighbours but on the line of
its steep flank.  Unmeasured neighbours never enter.

Extrapolation outside the mask
------------------------------
Outside the measured voxels the field is the *harmonic extension* of the
measured one: the values that minimise the gradient energy
``sum |grad f|^2`` with the measured voxels held fixed (Neumann boundary at
the edge of the volume).  It is continuous at the mask edge, bounded by the
measured values (maximum principle) and smooth, so unwarping next to the brain
edge does not meet a hard cut.  Solved by conjugate gradients preconditioned
with the discrete-cosine-transform inverse of the full-grid Laplacian.

Optional smoothing
------------------
A 3-D Gaussian kernel of the given full width at half maximum in mm
(``sigma = FWHM / (2 sqrt(2 ln 2))``, converted to voxels per axis), applied
to the extended field.

Uncertainty
-----------
At high SNR the phase noise of one echo is ``1 / SNR`` rad (Gudbjartsson &
Patz 1995), so the phase difference has ``sqrt(1/SNR1^2 + 1/SNR2^2)``
(``sqrt 2 / SNR`` for equal SNRs) and the field
``sigma_f = sqrt(1/SNR1^2 + 1/SNR2^2) / (2 pi |dTE|)`` Hz.  ``SNR`` is the
magnitude over the background noise ``sigma``.  Where the formula exceeds the
standard deviation of a uniformly random phase, ``pi / sqrt 3`` rad, it is
capped there (pure noise carries no information beyond that); voxels outside
the measured mask take that cap.

References
----------
Bernstein MA, King KF, Zhou XJ. Handbook of MRI Pulse Sequences. Elsevier 2004.

Gudbjartsson H, Patz S. The Rician distribution of noisy MRI data. Magn Reson
Med 1995;34:910-914.
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np
import scipy.ndimage as ndi

from ._unwrap import _PoissonDCT, _dot, _wlap

__all__ = ["phase_to_hz", "despike", "extrapolate_harmonic", "smooth_field", "field_sigma_hz",
           "FWHM_TO_SIGMA"]

#: Gaussian sigma per unit FWHM: ``1 / (2 sqrt(2 ln 2))``.
FWHM_TO_SIGMA = 1.0 / (2.0 * math.sqrt(2.0 * math.log(2.0)))
_UNIFORM_PHASE_SD = math.pi / math.sqrt(3.0)
#: Floor of the despiking limit in cycles of ``1 / dTE``.
SPIKE_FLOOR_CYCLES = 0.15


def phase_to_hz(dphi: Any, *, delta_te: float) -> np.ndarray:
    """``dphi / (2 pi dTE)``: phase difference (rad) to field (Hz); ``delta_te`` in s."""
    return np.asarray(dphi, dtype=np.float64) / (2.0 * math.pi * float(delta_te))


def despike(field_hz: Any, mask: Any, *, delta_te: float | None = None, floor_hz: float = 0.0,
            sigma_hz: Any = None, details: dict | None = None) -> tuple[np.ndarray, int]:
    """Replace isolated outliers inside ``mask`` by the median of their measured neighbours.

    A voxel is an outlier when no straight line through its neighbours
    predicts it: along each of the six axis directions the two measured
    voxels on that side extrapolate linearly to ``2 f[x+1] - f[x+2]``, and the
    voxel is replaced only when it misses every such prediction by more than
    the limit.  Next to air cavities the field changes by tens of Hz per voxel
    and a true peak sits far above the median of its neighbours, but its
    steep flank still predicts it; one wrong voxel, or two touching ones
    (unwrapping slips of one cycle, noise in dark voxels), is predicted by no
    direction.  Voxels without two measured voxels in a row on any side fall
    back to the neighbourhood: outlier when beyond the second-highest or
    second-lowest measured neighbour by more than the limit.

    Parameters
    ----------
    field_hz : array_like, shape (X, Y, Z)
        Field, Hz.
    mask : array_like of bool, shape (X, Y, Z)
        Measured voxels; only they enter the neighbourhood statistics.
    delta_te : float, optional
        Echo-time difference, s; sets the floor ``0.15 / dTE`` Hz.
    floor_hz : float
        A fixed floor of the limit, Hz (for field maps without echo times).
    sigma_hz : array_like, shape (X, Y, Z), optional
        Per-voxel standard deviation; the limit is at least ``5 sigma``.
    details : dict, optional
        Filled with ``cycles_restored`` and ``median_replaced`` counts.

    Returns
    -------
    field : ndarray, shape (X, Y, Z)
    n_spikes : int
        Voxels changed (both kinds).

    Notes
    -----
    With ``delta_te`` the field of a phase-derived map is only known modulo
    ``1 / dTE``, and an outlier is first offered the whole cycles
    ``k / dTE``, ``k = -2..2``: when one of them brings it within the limit
    of a linear prediction, that cycle is restored (an unwrapping slip where
    the field changes by nearly half a cycle per voxel); otherwise the voxel
    takes the median of its measured neighbours.
    """
    f = np.asarray(field_hz, dtype=np.float64).copy()
    m = np.asarray(mask, dtype=bool)
    if m.sum() < 27:
        return f, 0
    # Median over measured neighbours only, bracketed: unmeasured voxels are
    # entered once as +inf and once as -inf; the masked median lies between.
    hi = ndi.median_filter(np.where(m, f, np.inf), size=3, mode="nearest")
    lo = ndi.median_filter(np.where(m, f, -np.inf), size=3, mode="nearest")
    both = m & np.isfinite(hi) & np.isfinite(lo)
    with np.errstate(invalid="ignore"):
        mid = np.where(both, 0.5 * (hi + lo), f)
    resid = (f - mid)[both]
    s = 1.4826 * float(np.median(np.abs(resid - np.median(resid)))) if resid.size else 0.0
    limit = max(6.0 * s, float(floor_hz))
    if delta_te:
        limit = max(limit, SPIKE_FLOOR_CYCLES / abs(float(delta_te)))
    limit = np.full(f.shape, limit)
    if sigma_hz is not None:
        limit = np.maximum(limit, 5.0 * np.asarray(sigma_hz, dtype=np.float64))
    # Smallest miss over the six one-sided linear predictions.
    miss = np.full(f.shape, np.inf)
    preds = []
    fm = np.where(m, f, np.nan)
    pad = np.pad(fm, 2, mode="constant", constant_values=np.nan)
    core = tuple(slice(2, -2) for _ in range(3))
    for axis in range(3):
        for step in (1, -1):
            def shifted(k):
                sl = list(core)
                sl[axis] = slice(2 + k * step, pad.shape[axis] - 2 + k * step)
                return pad[tuple(sl)]
            pred = 2.0 * shifted(1) - shifted(2)
            preds.append(pred)
            with np.errstate(invalid="ignore"):
                dev = np.abs(f - pred)
            miss = np.where(np.isfinite(dev), np.minimum(miss, dev), miss)
    ring = np.ones((3, 3, 3), dtype=bool)
    ring[1, 1, 1] = False
    # Fallback order statistics: second-highest / second-lowest measured
    # neighbour (outside the array and unmeasured voxels never rank second).
    top2 = ndi.rank_filter(np.where(m, f, -np.inf), rank=-2, footprint=ring, mode="constant", cval=-np.inf)
    bot2 = ndi.rank_filter(np.where(m, f, np.inf), rank=1, footprint=ring, mode="constant", cval=np.inf)
    with np.errstate(invalid="ignore"):
        fallback = np.isfinite(top2) & np.isfinite(bot2) & ((f - top2 > limit) | (bot2 - f > limit))
    spikes = both & np.where(np.isfinite(miss), miss > limit, fallback)
    restored = np.zeros(f.shape, dtype=bool)
    if delta_te and spikes.any():
        cycle = 1.0 / abs(float(delta_te))
        idx = np.nonzero(spikes)
        fs = f[idx]
        best_miss = np.full(fs.shape, np.inf)
        best_k = np.zeros(fs.shape)
        for k in (-2, -1, 1, 2):
            cand = fs + k * cycle
            mk = np.full(fs.shape, np.inf)
            for pred in preds:
                p = pred[idx]
                with np.errstate(invalid="ignore"):
                    d = np.abs(cand - p)
                mk = np.where(np.isfinite(d), np.minimum(mk, d), mk)
            better = mk < best_miss
            best_miss = np.where(better, mk, best_miss)
            best_k = np.where(better, k, best_k)
        ok = best_miss <= limit[idx]
        fixed = tuple(a[ok] for a in idx)
        f[fixed] = fs[ok] + best_k[ok] * cycle
        restored[fixed] = True
    median_fix = spikes & ~restored
    f[median_fix] = mid[median_fix]
    if details is not None:
        details["cycles_restored"] = int(restored.sum())
        details["median_replaced"] = int(median_fix.sum())
    return f, int(spikes.sum())


def extrapolate_harmonic(field_hz: Any, known: Any, *, tol: float = 1e-4,
                         max_iter: int = 200) -> tuple[np.ndarray, dict]:
    """Fill voxels outside ``known`` with the harmonic extension of the field.

    Parameters
    ----------
    field_hz : array_like, shape (X, Y, Z)
        Field, Hz (values outside ``known`` are ignored).
    known : array_like of bool, shape (X, Y, Z)
        Voxels kept as they are.

    Returns
    -------
    field : ndarray, shape (X, Y, Z), float64
        Equal to ``field_hz`` on ``known``; minimal gradient energy elsewhere.
    info : dict
        ``iterations``, ``residual``.
    """
    f = np.asarray(field_hz, dtype=np.float64)
    k = np.asarray(known, dtype=bool)
    if k.all():
        return f.copy(), {"iterations": 0, "residual": 0.0}
    if not k.any():
        return np.zeros_like(f), {"iterations": 0, "residual": 0.0}
    free = ~k
    base = np.where(k, f, 0.0)
    # Good start: normalised Gaussian averaging of the known values.
    w = ndi.gaussian_filter(k.astype(np.float64), 4.0, mode="nearest")
    start = ndi.gaussian_filter(base, 4.0, mode="nearest") / np.maximum(w, 1e-12)
    start = np.where(w > 1e-6, start, float(np.mean(f[k])))
    prec = _PoissonDCT(f.shape)

    def A(x: np.ndarray) -> np.ndarray:
        return np.where(free, _wlap(np.where(free, x, 0.0)), 0.0)

    def M(r: np.ndarray) -> np.ndarray:
        return np.where(free, prec(r), 0.0)

    b = -np.where(free, _wlap(base), 0.0)
    x = np.where(free, start, 0.0)
    r = b - A(x)
    bnorm = math.sqrt(_dot(b, b)) or 1.0
    z = M(r)
    p = z.copy()
    rz = _dot(r, z)
    it, res = 0, math.sqrt(_dot(r, r)) / bnorm
    while it < max_iter and res > tol:
        ap = A(p)
        pap = _dot(p, ap)
        if pap <= 0:
            break
        alpha = rz / pap
        x += alpha * p
        r -= alpha * ap
        it += 1
        res = math.sqrt(_dot(r, r)) / bnorm
        z = M(r)
        rz_new = _dot(r, z)
        p = z + (rz_new / rz) * p
        rz = rz_new
    return np.where(k, f, x), {"iterations": it, "residual": res}


def smooth_field(field_hz: Any, *, fwhm_mm: float, zooms: Sequence[float]) -> np.ndarray:
    """Gaussian smoothing with a FWHM in mm (``zooms``: voxel sizes, mm)."""
    sig = [FWHM_TO_SIGMA * float(fwhm_mm) / float(z) for z in tuple(zooms)[:3]]
    return ndi.gaussian_filter(np.asarray(field_hz, dtype=np.float64), sig, mode="nearest")


def field_sigma_hz(snr1: Any, snr2: Any, *, delta_te: float, measured: Any = None) -> np.ndarray:
    """Per-voxel standard deviation of the field, Hz.

    Parameters
    ----------
    snr1, snr2 : array_like, shape (X, Y, Z)
        Magnitude SNR of each echo (magnitude / noise sigma).
    delta_te : float
        Echo-time difference, s.
    measured : array_like of bool, optional
        Voxels with a measured field; the others take the cap.

    Returns
    -------
    ndarray, shape (X, Y, Z), float64
        ``min(sqrt(1/SNR1^2 + 1/SNR2^2), pi/sqrt(3)) / (2 pi |dTE|)``.
    """
    s1 = np.maximum(np.asarray(snr1, dtype=np.float64), 1e-6)
    s2 = np.maximum(np.asarray(snr2, dtype=np.float64), 1e-6)
    sd_phase = np.minimum(np.sqrt(1.0 / s1 ** 2 + 1.0 / s2 ** 2), _UNIFORM_PHASE_SD)
    if measured is not None:
        sd_phase = np.where(np.asarray(measured, dtype=bool), sd_phase, _UNIFORM_PHASE_SD)
    return sd_phase / (2.0 * math.pi * abs(float(delta_te)))
