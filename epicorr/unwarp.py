"""Unwarping: resample EPI volumes along the phase-encode axis.

Model (Jezzard & Balaban 1995)
------------------------------
Off-resonance moves signal along the phase-encode (PE) axis only.  With the
displacement ``d(y)`` in voxels, defined on the undistorted grid (see
:mod:`epicorr.displacement`), signal from undistorted position ``y`` is
reconstructed at ``y + d(y)``.  Conservation of signal along the line,
``I_dist(y + d(y)) (1 + d'(y)) dy = I(y) dy``, gives the correction

    ``I_corr(y) = I_dist(y + d(y)) * (1 + d'(y))``

where ``1 + d'(y)`` is the Jacobian of the mapping (intensity modulation,
optional).  Only one axis is resampled, so the work is a 1-D interpolation on
every PE line of the volume.

Interpolation
-------------
* ``cubic`` (default): cubic B-spline.  Each volume is prefiltered along the
  PE axis (the recursive filter of Unser 1999 with pole ``sqrt(3) - 2`` and
  the mirror boundary, i.e. the line extended by mirror symmetry about its
  first and last voxel centres: exactly what
  :func:`scipy.ndimage.spline_filter1d` computes with ``mode="mirror"``, which
  is used when PE lines are contiguous in memory; otherwise a numpy version
  running over all lines at once is about 3x faster), then evaluated with the
  4-tap B-spline kernel.
* ``linear``: 2-tap linear interpolation, no prefilter.

Field of view and the half-voxel edge rule
------------------------------------------
Voxel ``n`` covers ``[n - 0.5, n + 0.5)``, so a line of ``N`` voxels spans
``[-0.5, N - 0.5]`` in voxel coordinates.  Samples inside that extent are
interpolated (in the half voxel beyond the outermost centres the mirror
extension of the prefilter is used, so the value continues smoothly and
symmetrically); samples further out are **zero** (no signal was acquired
there).  Within ``[0, N - 1]`` the result equals
``scipy.ndimage.map_coordinates(order=3, mode="mirror")`` on the same
coordinates.

NaN safety
----------
NaN voxels are treated as 0 by the interpolator, so they never spread along
the line through the spline prefilter; an output sample is NaN only when a NaN
voxel lies less than one voxel from its sampling position (the support of
linear interpolation).  Outside the field of view the output is 0.

Speed and memory
----------------
:class:`LineResampler` precomputes the sampling plan once (a sparse matrix
with 2 or 4 weights per output voxel, the Jacobian folded into the weights),
then applies it to each volume: prefilter (float32 result) and one sparse
matrix-vector product.  :func:`unwarp` streams a 4-D series volume by volume
(never converting the whole series to float64) and uses a few threads; both
steps release the GIL.  Series are fastest in the layout nibabel returns
(Fortran order, each volume contiguous); a C-ordered 4-D array works but each
volume is then gathered with a large stride.  Measured by
``benchmarks/bench_unwarp.py``.

References
----------
Jezzard P, Balaban RS. Correction for geometric distortion in echo planar
images from B0 field variations. Magn Reson Med 1995;34:65-73.

Unser M. Splines: a perfect fit for signal and image processing. IEEE Signal
Process Mag 1999;16(6):22-38.
"""

from __future__ import annotations

import math
import os
import threading
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np
import scipy.ndimage as ndi
import scipy.sparse as sp

try:  # the compiled CSR kernel behind ``csr_matrix @ vector``; lets us write in place
    from scipy.sparse import _sparsetools
except ImportError:  # pragma: no cover
    _sparsetools = None

from .errors import EpicorrInputError
from .options import Interpolation, parse_option

__all__ = ["LineResampler", "resample_along_axis", "unwarp", "sampling_plan", "bspline_coefficients",
           "default_threads"]


def default_threads() -> int:
    """Threads used by :func:`unwarp` by default: the CPUs this process may use, at most 4."""
    try:
        n = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # pragma: no cover - non-Linux
        n = os.cpu_count() or 1
    return max(1, min(4, n))


def _check_axis(axis: Any) -> int:
    axis = getattr(axis, "axis", axis)  # accept a PEDirection
    if isinstance(axis, bool) or not isinstance(axis, (int, np.integer)) or int(axis) not in (0, 1, 2):
        raise EpicorrInputError("phase-encode axis must be 0, 1 or 2", key="pe_axis", value=axis,
                                hint="use PEDirection.axis from parse_pe_direction")
    return int(axis)


