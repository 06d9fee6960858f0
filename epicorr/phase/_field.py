"""From unwrapped phase to a field map in Hz, with its uncertainty.

Field
-----
The phase of a gradient echo grows linearly with the echo time at the
off-resonance frequency, ``phi(TE) = phi0 + 2 pi f TE``, so two echoes give

    ``f = dphi / (2 pi dTE)``   (Hz; ``dTE = TE2 - TE1`` in s)

(Bernstein, King & Zhou 2004, ch. 13).

Despiking
---------
A voxel whose field differs from the median of its measured 3x3x3
neighbours by more than ``max(6 s, 0.15 / dTE, 5 sigma_f)`` (``s`` = 1.4826 x the median absolute
residual inside the mask, a robust standard deviation; ``0.15 / dTE`` Hz is
about one radian of phase; a direct field map, without echo times, uses a
floor of 30 Hz instead; ``sigma_f`` is the voxel's own uncertainty) is an
isolated outlier (e.g. a single-voxel cycle error or a noise spike) and takes
the median's value (common practice).  Unmeasured neighbours never enter the
median, so steep but genuine fields at the mask edge are kept.

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


def phase_to_hz(dphi: Any, *, delta_te: float) -> np.ndarray:
    """``dphi / (2 pi dTE)``: phase difference (rad) to field (Hz); ``delta_te`` in s."""
    return np.asarray(dphi, dtype=np.float64) / (2.0 * math.pi * float(delta_te))


def despike(field_hz: Any, mask: Any, *, delta_te: float | None = None, floor_hz: float = 0.0,
            sigma_hz: Any = None) -> tuple[np.ndarray, int]:
    """Replace isolated outliers inside ``mask`` by the median of their measured neighbours.

    Parameters
    ----------
    field_hz : array_like, shape (X, Y, Z)
        Field, Hz.
    mask : array_like of bool, shape (X, Y, Z)
        Measured voxels; only they enter the 3x3x3 median.
    delta_te : float, optional
        Echo-time difference, s; sets the floor ``0.15 / dTE`` Hz.
    floor_hz : float
        A fixed floor of the limit, Hz (for field maps without echo times).
    sigma_hz : array_like, shape (X, Y, Z), optional
        Per-voxel standard deviation; the limit is at least ``5 sigma``.

    Returns
    -------
    field : ndarray, shape (X, Y, Z)
    n_spikes : int
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
        limit = max(limit, 0.15 / abs(float(delta_te)))
    limit = np.full(f.shape, limit)
    if sigma_hz is not None:
        limit = np.maximum(limit, 5.0 * np.asarray(sigma_hz, dtype=np.float64))
    with np.errstate(invalid="ignore"):
        spikes = both & ((f - hi > limit) | (lo - f > limit))
    f[spikes] = mid[spikes]
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
