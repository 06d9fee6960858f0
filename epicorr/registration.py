"""Rigid registration between images and resampling between grids.

Conventions
-----------
* Arrays are indexed ``[i, j, k]``; an affine maps ``(i, j, k, 1)`` to world
  RAS+ millimetres (NIfTI/nibabel).  ITK works in LPS+ millimetres, so every
  affine and transform crossing to SimpleITK is conjugated with
  ``F = diag(-1, -1, 1)`` (``x_lps = F x_ras``); the arrays are handed to ITK
  transposed, so that ITK's index ``(x, y, z)`` is our ``[i, j, k]``.
* A transform here is a 4 x 4 matrix in world RAS+ mm that maps points of the
  **fixed/target** space to the **moving/source** space (the direction ITK's
  registration estimates and resampling needs): the moving image resampled on
  the fixed grid is ``moving(T x)`` at every fixed voxel centre ``x``.

Method
------
Rigid (Euler angles + translation, six parameters) registration maximising
Mattes mutual information (Mattes et al. 2003; 32 histogram bins, a seeded
random sample of the fixed voxels) with regular-step gradient descent, the
parameter scales estimated from physical shifts, in three resolution levels
(shrink 4, 2, 1; Gaussian smoothing 2, 1, 0 voxels), initialised by aligning
the intensity centres of mass (SimpleITK).  Mutual information tolerates the
different contrasts of a gradient-echo magnitude and an EPI, and a fixed-image
mask lets the caller leave out regions the EPI distorts most.

References
----------
Mattes D, Haynor DR, Vesselle H, Lewellen TK, Eubank W. PET-CT image
registration in the chest using free-form deformations. IEEE Trans Med
Imaging 2003;22:120-128.

Lowekamp BC, Chen DT, Ibanez L, Blezek D. The design of SimpleITK. Front
Neuroinform 2013;7:45.
"""

from __future__ import annotations

import contextlib
from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import scipy.ndimage as ndi

from .errors import EpicorrInputError

__all__ = ["RigidRegistration", "register_rigid", "resample_to_grid", "ras_to_lps", "rigid_matrix_ras",
           "correlation_in_mask"]

_F = np.diag([-1.0, -1.0, 1.0])
_F4 = np.diag([-1.0, -1.0, 1.0, 1.0])


def ras_to_lps(matrix: Any) -> np.ndarray:
    """Conjugate a 4 x 4 world transform between RAS+ and LPS+ (its own inverse)."""
    m = np.asarray(matrix, dtype=np.float64)
    return _F4 @ m @ _F4


def rigid_matrix_ras(*, rotation_deg: Sequence[float] = (0, 0, 0), translation_mm: Sequence[float] = (0, 0, 0),
                     centre_mm: Sequence[float] = (0, 0, 0)) -> np.ndarray:
    """4 x 4 rigid transform: rotate about ``centre_mm`` by x, y, z angles (applied in that order), then translate."""
    ax, ay, az = np.deg2rad(np.asarray(rotation_deg, dtype=np.float64))
    rx = np.array([[1, 0, 0], [0, np.cos(ax), -np.sin(ax)], [0, np.sin(ax), np.cos(ax)]])
    ry = np.array([[np.cos(ay), 0, np.sin(ay)], [0, 1, 0], [-np.sin(ay), 0, np.cos(ay)]])
    rz = np.array([[np.cos(az), -np.sin(az), 0], [np.sin(az), np.cos(az), 0], [0, 0, 1]])
    r = rz @ ry @ rx
    c = np.asarray(centre_mm, dtype=np.float64)
    out = np.eye(4)
    out[:3, :3] = r
    out[:3, 3] = c - r @ c + np.asarray(translation_mm, dtype=np.float64)
    return out