def _mirror(idx: np.ndarray, n: int) -> np.ndarray:
    """Fold indices into ``[0, n-1]`` by mirror symmetry about the end voxel centres."""
    if n == 1:
        return np.zeros_like(idx)
    period = 2 * (n - 1)
    r = np.mod(idx, period)
    return np.where(r > n - 1, period - r, r)


_POLE = math.sqrt(3.0) - 2.0


def bspline_coefficients(volume: np.ndarray, *, axis: int, out: np.ndarray | None = None) -> np.ndarray:
    """Cubic B-spline coefficients along one axis, mirror boundary, float32.

    Equals ``scipy.ndimage.spline_filter1d(volume, order=3, axis=axis,
    mode="mirror")`` to float32 precision (tested).  Lines contiguous in memory
    (and lines shorter than 16) go to scipy; otherwise the two first-order recursions (causal, then
    anticausal; Unser 1999, with the mirror initial values) run over all lines
    at once, one plane at a time.

    Parameters
    ----------
    volume : ndarray
        Any real dtype, any number of dimensions.
    axis : int
    out : ndarray, float32, optional

    Returns
    -------
    ndarray, float32, shape of ``volume``
    """
    vol = np.asanyarray(volume)
    if out is None:
        out = np.empty(vol.shape, dtype=np.float32, order="F" if vol.flags.f_contiguous else "C")
    n = vol.shape[axis]
    if n < 16 or (vol.strides[axis] == vol.itemsize and (vol.flags.c_contiguous or vol.flags.f_contiguous)):
        ndi.spline_filter1d(vol, order=3, axis=axis, mode="mirror", output=out)
        return out
    x = np.moveaxis(vol, axis, 0)
    c = np.moveaxis(out, axis, 0)
    z = np.float32(_POLE)
    tmp = np.empty_like(c[0])  # same memory layout as a plane of c (matters for speed)
    # Causal pass.  Mirror start (Unser 1999, the line extended with period
    # 2n - 2): c+[0] = (x0 + z^(n-1) x[n-1] + sum_k (z^k + z^(2n-2-k)) x[k]) / (1 - z^(2n-2));
    # terms below 1e-10 are dropped (so at most about 36 planes are read).
    k = np.arange(n, dtype=np.float64)
    w = _POLE ** k + np.where((k > 0) & (k < n - 1), _POLE ** (2 * n - 2 - k), 0.0)
    w /= 1.0 - _POLE ** (2 * n - 2)
    c[0] = x[0]
    for j in np.flatnonzero(np.abs(w) > 1e-10)[1:]:
        np.multiply(x[j], np.float32(w[j]), out=tmp)
        c[0] += tmp
    for k in range(1, n):
        np.multiply(c[k - 1], z, out=tmp)
        np.add(x[k], tmp, out=c[k])
    # Anticausal pass; mirror start c-[n-1] = z / (z^2 - 1) (c+[n-1] + z c+[n-2]).
    np.multiply(c[n - 2], z, out=tmp)
    tmp += c[n - 1]
    np.multiply(tmp, z / (z * z - 1), out=c[n - 1])
    for k in range(n - 2, -1, -1):
        np.subtract(c[k + 1], c[k], out=tmp)
        np.multiply(tmp, z, out=c[k])
    out *= np.float32(6.0)  # the gain of the two recursions, (1 - z)(1 - 1/z)
    return out


def _taps(x: np.ndarray, interpolation: Interpolation) -> tuple[np.ndarray, np.ndarray]:
    """First tap index and weights (taps, ...) for positions ``x`` (float64)."""
    i0 = np.floor(x)
    t = x - i0
    if interpolation is Interpolation.LINEAR:
        return i0.astype(np.int64), np.stack([1.0 - t, t])
    t2 = t * t
    t3 = t2 * t
    w = np.stack([(1.0 - t) ** 3 / 6.0,
                  (3.0 * t3 - 6.0 * t2 + 4.0) / 6.0,
                  (-3.0 * t3 + 3.0 * t2 + 3.0 * t + 1.0) / 6.0,
                  t3 / 6.0])
    return i0.astype(np.int64) - 1, w


