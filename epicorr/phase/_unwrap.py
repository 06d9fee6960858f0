"""3-D phase unwrapping by weighted least squares, made congruent.

Method
------
1. Wrapped neighbour differences ``g = W(phi[x+1] - phi[x])`` along the
   three array axes (``W`` wraps into ``(-pi, pi]``).  Where the true phase
   changes by less than ``pi`` per voxel they equal the true differences.
2. The unwrapped phase ``u`` minimises the weighted sum
   ``sum_e w_e (u_b - u_a - g_e)^2 + eps sum_e (u_b - u_a)^2`` over all
   neighbour pairs ``e = (a, b)`` (weighted least-squares unwrapping, Ghiglia &
   Romero 1994; the unweighted case is the Laplacian/Poisson unwrapping of
   Schofield & Zhu 2003).  ``w_e = q_a q_b`` with the voxel quality ``q`` in
   ``[0, 1]`` (the magnitude relative to the mask threshold, squared), so noisy
   voxels carry almost no weight; the small ``eps`` term bridges signal voids
   and disconnected pieces smoothly, so every piece gets its ``2 pi`` cycle
   from its neighbours instead of at random.  The normal equations (a
   weighted 3-D Laplacian with Neumann boundaries) are solved by conjugate
   gradients preconditioned with the unweighted Laplacian, inverted exactly
   with the discrete cosine transform (Ghiglia & Romero 1994).
3. Congruence: ``u <- phi + 2 pi round((u - phi) / 2 pi)``, so the result
   differs from the measured phase by whole cycles only.
4. Isolated cycle errors (a reliable voxel further than ``pi`` from the
   3x3x3 median of its neighbourhood, where unreliable voxels count with a
   Gaussian-weighted local average of the reliable ones) get the cycle of that median (two passes).
5. Separate pieces: a second-order polynomial is fitted to the largest
   connected piece of reliable voxels; every other piece takes the cycle that
   puts its median nearest to the fit's extrapolation (the smooth-field
   assumption, as in step 2, but with the trend of the field kept).
6. Global cycle: whole ``2 pi`` are removed so that the median of ``u`` over
   the mask lies in ``(-pi, pi]`` (the scanner's shim centres the field
   near zero in the brain).

Everything is deterministic (no random seeds are involved).

References
----------
Ghiglia DC, Romero LA. Robust two-dimensional weighted and unweighted phase
unwrapping that uses fast transforms and iterative methods. J Opt Soc Am A
1994;11:107-117.

Schofield MA, Zhu Y. Fast phase unwrapping algorithm for interferometric
applications. Opt Lett 2003;28:1194-1196.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import scipy.fft as sfft
import scipy.ndimage as ndi

from ..errors import EpicorrInputError

__all__ = ["unwrap_phase_3d", "wrap"]

TWO_PI = 2.0 * math.pi


def wrap(x: Any) -> np.ndarray:
    """Wrap angles into ``(-pi, pi]`` (radians)."""
    x = np.asarray(x, dtype=np.float64)
    return np.angle(np.exp(1j * x))


def _grad(u: np.ndarray, axis: int) -> np.ndarray:
    return np.diff(u, axis=axis)


def _grad_t(y: np.ndarray, axis: int) -> np.ndarray:
    pad = [(0, 0)] * y.ndim
    pad[axis] = (1, 1)
    return -np.diff(np.pad(y, pad), axis=axis)


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """Inner product without BLAS threads (they thrash on busy machines)."""
    return float(np.multiply(a, b).sum())


def _wlap(u: np.ndarray, weights: list[np.ndarray] | None = None) -> np.ndarray:
    """``sum_a D_a^T (w_a D_a u)`` (weighted Neumann Laplacian; unit weights when None)."""
    out = np.zeros_like(u)
    for a in range(u.ndim):
        lo = [slice(None)] * u.ndim
        hi = [slice(None)] * u.ndim
        lo[a] = slice(None, -1)
        hi[a] = slice(1, None)
        lo, hi = tuple(lo), tuple(hi)
        g = u[hi] - u[lo]
        if weights is not None:
            g *= weights[a]
        out[hi] += g
        out[lo] -= g
    return out


class _PoissonDCT:
    """Exact inverse of the unweighted Neumann Laplacian ``sum_a D_a^T D_a``."""

    def __init__(self, shape: tuple[int, ...]) -> None:
        eig = np.zeros(shape)
        for axis, n in enumerate(shape):
            lam = 2.0 - 2.0 * np.cos(np.pi * np.arange(n) / n)
            sh = [1] * len(shape)
            sh[axis] = n
            eig = eig + lam.reshape(sh)
        eig.flat[0] = 1.0
        self.inv = 1.0 / eig
        self.inv.flat[0] = 0.0

    def __call__(self, r: np.ndarray) -> np.ndarray:
        c = sfft.dctn(r, type=2, norm="ortho")
        c *= self.inv
        return sfft.idctn(c, type=2, norm="ortho")


def weighted_poisson(targets: list[np.ndarray], weights: list[np.ndarray], *, x0: np.ndarray | None = None,
                     tol: float = 1e-5, max_iter: int = 300) -> tuple[np.ndarray, dict]:
    """Minimise ``sum_a sum w_a (D_a u - t_a)^2`` (Neumann) by preconditioned CG.

    ``targets[a]`` and ``weights[a]`` have the shape of ``np.diff(u, axis=a)``;
    weights must be positive.  Returns ``u`` (zero mean) and ``{"iterations",
    "residual"}``.
    """
    shape = list(targets[0].shape)
    shape[0] += 1
    shape = tuple(shape)
    prec = _PoissonDCT(shape)

    def apply(u: np.ndarray) -> np.ndarray:
        return _wlap(u, weights)

    b = np.zeros(shape)
    for a in range(3):
        b += _grad_t(weights[a] * targets[a], a)
    b -= b.mean()
    bnorm = math.sqrt(_dot(b, b)) or 1.0
    x = prec(b) if x0 is None else x0 - x0.mean()
    r = b - apply(x)
    z = prec(r)
    p = z.copy()
    rz = _dot(r, z)
    it = 0
    res = math.sqrt(_dot(r, r)) / bnorm
    while it < max_iter and res > tol:
        ap = apply(p)
        alpha = rz / _dot(p, ap)
        x += alpha * p
        r -= alpha * ap
        res = math.sqrt(_dot(r, r)) / bnorm
        it += 1
        if res <= tol:
            break
        z = prec(r)
        rz_new = _dot(r, z)
        p = z + (rz_new / rz) * p
        rz = rz_new
    return x - x.mean(), {"iterations": it, "residual": res}


def _poly_terms(idx: np.ndarray, centre: np.ndarray, scale: float) -> np.ndarray:
    x, y, z = ((idx - centre) / scale).T
    one = np.ones_like(x)
    return np.stack([one, x, y, z, x * x, y * y, z * z, x * y, x * z, y * z], axis=1)


def _align_pieces(un: np.ndarray, reliable: np.ndarray) -> int:
    """Give each separate piece the cycle of a smooth fit to the largest one (in place).

    A second-order polynomial in the voxel indices is fitted to the largest
    6-connected piece of ``reliable``; every other piece is shifted by whole
    cycles so that its median distance to the fit's extrapolation lies in
    ``(-pi, pi]``.  Returns the number of pieces shifted.
    """
    labels, n = ndi.label(reliable, structure=ndi.generate_binary_structure(3, 1))
    if n < 2:
        return 0
    sizes = np.bincount(labels.ravel())
    sizes[0] = 0
    main = int(np.argmax(sizes))
    idx = np.argwhere(labels == main).astype(np.float64)
    step = max(1, idx.shape[0] // 20000)
    sub = idx[::step]
    centre = idx.mean(axis=0)
    scale = float(max(un.shape))
    coef, *_ = np.linalg.lstsq(_poly_terms(sub, centre, scale),
                               un[tuple(sub.astype(int).T)], rcond=None)
    shifted = 0
    objects = ndi.find_objects(labels)
    for lab in range(1, n + 1):
        if lab == main:
            continue
        box = objects[lab - 1]
        sel = labels[box] == lab
        pidx = np.argwhere(sel) + np.array([b.start for b in box])
        pred = _poly_terms(pidx.astype(np.float64), centre, scale) @ coef
        cyc = int(np.round(np.median(un[box][sel] - pred) / TWO_PI))
        if cyc:
            un[box][sel] -= TWO_PI * cyc
            shifted += 1
    return shifted


def unwrap_phase_3d(phase: Any, *, quality: Any = None, mask: Any = None, bridge_weight: float = 1e-3,
                    tol: float = 1e-5, max_iter: int = 300) -> tuple[np.ndarray, dict]:
    """Unwrap a 3-D phase image.

    Parameters
    ----------
    phase : array_like, shape (X, Y, Z)
        Wrapped phase, radians.
    quality : array_like, shape (X, Y, Z), optional
        Voxel reliability in ``[0, 1]`` (e.g. normalised magnitude); 1
        everywhere when omitted.  Voxels outside ``mask`` get quality 0.
    mask : array_like of bool, shape (X, Y, Z), optional
        Voxels whose median fixes the global ``2 pi`` cycle (all voxels when
        omitted).
    bridge_weight : float
        Weight ``eps`` of the smoothness term that connects unreliable voxels
        and separate pieces.
    tol, max_iter :
        Stopping rule of the conjugate-gradient solver (relative residual).

    Returns
    -------
    unwrapped : ndarray, shape (X, Y, Z), float64
        Unwrapped phase, radians; ``unwrapped - phase`` is a whole number of
        ``2 pi`` in every voxel.
    info : dict
        ``iterations``, ``residual`` of the solver, ``cycle_fixes`` (voxels
        corrected in step 4) and ``global_cycles`` (whole cycles removed).
    """
    phi = wrap(phase)
    if phi.ndim != 3:
        raise EpicorrInputError("phase must be a 3-D volume", key="phase", value=phi.shape)
    if min(phi.shape) < 2:
        raise EpicorrInputError("phase volume needs at least 2 voxels along every axis", key="phase",
                                value=phi.shape)
    q = np.ones(phi.shape) if quality is None else np.clip(np.asarray(quality, dtype=np.float64), 0.0, 1.0)
    m = np.ones(phi.shape, dtype=bool) if mask is None else np.asarray(mask, dtype=bool)
    if quality is not None and mask is not None:
        q = np.where(m, q, 0.0)
    targets, weights = [], []
    for a in range(3):
        g = wrap(_grad(phi, a))
        sl_lo = [slice(None)] * 3
        sl_hi = [slice(None)] * 3
        sl_lo[a] = slice(None, -1)
        sl_hi[a] = slice(1, None)
        w = q[tuple(sl_lo)] * q[tuple(sl_hi)]
        wt = w + bridge_weight
        targets.append(w * g / wt)
        weights.append(wt)
    u, info = weighted_poisson(targets, weights, tol=tol, max_iter=max_iter)
    k = np.round((u - phi) / TWO_PI)
    fixes = 0
    reliable = q > 0.05
    rel_f = reliable.astype(np.float64)
    weight = ndi.gaussian_filter(rel_f, 2.0, mode="nearest")
    for _ in range(2):
        un = phi + TWO_PI * k
        # Unreliable voxels enter the median with a local average of the reliable
        # ones (normalised Gaussian convolution, sigma 2 voxels), not with their noise.
        local = ndi.gaussian_filter(un * rel_f, 2.0, mode="nearest") / np.maximum(weight, 1e-12)
        med = ndi.median_filter(np.where(reliable, un, local), size=3, mode="nearest")
        bad = reliable & (np.abs(un - med) > math.pi)
        if not bad.any():
            break
        fixes += int(bad.sum())
        k[bad] = np.round((med[bad] - phi[bad]) / TWO_PI)
    un = phi + TWO_PI * k
    pieces = _align_pieces(un, reliable & m)
    ref = un[m] if m.any() else un.ravel()
    cycles = int(np.round(np.median(ref) / TWO_PI))
    # Keep the median inside (-pi, pi] exactly.
    med = float(np.median(ref)) - TWO_PI * cycles
    if med <= -math.pi:
        cycles -= 1
    un = un - TWO_PI * cycles
    info.update({"cycle_fixes": fixes, "global_cycles": cycles, "pieces": pieces})
    return un, info