def _affine(affine: Any, *, key: str) -> np.ndarray:
    a = np.asarray(affine, dtype=np.float64)
    if a.shape != (4, 4) or not np.all(np.isfinite(a)) or abs(np.linalg.det(a[:3, :3])) < 1e-12:
        raise EpicorrInputError("must be an invertible 4 x 4 affine", key=key,
                                value=a.shape if a.shape != (4, 4) else "singular")
    return a


def _volume(data: Any, *, key: str) -> np.ndarray:
    arr = np.asarray(data)
    if arr.ndim != 3:
        raise EpicorrInputError("must be a 3-D volume", key=key, value=arr.shape)
    return arr


def _to_sitk(arr: np.ndarray, affine: np.ndarray, *, dtype=np.float32):
    import SimpleITK as sitk

    img = sitk.GetImageFromArray(np.ascontiguousarray(np.asarray(arr, dtype=dtype).T))
    lin = _F @ affine[:3, :3]
    spacing = np.linalg.norm(lin, axis=0)
    direction = lin / spacing
    u, _, vt = np.linalg.svd(direction)  # nearest rotation(-reflection); exact for unsheared affines
    direction = u @ vt
    img.SetSpacing([float(s) for s in spacing])
    img.SetDirection([float(v) for v in direction.ravel()])
    img.SetOrigin([float(v) for v in _F @ affine[:3, 3]])
    return img


def _euler_to_matrix(tx) -> np.ndarray:
    r = np.asarray(tx.GetMatrix(), dtype=np.float64).reshape(3, 3)
    c = np.asarray(tx.GetCenter(), dtype=np.float64)
    t = np.asarray(tx.GetTranslation(), dtype=np.float64)
    m = np.eye(4)
    m[:3, :3] = r
    m[:3, 3] = c + t - r @ c
    return m


@dataclass
class RigidRegistration:
    """Result of :func:`register_rigid`.

    Attributes
    ----------
    transform : ndarray, shape (4, 4)
        World RAS+ mm, fixed -> moving (see module conventions).
    metric : float
        Final Mattes mutual-information metric (ITK sign: more negative is better).
    correlation : float
        Pearson correlation between the fixed image and the moving image
        resampled on the fixed grid, inside the fixed mask (QC figure).
    info : dict
        Iterations, optimiser stop condition, total rotation angle (deg) and the
        translation column of ``transform`` (mm, RAS+).
    """

    transform: np.ndarray
    metric: float
    correlation: float
    info: dict = field(default_factory=dict)


def correlation_in_mask(a: Any, b: Any, mask: Any = None) -> float:
    """Pearson correlation of two arrays over ``mask`` (all voxels when None)."""
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    m = np.ones(a.shape, dtype=bool) if mask is None else np.asarray(mask, dtype=bool)
    m = m & np.isfinite(a) & np.isfinite(b)
    if m.sum() < 3:
        return float("nan")
    x, y = a[m] - a[m].mean(), b[m] - b[m].mean()
    den = float(np.sqrt((x * x).sum() * (y * y).sum()))
    return float((x * y).sum() / den) if den > 0 else float("nan")


@contextlib.contextmanager
def itk_threads(threads: int = 1):
    """Pin ITK's global default thread count for the duration of a block.

    ITK filters and registration metrics that are not given a thread count
    take the global default; with several threads their reductions come out
    in a run-dependent order (about 1e-13 in a registration's transform,
    enough to flip float32 output bits).  One thread makes them bit-for-bit
    reproducible.
    """
    import SimpleITK as sitk

    saved = sitk.ProcessObject.GetGlobalDefaultNumberOfThreads()
    sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(max(1, int(threads)))
    try:
        yield
    finally:
        sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(saved)


