"""Field gradients in physical units on the voxel grid.

Conventions
-----------
* ``field_hz`` is a 3-D array (Hz) on the voxel axes ``i, j, k`` (array axes
  0, 1, 2).  The gradient along array axis ``a`` is ``d field / d s_a`` in
  **Hz per mm**, where ``s_a`` is the distance in mm travelled along the
  direction of that voxel axis in world space (the length of affine column
  ``a``).  The sign follows increasing array index, not a world axis.
* Only voxels inside ``support`` (default: every finite voxel) are used.
  Where both neighbours along the axis are in the support the derivative is
  the central difference; where one is, the one-sided difference; where none
  is, the gradient is 0 (no information).  Outside the support it is 0.  This
  keeps a masked field map (zeros or NaN outside the brain) from producing
  spurious edge gradients.
* With no mask and at least 3 voxels along the axis the array edges use a
  second-order one-sided difference (as :func:`numpy.gradient` with
  ``edge_order=2``), so a quadratic field's derivative is exact everywhere.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..errors import EpicorrInputError

__all__ = ["voxel_sizes_mm", "field_gradient_hz_per_mm"]


def voxel_sizes_mm(affine: Any) -> np.ndarray:
    """Voxel size along each array axis, mm (column norms of the affine's 3x3 block).

    Parameters
    ----------
    affine : (4, 4) array
        Voxel-to-world (RAS+ mm) affine.

    Returns
    -------
    zooms : (3,) float array, mm
    """
    aff = np.asarray(affine, dtype=np.float64)
    if aff.shape != (4, 4) or not np.all(np.isfinite(aff)):
        raise EpicorrInputError("affine must be a finite 4x4 matrix", key="affine",
                                value=getattr(aff, "shape", None), hint="pass the image affine")
    zooms = np.sqrt((aff[:3, :3] ** 2).sum(axis=0))
    if np.any(zooms <= 0):
        raise EpicorrInputError("affine has a zero-length voxel axis", key="affine",
                                value=zooms.tolist(), hint="check the image header")
    return zooms


def field_gradient_hz_per_mm(field_hz: Any, *, zooms: Any, axis: int,
                             support: Any = None) -> np.ndarray:
    """Derivative of the field along one array axis, Hz/mm.

    Parameters
    ----------
    field_hz : (I, J, K) array, Hz
        Off-resonance field on the voxel grid.
    zooms : sequence of 3 floats, mm
        Voxel size along each array axis (see :func:`voxel_sizes_mm`).
    axis : int
        Array axis (0, 1 or 2) to differentiate along.
    support : (I, J, K) bool array, optional
        Voxels whose field value is trusted (e.g. the brain mask).  Default:
        every finite voxel.

    Returns
    -------
    grad : (I, J, K) float array, Hz/mm
        ``d field / d s`` along increasing index of ``axis`` (0 outside the support).
    """
    f = np.asarray(field_hz, dtype=np.float64)
    if f.ndim != 3:
        raise EpicorrInputError("field map must be a 3-D array", key="shape", value=f.shape)
    if axis not in (0, 1, 2):
        raise EpicorrInputError("axis must be 0, 1 or 2", key="axis", value=axis)
    step = float(np.asarray(zooms, dtype=np.float64)[axis])
    finite = np.isfinite(f)
    if support is None:
        valid = finite
    else:
        valid = np.asarray(support, dtype=bool) & finite
        if valid.shape != f.shape:
            raise EpicorrInputError("mask shape differs from the field map", key="mask",
                                    value=np.asarray(support).shape,
                                    hint=f"resample the mask to the field grid {f.shape}")
    n = f.shape[axis]
    if n < 2:
        return np.zeros_like(f)
    if support is None and bool(valid.all()):
        return np.gradient(f, step, axis=axis, edge_order=2 if n >= 3 else 1)

    g = np.where(valid, f, 0.0)
    fm = np.moveaxis(g, axis, 0)
    vm = np.moveaxis(valid, axis, 0)
    prev_ok = np.zeros_like(vm)
    next_ok = np.zeros_like(vm)
    prev_ok[1:] = vm[:-1] & vm[1:]
    next_ok[:-1] = vm[1:] & vm[:-1]
    fwd = np.zeros_like(fm)
    bwd = np.zeros_like(fm)
    fwd[:-1] = (fm[1:] - fm[:-1]) / step
    bwd[1:] = (fm[1:] - fm[:-1]) / step
    out = np.where(prev_ok & next_ok, 0.5 * (fwd + bwd),
                   np.where(next_ok, fwd, np.where(prev_ok, bwd, 0.0)))
    out = np.where(vm, out, 0.0)
    return np.moveaxis(out, 0, axis)