class LineResampler:
    """A precomputed plan resampling 3-D volumes along one axis.

    Parameters
    ----------
    coords : ndarray, shape (X, Y, Z)
        For every output voxel, the position (in voxels, float) along ``axis``
        at which to sample the input; the other two indices are the output
        voxel's own.
    axis : int
        The array axis to resample along (0, 1 or 2).
    interpolation : Interpolation or str
        ``"cubic"`` (B-spline, default) or ``"linear"``.
    scale : ndarray, shape (X, Y, Z), optional
        Multiplies each output voxel (e.g. the Jacobian); folded into the weights.

    Notes
    -----
    Positions outside ``[-0.5, N - 0.5]`` give 0 (see the module notes for the
    edge rule).  The plan holds about 30 bytes per voxel (cubic).  Applying it
    is thread-safe.
    """

    def __init__(self, coords: np.ndarray, *, axis: int, interpolation: Any = Interpolation.CUBIC,
                 scale: np.ndarray | None = None) -> None:
        self.axis = _check_axis(axis)
        self.interpolation = parse_option(Interpolation, interpolation, name="interpolation")
        coords = np.asarray(coords, dtype=np.float64)
        if coords.ndim != 3:
            raise EpicorrInputError("sampling coordinates must be a 3-D array", key="coords",
                                    value=coords.shape)
        if not np.all(np.isfinite(coords)):
            raise EpicorrInputError("sampling coordinates contain NaN or infinite values",
                                    key="coords", hint="check the displacement field")
        if scale is not None:
            scale = np.asarray(scale, dtype=np.float64)
            if scale.shape != coords.shape:
                raise EpicorrInputError("scale does not match the coordinate grid", key="scale",
                                        value=scale.shape)
        self.shape = coords.shape
        self._coords = coords
        self._scale = scale
        n = self.shape[self.axis]
        self._inside = (coords >= -0.5) & (coords <= n - 0.5)
        self._plans: dict[str, tuple[sp.csr_matrix, np.ndarray, np.ndarray]] = {}
        self._lock = threading.Lock()
        self._local = threading.local()

    # -- plan construction -------------------------------------------------
    def _plan(self, order: str) -> tuple[sp.csr_matrix, np.ndarray, np.ndarray]:
        """Sparse matrix and NaN-support indices for flat data in C or F order."""
        with self._lock:
            if order not in self._plans:
                self._plans[order] = self._build(order)
            return self._plans[order]

    def _build(self, order: str) -> tuple[sp.csr_matrix, np.ndarray, np.ndarray]:
        shape, axis = self.shape, self.axis
        n = shape[axis]
        x = self._coords.ravel(order=order)
        inside = self._inside.ravel(order=order)
        first, w = _taps(x, self.interpolation)
        if self._scale is not None:
            w = w * self._scale.ravel(order=order)
        w = np.where(inside, w, 0.0).astype(np.float32)
        # Flat index of each output voxel's own position, minus its axis part.
        grid = np.indices(shape, sparse=True)
        strides = np.ones(3, dtype=np.int64)
        if order == "C":
            strides[1] = shape[2]
            strides[0] = shape[1] * shape[2]
        else:
            strides[1] = shape[0]
            strides[2] = shape[0] * shape[1]
        base = np.zeros(shape, dtype=np.int64)
        for ax in range(3):
            if ax != axis:
                base = base + grid[ax] * strides[ax]
        base = base.ravel(order=order)
        stride = strides[axis]
        ntaps = w.shape[0]
        cols = np.empty((x.size, ntaps), dtype=np.int32 if x.size * 1 < 2**31 else np.int64)
        for k in range(ntaps):
            cols[:, k] = base + _mirror(first + k, n) * stride
        mat = sp.csr_matrix((np.ascontiguousarray(w.T).ravel(), cols.ravel(),
                             np.arange(0, x.size * ntaps + 1, ntaps, dtype=cols.dtype)),
                            shape=(x.size, x.size))
        # Linear support (voxels within one voxel of the sample) for the NaN rule.
        lin_first = np.floor(x).astype(np.int64)
        frac = x - lin_first
        lo = np.where(inside, base + _mirror(lin_first, n) * stride, -1)
        hi = np.where(inside & (frac > 0), base + _mirror(lin_first + 1, n) * stride, -1)
        return mat, lo, hi

    # -- application -------------------------------------------------------
    def __call__(self, volume: Any, *, out: np.ndarray | None = None) -> np.ndarray:
        """Resample one volume.

        Parameters
        ----------
        volume : array_like, shape (X, Y, Z)
            Any real dtype; not modified.
        out : ndarray, shape (X, Y, Z), float32, optional
            Where to write the result.

        Returns
        -------
        ndarray, shape (X, Y, Z), float32
        """
        vol = np.asanyarray(volume)
        if vol.shape != self.shape:
            raise EpicorrInputError("volume does not match the sampling grid", key="shape",
                                    value=vol.shape, hint=f"expected {self.shape}")
        order = "F" if (vol.flags.f_contiguous and not vol.flags.c_contiguous) else "C"
        mat, lo, hi = self._plan(order)
        nan = None
        if vol.dtype.kind == "f":
            # A float64 sum is cheap and NaN/inf-propagating: only then look closer.
            if not np.isfinite(vol.sum(dtype=np.float64)):
                nan_vox = np.isnan(vol)
                if nan_vox.any():
                    nan = nan_vox.ravel(order=order)
                    vol = np.where(nan_vox, 0, vol)
        elif vol.dtype.kind not in "iub":
            raise EpicorrInputError("volume must hold real numbers", key="dtype", value=str(vol.dtype))
        coef = self._scratch(order)
        if self.interpolation is Interpolation.CUBIC:
            bspline_coefficients(vol, axis=self.axis, out=coef)
        else:
            coef[...] = vol
        direct = (out is not None and out.dtype == np.float32 and out.shape == self.shape
                  and (out.flags.f_contiguous if order == "F" else out.flags.c_contiguous))
        flat = out.reshape(-1, order=order) if direct else np.empty(coef.size, dtype=np.float32)
        _matvec(mat, coef.reshape(-1, order=order), flat)
        if nan is not None:
            padded = np.append(nan, False)  # index -1 -> False
            flat[padded[lo] | padded[hi]] = np.nan
        if direct:
            return out
        res = flat.reshape(self.shape, order=order)
        if out is None:
            return res
        out[...] = res
        return out

    def _scratch(self, order: str) -> np.ndarray:
        """A per-thread float32 work array (reused: fresh large arrays cost page faults)."""
        buf = getattr(self._local, order, None)
        if buf is None:
            buf = np.empty(self.shape, dtype=np.float32, order=order)
            setattr(self._local, order, buf)
        return buf