def register_rigid(moving: Any, fixed: Any, *, moving_affine: Any, fixed_affine: Any, fixed_mask: Any = None,
                   moving_mask: Any = None, initial: Any = None, iterations: int = 200,
                   shrink_factors: Sequence[int] = (4, 2, 1), smoothing_voxels: Sequence[float] = (2, 1, 0),
                   sampling_fraction: float = 0.25, seed: int = 20261201,
                   threads: int = 1) -> RigidRegistration:
    """Rigidly register ``moving`` to ``fixed`` (Mattes mutual information).

    Parameters
    ----------
    moving : array_like, shape (X, Y, Z)
        Image to align, e.g. a field-map magnitude.
    fixed : array_like, shape (U, V, W)
        Reference, e.g. an EPI reference volume.
    moving_affine, fixed_affine : array_like, shape (4, 4)
        Voxel -> world RAS+ mm.
    fixed_mask, moving_mask : array_like of bool, optional
        Voxels that take part in the metric (e.g. the brain minus strongly
        distorted regions of the EPI).
    initial : array_like, shape (4, 4), optional
        Starting transform (RAS+, fixed -> moving), e.g. from a previous round;
        default: align the intensity centres of mass.
    iterations : int
        Gradient-descent iterations per level.
    shrink_factors, smoothing_voxels : sequences
        The resolution pyramid.
    sampling_fraction : float
        Fraction of fixed voxels sampled by the metric (seeded, reproducible).
    seed : int
        Seed of the metric's sampling.
    threads : int
        ITK threads, for the method and (during the call) ITK's global
        default.  One by default: the result is then bit-for-bit
        reproducible (multi-threaded metric sums are not), and on a busy
        machine it is also faster.

    Returns
    -------
    RigidRegistration
    """
    import SimpleITK as sitk

    mov = _volume(moving, key="moving")
    fix = _volume(fixed, key="fixed")
    ma = _affine(moving_affine, key="moving_affine")
    fa = _affine(fixed_affine, key="fixed_affine")
    f_img = _to_sitk(np.nan_to_num(fix), fa)
    m_img = _to_sitk(np.nan_to_num(mov), ma)
    reg = sitk.ImageRegistrationMethod()
    reg.SetNumberOfThreads(max(1, int(threads)))
    reg.SetMetricAsMattesMutualInformation(numberOfHistogramBins=32)
    reg.SetMetricSamplingStrategy(reg.RANDOM)
    reg.SetMetricSamplingPercentage(float(sampling_fraction), int(seed))
    if fixed_mask is not None:
        fm = _volume(fixed_mask, key="fixed_mask")
        reg.SetMetricFixedMask(_to_sitk(fm.astype(np.uint8), fa, dtype=np.uint8))
    if moving_mask is not None:
        mm = _volume(moving_mask, key="moving_mask")
        reg.SetMetricMovingMask(_to_sitk(mm.astype(np.uint8), ma, dtype=np.uint8))
    reg.SetInterpolator(sitk.sitkLinear)
    reg.SetOptimizerAsRegularStepGradientDescent(learningRate=2.0, minStep=1e-4,
                                                 numberOfIterations=int(iterations),
                                                 relaxationFactor=0.6, gradientMagnitudeTolerance=1e-6)
    reg.SetOptimizerScalesFromPhysicalShift()
    reg.SetShrinkFactorsPerLevel([int(s) for s in shrink_factors])
    reg.SetSmoothingSigmasPerLevel([float(s) for s in smoothing_voxels])
    reg.SmoothingSigmasAreSpecifiedInPhysicalUnitsOff()
    if initial is None:
        init = sitk.CenteredTransformInitializer(f_img, m_img, sitk.Euler3DTransform(),
                                                 sitk.CenteredTransformInitializerFilter.MOMENTS)
    else:
        m_lps = ras_to_lps(np.asarray(initial, dtype=np.float64))
        init = sitk.Euler3DTransform()
        centre = np.asarray(f_img.TransformContinuousIndexToPhysicalPoint(
            [(s - 1) / 2.0 for s in f_img.GetSize()]))
        init.SetCenter([float(c) for c in centre])
        init.SetMatrix([float(v) for v in m_lps[:3, :3].ravel()], 1e-4)
        r = m_lps[:3, :3]
        init.SetTranslation([float(v) for v in m_lps[:3, 3] + r @ centre - centre])
    reg.SetInitialTransform(init, inPlace=False)
    # The metric, the pyramid filters and the scales estimator take their
    # thread count from ITK's global default, not from the method's setting;
    # with several threads their sums come out in a different order from run
    # to run (about 1e-13 mm in the transform, enough to flip float32 output
    # bits).  Pin the global default for the call, then restore it.
    with itk_threads(threads):
        out = reg.Execute(f_img, m_img)
    euler = sitk.Euler3DTransform(out.GetNthTransform(0) if hasattr(out, "GetNthTransform") else out)
    m_lps = _euler_to_matrix(euler)
    t_ras = ras_to_lps(m_lps)
    resampled = resample_to_grid(mov, source_affine=ma, target_shape=fix.shape, target_affine=fa,
                                 transform=t_ras, order=1, mode="constant")
    qmask = fixed_mask
    if qmask is None:
        from .phase._mask import otsu_threshold
        qmask = fix > otsu_threshold(fix[np.isfinite(fix)])
    corr = correlation_in_mask(fix, resampled, qmask)
    cos_angle = np.clip((np.trace(t_ras[:3, :3]) - 1.0) / 2.0, -1.0, 1.0)
    info = {"iterations": int(reg.GetOptimizerIteration()),
            "stop": reg.GetOptimizerStopConditionDescription(),
            "rotation_angle_deg": float(np.rad2deg(np.arccos(cos_angle))),
            "translation_mm_ras": [float(v) for v in t_ras[:3, 3]]}
    return RigidRegistration(transform=t_ras, metric=float(reg.GetMetricValue()), correlation=corr, info=info)


