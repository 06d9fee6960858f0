"""Reversed-gradient model (Chang & Fitzpatrick 1992), line-wise, with derivatives.

Layout
------
Every array here has the phase-encode (PE) axis FIRST: shape ``(n, a, b)``
(or ``(n, m)``), ``n`` voxels along PE.  Callers move the PE axis to the front
once (``np.moveaxis``) and back at the end.  A PE "line" is ``x[:, p, q]``.

Model
-----
For an image acquired with PE polarity ``p`` and readout scaling ``v``
(voxels per Hz), the displacement in undistorted space is
``d(y) = p * v * field(y)`` voxels.  With ``u`` the unknown in "reference
voxels" (``u = v_ref * field``) and ``c = p * v / v_ref``, ``d = c u``.  The
unwarped, Jacobian-modulated image is::

    U(y) = I(y + c u(y)) * (1 + c u'(y))

and the reversed-gradient model states that ``U`` is the same for both
polarities (Chang & Fitzpatrick 1992).  ``u'`` is the discrete derivative
along PE: central differences inside the line, one-sided at its two ends.
The Jacobian of ``U`` with respect to ``u`` is ``diag(A) + diag(B) D`` (``D``
the derivative matrix), a tridiagonal matrix on each PE line, which is what
makes the data term's Gauss-Newton Hessian block-diagonal with pentadiagonal
blocks (Macdonald & Ruthotto 2018).

Interpolation is cubic convolution (Keys 1981, ``a = -1/2``), which is C1 and
so has a continuous derivative for the Gauss-Newton linearisation.  Positions
outside the line are clamped to its ends (edge extension) with a zero
derivative.

References
----------
Chang H, Fitzpatrick JM. A technique for accurate magnetic resonance imaging
in the presence of field inhomogeneities. IEEE Trans Med Imaging
1992;11:319-329.

Keys RG. Cubic convolution interpolation for digital image processing. IEEE
Trans Acoust Speech Signal Process 1981;29:1153-1160.

Macdonald J, Ruthotto L. Improved susceptibility artifact correction of
echo-planar MRI using the alternating direction method of multipliers.
J Math Imaging Vis 2018;60:268-282.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np

__all__ = [
    "LineSampler", "interp_pe", "derivative_pe", "jacobian_bands", "gram_bands", "apply_bands_T",
    "band_matvec", "barrier", "unwarp",
]

#: Voxels per chunk when interpolating (bounds the temporaries' memory).
_CHUNK = 1 << 19


class LineSampler:
    """Cubic-convolution sampler along PE for one image (PE axis first).

    The image is stored once with two edge-replicated rows at each end of
    every line, so the four taps never need index clipping.  Sampling runs
    in row chunks, spread over a small thread pool (numpy releases the GIL in
    its gathers and arithmetic), which bounds the temporaries' memory too.
    """

    def __init__(self, img: np.ndarray, *, upsample: int = 1):
        img = np.asarray(img, dtype=np.float64)
        self.shape = img.shape
        self.n = img.shape[0]
        self.m = int(np.prod(img.shape[1:], dtype=np.int64))
        self.f = max(1, int(upsample))
        lines = img.reshape(self.n, self.m)
        if self.f > 1:
            # stored in single precision (the taps are promoted on gathering): the
            # finer grid costs f/2 times the memory of the double-precision image
            lines = band_limited_upsample(lines, self.f).astype(np.float32)
        self.flat = np.concatenate([lines[:1], lines[:1], lines, lines[-1:], lines[-1:]]).ravel()

    def _chunk(self, r0, r1, sh, value, deriv):
        n, m = self.n, self.m
        sl = slice(r0 * m, r1 * m)
        pos = sh[sl].reshape(r1 - r0, m) + np.arange(r0, r1, dtype=np.float64)[:, None]
        if deriv is not None:
            inside = (pos >= 0) & (pos <= n - 1)
        np.clip(pos, 0, n - 1, out=pos)
        if self.f > 1:
            pos *= self.f
        i0 = pos.astype(np.int64)  # floor, as pos >= 0
        t = pos - i0
        # flat index of tap "-1" in the padded array: row (i0 - 1 + 2), column col
        base = i0 * m
        base += np.arange(m, dtype=np.int64)[None, :] + m
        f = self.flat
        s0 = f[base].astype(np.float64, copy=False)
        base += m
        s1 = f[base].astype(np.float64, copy=False)
        base += m
        s2 = f[base].astype(np.float64, copy=False)
        base += m
        s3 = f[base].astype(np.float64, copy=False)
        # Keys (1981) cubic convolution, a = -1/2, in Horner form around s1, s2.
        a = s2 - s0
        b = 2.0 * s0 - 5.0 * s1 + 4.0 * s2 - s3
        c = 3.0 * (s1 - s2) + s3 - s0
        value[sl] = (s1 + 0.5 * t * (a + t * (b + t * c))).ravel()
        if deriv is not None:
            der = (0.5 * self.f) * (a + t * (2.0 * b + 3.0 * t * c))
            der[~inside] = 0.0
            deriv[sl] = der.ravel()

    def sample(self, shift: np.ndarray, *, with_derivative: bool = True):
        """Values (and PE derivatives) at ``y + shift(y)``; shapes as the image."""
        n, m = self.n, self.m
        sh = np.asarray(shift, dtype=np.float64).reshape(n * m)
        value = np.empty(n * m)
        deriv = np.empty(n * m) if with_derivative else None
        rows = max(1, min(n, _CHUNK // max(m, 1), -(-n // _THREADS)))
        jobs = [(r0, min(n, r0 + rows)) for r0 in range(0, n, rows)]
        if len(jobs) == 1:
            self._chunk(0, n, sh, value, deriv)
        else:
            list(_pool().map(lambda j: self._chunk(j[0], j[1], sh, value, deriv), jobs))
        if with_derivative:
            return value.reshape(self.shape), deriv.reshape(self.shape)
        return value.reshape(self.shape)


def band_limited_upsample(lines: np.ndarray, factor: int) -> np.ndarray:
    """Trigonometric (DFT) interpolation of each PE line onto a ``factor`` times finer grid.

    ``lines`` has shape ``(n, m)``; row ``r`` of the result sits at PE
    coordinate ``r / factor``.  The EPI image along PE is the inverse DFT of
    ``n`` k-space lines, so this is its exact continuous form at the new
    samples (periodic over the field of view); the Nyquist term is split
    evenly between the two new bins so the result stays real.
    """
    from scipy import fft as _fft

    n = lines.shape[0]
    spec = _fft.rfft(lines, axis=0)
    if n % 2 == 0:
        spec[-1] *= 0.5
    return _fft.irfft(spec, n=n * factor, axis=0) * factor


def _n_cpus() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        return os.cpu_count() or 1


_THREADS = max(1, min(4, _n_cpus()))
_POOL = None


def _pool():
    global _POOL
    if _POOL is None:
        _POOL = ThreadPoolExecutor(max_workers=_THREADS)
    return _POOL


def interp_pe(img: np.ndarray, shift: np.ndarray, *, with_derivative: bool = True, upsample: int = 1):
    """Sample ``img`` along PE at ``y + shift(y)`` by cubic convolution.

    Parameters
    ----------
    img : ndarray, shape (n, ...)
        Image with the PE axis first.
    shift : ndarray, same shape
        Displacement along PE, voxels.
    with_derivative : bool
        Also return the derivative of the interpolant along PE (per voxel).
    upsample : int
        When above 1, each line is first DFT-interpolated onto a grid this many
        times finer (:func:`band_limited_upsample`), then sampled by cubic convolution.

    Returns
    -------
    value : ndarray, shape (n, ...)
    deriv : ndarray, shape (n, ...), only when ``with_derivative``
    """
    return LineSampler(img, upsample=upsample).sample(shift, with_derivative=with_derivative)


def derivative_pe(u: np.ndarray) -> np.ndarray:
    """Discrete derivative along PE (axis 0): central inside, one-sided at the ends."""
    out = np.empty_like(u, dtype=np.float64)
    if u.shape[0] < 2:
        out[...] = 0.0
        return out
    out[1:-1] = 0.5 * (u[2:] - u[:-2])
    out[0] = u[1] - u[0]
    out[-1] = u[-1] - u[-2]
    return out


def jacobian_bands(a: np.ndarray | None, b: np.ndarray):
    """Bands of ``diag(a) + diag(b) D`` on each PE line.

    Returns ``(lo, mid, up)``: row ``y`` of the matrix has ``lo[y]`` at column
    ``y-1``, ``mid[y]`` at ``y`` and ``up[y]`` at ``y+1`` (``lo[0] = up[-1] = 0``).
    """
    mid = np.zeros_like(b) if a is None else np.array(a, dtype=np.float64, copy=True)
    lo = np.zeros_like(b)
    up = np.zeros_like(b)
    lo[1:-1] = -0.5 * b[1:-1]
    up[1:-1] = 0.5 * b[1:-1]
    mid[0] -= b[0]
    up[0] = b[0]
    mid[-1] += b[-1]
    lo[-1] = -b[-1]
    return lo, mid, up


def gram_bands(lo, mid, up, out=None, scale: float = 1.0):
    """Bands ``(h0, h1, h2)`` of ``J^T J`` (symmetric pentadiagonal per line).

    ``h0[i] = (J^T J)[i, i]``, ``h1[i] = (J^T J)[i, i+1]`` (last entry 0),
    ``h2[i] = (J^T J)[i, i+2]`` (last two entries 0).  Added (times
    ``scale``) into ``out`` when given.
    """
    if out is None:
        out = (np.zeros_like(mid), np.zeros_like(mid), np.zeros_like(mid))
    h0, h1, h2 = out
    h0 += scale * mid * mid
    h0[1:] += scale * up[:-1] ** 2
    h0[:-1] += scale * lo[1:] ** 2
    h1[:-1] += scale * (mid[:-1] * up[:-1] + lo[1:] * mid[1:])
    h2[:-2] += scale * (lo[1:-1] * up[1:-1])
    return out


def apply_bands(lo, mid, up, x):
    """``J x`` for the tridiagonal line operator of :func:`jacobian_bands`."""
    y = mid * x
    y[1:] += lo[1:] * x[:-1]
    y[:-1] += up[:-1] * x[1:]
    return y


def apply_bands_T(lo, mid, up, r):
    """``J^T r`` for the tridiagonal line operator of :func:`jacobian_bands`."""
    y = mid * r
    y[1:] += up[:-1] * r[:-1]
    y[:-1] += lo[1:] * r[1:]
    return y


def band_matvec(h0, h1, h2, x):
    """Product of the symmetric pentadiagonal line operator with ``x``."""
    y = h0 * x
    y[:-1] += h1[:-1] * x[1:]
    y[1:] += h1[:-1] * x[:-1]
    y[:-2] += h2[:-2] * x[2:]
    y[2:] += h2[:-2] * x[:-2]
    return y


def barrier(jac: np.ndarray):
    """Invertibility barrier ``psi(v) = (v - 1)^2 / v`` and its derivatives.

    ``psi`` is zero at ``v = 1``, convex for ``v > 0`` and infinite as the
    Jacobian ``v`` of the displacement tends to 0, so the minimiser keeps
    ``1 + d' > 0`` for every image (the role of the barrier term in Ruthotto
    et al. 2012).  Returns ``(psi, psi', psi'')``; ``psi = inf`` where ``v <= 0``.
    """
    v = np.asarray(jac, dtype=np.float64)
    ok = v > 0
    safe = np.where(ok, v, 1.0)
    psi = np.where(ok, (safe - 1.0) ** 2 / safe, np.inf)
    d1 = 1.0 - 1.0 / safe ** 2
    d2 = 2.0 / safe ** 3
    return psi, d1, d2


def unwarp(img: np.ndarray, d: np.ndarray, *, upsample: int = 1) -> np.ndarray:
    """Unwarp one image given its displacement ``d`` (voxels, PE axis first).

    Returns ``I(y + d(y)) * (1 + d'(y))``, the Jacobian-modulated unwarped
    image of Chang & Fitzpatrick (1992); ``upsample`` as in :func:`interp_pe`.
    """
    return interp_pe(img, d, with_derivative=False, upsample=upsample) * (1.0 + derivative_pe(d))