def _matvec(mat: sp.csr_matrix, x: np.ndarray, y: np.ndarray) -> None:
    """``y[:] = mat @ x`` without allocating (scipy's compiled kernel when available)."""
    kernel = getattr(_sparsetools, "csr_matvec", None) if _sparsetools is not None else None
    if kernel is None or mat.dtype != np.float32 or x.dtype != np.float32:  # pragma: no cover
        y[:] = mat @ x
        return
    y.fill(0.0)  # the kernel accumulates
    try:
        kernel(mat.shape[0], mat.shape[1], mat.indptr, mat.indices, mat.data, x, y)
    except (TypeError, ValueError):  # pragma: no cover - a changed private signature
        y[:] = mat @ x


def resample_along_axis(volume: Any, coords: np.ndarray, *, axis: int,
                        interpolation: Any = Interpolation.CUBIC) -> np.ndarray:
    """Sample a 3-D volume at new positions along one array axis.

    Parameters
    ----------
    volume : array_like, shape (X, Y, Z)
        Input intensities (any real dtype; NaN-safe, see module notes).
    coords : ndarray, shape (X, Y, Z)
        Sampling position along ``axis`` (voxels) for every output voxel.
    axis : int
        Array axis (0 = i, 1 = j, 2 = k).
    interpolation : Interpolation or str
        ``"cubic"`` B-spline (prefilter ``mode="mirror"``) or ``"linear"``.

    Returns
    -------
    ndarray, shape (X, Y, Z), float32
        Zero where the position is outside ``[-0.5, N - 0.5]``.

    Examples
    --------
    >>> import numpy as np
    >>> v = np.arange(5.0)[None, :, None] * np.ones((1, 5, 1))
    >>> c = np.full(v.shape, 2.5)
    >>> float(resample_along_axis(v, c, axis=1, interpolation="linear")[0, 0, 0])
    2.5
    """
    return LineResampler(coords, axis=axis, interpolation=interpolation)(volume)


def _check_data(data: Any, disp: np.ndarray) -> tuple[int, ...]:
    shape = tuple(int(s) for s in getattr(data, "shape", ()))
    if len(shape) not in (3, 4):
        raise EpicorrInputError(f"data must be 3-D or 4-D, got {len(shape)}-D", key="shape",
                                value=shape, hint="give one volume or one series (x, y, z, t)")
    if disp.ndim != 3 or disp.shape != shape[:3]:
        raise EpicorrInputError("displacement grid does not match the data grid",
                                key="shape", value=disp.shape,
                                hint=f"resample the field map to the EPI grid {shape[:3]} first")
    if not np.all(np.isfinite(disp)):
        raise EpicorrInputError("displacement contains NaN or infinite values", key="displacement",
                                hint="fill or mask the field map before unwarping")
    if min(shape) == 0:
        raise EpicorrInputError("data has a zero-size dimension", key="shape", value=shape)
    return shape