def resample_to_grid(data: Any, *, source_affine: Any, target_shape: Sequence[int], target_affine: Any,
                     transform: Any = None, order: int = 1, mode: str = "nearest", cval: float = 0.0) -> np.ndarray:
    """Resample a volume onto another voxel grid.

    Parameters
    ----------
    data : array_like, shape (X, Y, Z)
        Source volume (e.g. a field map in Hz, its sigma, or a mask as float).
    source_affine : array_like, shape (4, 4)
        Source voxel -> world RAS+ mm.
    target_shape : sequence of 3 ints
        Output grid shape.
    target_affine : array_like, shape (4, 4)
        Target voxel -> world RAS+ mm.
    transform : array_like, shape (4, 4), optional
        World RAS+ transform target -> source (e.g.
        :attr:`RigidRegistration.transform` with the target as fixed image);
        identity when None.
    order : int
        Spline order (0 nearest, 1 linear, 3 cubic).
    mode : str
        :func:`scipy.ndimage.affine_transform` boundary mode; ``"nearest"``
        (default) continues the edge values, right for a smooth field map;
        ``"constant"`` fills with ``cval``.

    Returns
    -------
    ndarray, shape target_shape, float64
        ``data`` sampled at ``inv(source_affine) @ transform @ target_affine``
        applied to every target voxel index.
    """
    src = np.asarray(_volume(data, key="data"), dtype=np.float64)
    sa = _affine(source_affine, key="source_affine")
    ta = _affine(target_affine, key="target_affine")
    t = np.eye(4) if transform is None else np.asarray(transform, dtype=np.float64)
    if t.shape != (4, 4):
        raise EpicorrInputError("must be a 4 x 4 matrix", key="transform", value=t.shape)
    shape = tuple(int(s) for s in target_shape)
    if len(shape) != 3:
        raise EpicorrInputError("must have three entries", key="target_shape", value=target_shape)
    m = np.linalg.inv(sa) @ t @ ta
    if order > 1:
        # prefilter on a finite copy so NaN cannot spread
        src = np.nan_to_num(src)
    return ndi.affine_transform(src, m[:3, :3], offset=m[:3, 3], output_shape=shape, order=int(order),
                                mode=mode, cval=float(cval))
