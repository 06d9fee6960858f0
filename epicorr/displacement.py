"""From a B0 field map to voxel displacement along the phase-encode axis.

The pixel-shift model (Jezzard & Balaban 1995)
----------------------------------------------
In EPI the phase-encode (PE) direction has a very low bandwidth per voxel,
``1 / (Δt N)`` Hz, where ``Δt`` is the effective echo spacing and ``N`` the
number of reconstructed PE lines (see :mod:`epicorr.geometry`).  A spin off
resonance by ``Δf`` Hz is therefore reconstructed ``Δf Δt N`` voxels away from
its true position along PE; along the readout and slice axes the shift is
negligible.  With the PE direction ``PEDirection(axis, polarity)``:

    ``d(y) = polarity * Δf(y) * voxels_per_hz``     (voxels)

Conventions
-----------
* ``d`` is defined on the **undistorted** grid: signal from undistorted
  position ``y`` (index along the PE array axis) appears in the distorted
  image at ``y_d = y + d(y)``.  A positive field with PE ``j`` moves signal
  towards increasing ``j``; with ``j-`` towards decreasing ``j``.
* The PE axis is the array axis named by BIDS ``PhaseEncodingDirection``,
  whatever the affine; nothing here looks at the affine.
* The Jacobian of the mapping is ``J = 1 + dd/dy`` (central differences);
  signal conservation gives ``I_dist(y + d) J = I(y)``.  Where ``J <= 0`` the
  mapping folds over (several positions land on the same distorted voxel) and
  cannot be inverted.
* The inverse displacement ``d_inv`` is defined on the **distorted** grid:
  ``y_d = y + d(y)``  <=>  ``y = y_d + d_inv(y_d)``.  Forward simulation of
  distortion (:func:`distort`) is unwarping with ``d_inv``:
  ``I_dist(y_d) = I(y_d + d_inv(y_d)) (1 + d_inv'(y_d))``.

References
----------
Jezzard P, Balaban RS. Correction for geometric distortion in echo planar
images from B0 field variations. Magn Reson Med 1995;34:65-73.

Chang H, Fitzpatrick JM. A technique for accurate magnetic resonance imaging
in the presence of field inhomogeneities. IEEE Trans Med Imaging
1992;11:319-329 (the Jacobian intensity correction).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .errors import EpicorrInputError
from .geometry import PEDirection, parse_pe_direction
from .options import Interpolation

__all__ = [
    "field_to_displacement",
    "displacement_to_mm",
    "displacement_jacobian",
    "foldover_mask",
    "invert_displacement",
    "distort",
]

#: Largest plausible |displacement| as a fraction of the PE matrix (common practice:
#: susceptibility shifts are a few voxels, rarely over 10 % of the FOV; half the
#: FOV means a unit slip, e.g. rad/s or T read as Hz).
MAX_SHIFT_FRACTION = 0.5


def _axis(pe_axis: Any) -> int:
    axis = getattr(pe_axis, "axis", pe_axis)  # accept a PEDirection
    if isinstance(axis, bool) or not isinstance(axis, (int, np.integer)) or int(axis) not in (0, 1, 2):
        raise EpicorrInputError("phase-encode axis must be 0, 1 or 2", key="pe_axis", value=pe_axis,
                                hint="use PEDirection.axis from parse_pe_direction")
    return int(axis)


def _displacement(disp_vox: Any, *, name: str = "displacement") -> np.ndarray:
    disp = np.asarray(disp_vox, dtype=np.float64)
    if disp.ndim != 3:
        raise EpicorrInputError(f"{name} must be a 3-D array", key="shape", value=disp.shape)
    if not np.all(np.isfinite(disp)):
        raise EpicorrInputError(f"{name} contains NaN or infinite values", key=name,
                                hint="fill or mask the field map first")
    return disp


def field_to_displacement(field_hz: Any, *, pe: PEDirection | str, voxels_per_hz: float) -> np.ndarray:
    """Convert a field map to displacement along the phase-encode axis.

    Parameters
    ----------
    field_hz : array_like, shape (X, Y, Z)
        Off-resonance in Hz on the target (EPI) grid, undistorted space.
        Must be finite.
    pe : PEDirection or str
        Phase-encode direction (BIDS code such as ``"j-"`` accepted).
    voxels_per_hz : float
        ``EffectiveEchoSpacing * N_PE`` in s (= voxels per Hz), from
        :attr:`epicorr.geometry.ReadoutTiming.voxels_per_hz`.

    Returns
    -------
    ndarray, shape (X, Y, Z), float64
        ``d = polarity * field_hz * voxels_per_hz`` in voxels along
        ``pe.axis``, undistorted space.

    Raises
    ------
    EpicorrInputError
        Non-finite field, not 3-D, or a non-positive/non-finite ``voxels_per_hz``.

    Examples
    --------
    >>> d = field_to_displacement(np.full((2, 2, 2), 100.0), pe="j-", voxels_per_hz=0.5e-3 * 64)
    >>> float(d[0, 0, 0])  # 100 Hz * 0.5 ms * 64 lines, towards decreasing j
    -3.2
    """
    pe = parse_pe_direction(pe)
    if isinstance(voxels_per_hz, bool) or not isinstance(voxels_per_hz, (int, float, np.floating)) \
            or not math.isfinite(float(voxels_per_hz)) or float(voxels_per_hz) <= 0:
        raise EpicorrInputError("must be a positive, finite number (EffectiveEchoSpacing * N_PE, s)",
                                key="voxels_per_hz", value=voxels_per_hz,
                                hint="derive it with epicorr.geometry.readout_timing")
    field = np.asarray(field_hz, dtype=np.float64)
    if field.ndim != 3:
        raise EpicorrInputError("field map must be 3-D", key="shape", value=field.shape,
                                hint="give one field volume in Hz")
    if not np.all(np.isfinite(field)):
        raise EpicorrInputError("field map contains NaN or infinite values", key="field",
                                hint="fill or mask the field map before use")
    disp = field * (pe.polarity * float(voxels_per_hz))
    n_pe = field.shape[pe.axis]
    largest = float(np.max(np.abs(disp))) if disp.size else 0.0
    if largest > MAX_SHIFT_FRACTION * n_pe:
        raise EpicorrInputError(
            f"field moves signal by up to {largest:.1f} voxels, more than half of the "
            f"{n_pe} voxels along the phase-encode axis (the image would fold onto itself)",
            key="field", value=f"{float(np.max(np.abs(field))):.1f} Hz",
            hint="check the field map's Units (Hz expected) and the echo spacing")
    return disp


def displacement_to_mm(disp_vox: Any, *, pe_axis: int, zooms: Any) -> np.ndarray:
    """Displacement in millimetres along the phase-encode array axis.

    Parameters
    ----------
    disp_vox : array_like, shape (X, Y, Z)
        Displacement in voxels.
    pe_axis : int
        Phase-encode array axis.
    zooms : sequence of float
        Voxel sizes in mm (``img.header.get_zooms()[:3]``).

    Returns
    -------
    ndarray, shape (X, Y, Z), float64
        Signed displacement in mm along the array axis (the sign follows the
        array index, not a world direction).
    """
    axis = _axis(pe_axis)
    z = [float(v) for v in tuple(zooms)[:3]]
    if len(z) < 3 or not all(math.isfinite(v) and v > 0 for v in z):
        raise EpicorrInputError("voxel sizes must be three positive numbers (mm)", key="zooms",
                                value=tuple(zooms))
    return np.asarray(disp_vox, dtype=np.float64) * z[axis]


def displacement_jacobian(disp_vox: Any, *, pe_axis: int) -> np.ndarray:
    """Jacobian ``1 + dd/dy`` of the mapping ``y -> y + d(y)``.

    Parameters
    ----------
    disp_vox : array_like, shape (X, Y, Z)
        Displacement in voxels along ``pe_axis``.
    pe_axis : int
        Phase-encode array axis.

    Returns
    -------
    ndarray, shape (X, Y, Z), float64
        Central differences inside the line, one-sided differences at its two
        ends (:func:`numpy.gradient`); ``1`` for a line of one voxel.
    """
    axis = _axis(pe_axis)
    disp = np.asarray(disp_vox, dtype=np.float64)
    if disp.ndim != 3:
        raise EpicorrInputError("displacement must be a 3-D array", key="shape", value=disp.shape)
    if disp.shape[axis] < 2:
        return np.ones_like(disp)
    return 1.0 + np.gradient(disp, axis=axis)


def foldover_mask(disp_vox: Any, *, pe_axis: int) -> np.ndarray:
    """Where the mapping is not invertible (Jacobian ``<= 0``).

    Returns
    -------
    ndarray of bool, shape (X, Y, Z)
        True where neighbouring positions cross over each other: signal there
        is piled up in the distorted image and cannot be separated.
    """
    return displacement_jacobian(disp_vox, pe_axis=pe_axis) <= 0.0


def invert_displacement(disp_vox: Any, *, pe_axis: int, refine: bool = True) -> np.ndarray:
    """Inverse displacement, defined on the distorted grid.

    Parameters
    ----------
    disp_vox : array_like, shape (X, Y, Z)
        Displacement ``d`` in voxels (undistorted space), finite.
    pe_axis : int
        Phase-encode array axis.
    refine : bool
        Polish the line-wise linear inverse with two Newton steps using the
        cubic B-spline of ``d`` (accuracy then follows the spline rather than
        linear interpolation of the forward map).

    Returns
    -------
    ndarray, shape (X, Y, Z), float64
        ``d_inv`` with ``y = y_d + d_inv(y_d)`` whenever ``y_d = y + d(y)``.

    Notes
    -----
    Per PE line, the forward map ``f(y) = y + d(y)`` is inverted with
    :func:`numpy.interp` (all lines at once, each offset so the concatenated
    knots stay increasing).  Beyond the ends of ``f`` the end displacements
    are continued (``d_inv = -d(0)`` before the first, ``-d(N-1)`` after the
    last).  Where the line folds over (Jacobian ``<= 0``) ``f`` is replaced
    by its running maximum, so every distorted position maps to the first
    undistorted position reaching it; see :func:`foldover_mask`.
    """
    axis = _axis(pe_axis)
    disp = _displacement(disp_vox)
    n = disp.shape[axis]
    lines = np.moveaxis(disp, axis, -1).reshape(-1, n)          # (L, N)
    y = np.arange(n, dtype=np.float64)
    fwd = np.maximum.accumulate(y + lines, axis=1)              # monotone forward map
    span = float(np.ptp(fwd)) + 2.0 * n + 4.0 if fwd.size else 1.0
    offset = (np.arange(lines.shape[0], dtype=np.float64) * span)[:, None]
    knots_x = (fwd - fwd[:, :1] + offset).ravel()               # increasing over all lines
    knots_y = np.broadcast_to(y, lines.shape).ravel()
    query = y[None, :] - fwd[:, :1] + offset                    # y_d relative to line start
    y_src = np.interp(query.ravel(), knots_x, knots_y).reshape(lines.shape)
    before = y[None, :] < fwd[:, :1]
    after = y[None, :] > fwd[:, -1:]
    y_src = np.where(before, y[None, :] - lines[:, :1], y_src)
    y_src = np.where(after, y[None, :] - lines[:, -1:], y_src)
    inv = y_src - y[None, :]
    inv = np.moveaxis(inv.reshape(np.moveaxis(disp, axis, -1).shape), -1, axis)
    if refine and n >= 4:
        inv = _newton_refine(disp, inv, axis=axis)
    return np.ascontiguousarray(inv)


#: Voxels of quadratic extrapolation added at each line end before the spline of
#: ``d`` is taken: a mirror-extended spline would bend a sloping displacement
#: near the ends.
_PAD = 6


def _pad_quadratic(arr: np.ndarray, *, axis: int, pad: int) -> np.ndarray:
    """Extend ``arr`` by ``pad`` samples at both ends of ``axis`` with the parabola
    through the three end samples (linear for lines shorter than 3)."""
    a = np.moveaxis(arr, axis, -1)
    k = np.arange(1, pad + 1, dtype=np.float64)

    def extend(e0, e1, e2):  # samples at 0, 1, 2 voxels in from the end; x = -k
        slope = (-3.0 * e0 + 4.0 * e1 - e2) / 2.0
        curve = (e0 - 2.0 * e1 + e2) / 2.0
        return e0 - k * slope + k * k * curve

    if a.shape[-1] >= 3:
        lo = extend(a[..., :1], a[..., 1:2], a[..., 2:3])[..., ::-1]
        hi = extend(a[..., -1:], a[..., -2:-1], a[..., -3:-2])
    else:
        lo = a[..., :1] - k[::-1] * (a[..., 1:2] - a[..., :1])
        hi = a[..., -1:] + k * (a[..., -1:] - a[..., -2:-1])
    return np.moveaxis(np.concatenate([lo, a, hi], axis=-1), -1, axis)


def _newton_refine(disp: np.ndarray, inv: np.ndarray, *, axis: int, steps: int = 2) -> np.ndarray:
    """Solve ``s + d(s) = y_d`` for ``s = y_d + inv`` by Newton steps on the spline of ``d``."""
    from .unwarp import LineResampler

    n = disp.shape[axis]
    shape = [1, 1, 1]
    shape[axis] = n
    y_d = np.arange(n, dtype=np.float64).reshape(shape)
    padded = _pad_quadratic(disp, axis=axis, pad=_PAD)
    jac = displacement_jacobian(padded, pe_axis=axis)
    src = y_d + inv
    # Positions live on the padded line; the pads are dummies (sampled, ignored).
    where = [slice(None)] * 3
    where[axis] = slice(_PAD, _PAD + n)
    where = tuple(where)
    pos = np.zeros(padded.shape)
    for _ in range(steps):
        inside = (src >= 0) & (src <= n - 1)
        if not inside.any():
            break
        pos[where] = np.where(inside, src, 0.0) + _PAD
        d_at = LineResampler(pos, axis=axis, interpolation=Interpolation.CUBIC)(padded)[where]
        j_at = LineResampler(pos, axis=axis, interpolation=Interpolation.LINEAR)(jac)[where]
        residual = src + d_at.astype(np.float64) - y_d
        ok = inside & (j_at > 0.1)
        step = np.clip(residual / np.where(ok, j_at, 1.0), -1.0, 1.0)
        src = np.where(ok, src - step, src)
    return src - y_d


def distort(image: Any, disp_vox: Any, *, pe_axis: int, interpolation: Any = Interpolation.CUBIC,
            jacobian: bool = True) -> np.ndarray:
    """Apply the forward pixel-shift model (simulate EPI distortion).

    Parameters
    ----------
    image : array_like, shape (X, Y, Z) or (X, Y, Z, T)
        Undistorted image (e.g. an anatomical image resampled to the EPI grid).
    disp_vox : array_like, shape (X, Y, Z)
        Displacement ``d`` in voxels, undistorted space.
    pe_axis : int
        Phase-encode array axis.
    interpolation : Interpolation or str
        ``"cubic"`` (default) or ``"linear"``.
    jacobian : bool
        Apply the intensity change of the model: signal piles up where lines
        are compressed (``1 / J``).  Set False to warp geometry only (e.g. an
        anatomical image or a mask into EPI space).

    Returns
    -------
    ndarray, float32, shape of ``image``
        ``I_dist(y_d) = I(y_d + d_inv(y_d)) * (1 + d_inv'(y_d))``.
    """
    from .unwarp import unwarp

    axis = _axis(pe_axis)
    inv = invert_displacement(disp_vox, pe_axis=axis)
    return unwarp(image, inv, pe_axis=axis, interpolation=interpolation, jacobian=jacobian)