def sampling_plan(disp_vox: np.ndarray, *, pe_axis: int, interpolation: Any = Interpolation.CUBIC,
                  jacobian: bool = True) -> LineResampler:
    """The unwarping plan for a displacement field (shared by every volume).

    Parameters
    ----------
    disp_vox : ndarray, shape (X, Y, Z)
        Displacement along ``pe_axis`` in voxels, undistorted space, finite.
    pe_axis : int
        Phase-encode array axis.
    interpolation : Interpolation or str
    jacobian : bool
        Multiply by ``1 + d'(y)`` (clipped at 0 where the mapping folds over).

    Returns
    -------
    LineResampler
        Sampling at ``y + d(y)`` along ``pe_axis``.
    """
    from .displacement import displacement_jacobian

    axis = _check_axis(pe_axis)
    disp = np.asarray(disp_vox, dtype=np.float64)
    shape = [1, 1, 1]
    shape[axis] = disp.shape[axis]
    coords = disp + np.arange(disp.shape[axis], dtype=np.float64).reshape(shape)
    scale = None
    if jacobian:
        scale = np.clip(displacement_jacobian(disp, pe_axis=axis), 0.0, None)
    return LineResampler(coords, axis=axis, interpolation=interpolation, scale=scale)


def unwarp(data: Any, disp_vox: np.ndarray, *, pe_axis: int,
           interpolation: Any = Interpolation.CUBIC, jacobian: bool = True,
           out: np.ndarray | None = None, n_threads: int | None = None) -> np.ndarray:
    """Correct distortion along the phase-encode axis, volume by volume.

    Computes ``I_corr(y) = I_dist(y + d(y)) * (1 + d'(y))`` (Jezzard & Balaban
    1995) on every PE line.

    Parameters
    ----------
    data : array_like, shape (X, Y, Z) or (X, Y, Z, T)
        Distorted EPI data.  Any real dtype; a nibabel ``dataobj`` (array
        proxy) works too and is read one volume at a time.  Not modified.
    disp_vox : ndarray, shape (X, Y, Z)
        Displacement in voxels along ``pe_axis``, defined on the undistorted
        grid (:func:`epicorr.displacement.field_to_displacement`); shared by
        all volumes.  Must be finite.
    pe_axis : int
        Phase-encode array axis (0 = i, 1 = j, 2 = k), whatever the affine.
    interpolation : Interpolation or str
        ``"cubic"`` (default) or ``"linear"``.
    jacobian : bool
        Apply the Jacobian intensity modulation ``1 + d'(y)`` (central
        differences; clipped at 0 where the mapping folds over).
    out : ndarray, float32, same shape as ``data``, optional
        Output array (e.g. a memory map).
    n_threads : int, optional
        Worker threads for a 4-D series (default :func:`default_threads`).

    Returns
    -------
    ndarray, float32, shape of ``data``
        Corrected data; zero where ``y + d(y)`` leaves the field of view.
        A new 4-D array is Fortran-ordered (volumes contiguous, as nibabel).

    Raises
    ------
    EpicorrInputError
        5-D (or 2-D) data, a displacement grid not matching the data, a
        non-finite displacement, or an unsuitable ``out``.
    """
    disp = np.asarray(disp_vox)
    shape = _check_data(data, disp)
    if out is not None:
        if not isinstance(out, np.ndarray) or out.dtype != np.float32 or out.shape != shape:
            raise EpicorrInputError("out must be a float32 array with the data's shape", key="out",
                                    value=getattr(out, "shape", out))
    plan = sampling_plan(disp, pe_axis=pe_axis, interpolation=interpolation, jacobian=jacobian)
    if len(shape) == 3:
        return plan(data, out=out)
    if out is None:
        out = np.empty(shape, dtype=np.float32, order="F")
    threads = default_threads() if n_threads is None else max(1, int(n_threads))
    if threads == 1:
        for t in range(shape[3]):
            plan(np.asanyarray(data[..., t]), out=out[..., t])
        return out
    # Read volumes in this thread (array proxies stay single-threaded), resample
    # in the pool; a bounded number in flight keeps memory flat.
    with ThreadPoolExecutor(max_workers=threads) as pool:
        pending: deque = deque()
        for t in range(shape[3]):
            vol = np.asanyarray(data[..., t])
            pending.append(pool.submit(plan, vol, out=out[..., t]))
            if len(pending) >= 2 * threads:
                pending.popleft().result()
        while pending:
            pending.popleft().result()
    return out
