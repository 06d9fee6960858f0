"""Small rigid-registration helper (SimpleITK), private to the pair route.

Images are handed to SimpleITK in voxel-index space (array axis ``a`` is the
ITK physical axis ``a``, spacing = voxel sizes, identity direction), so the
rigid parameters are expressed along the array axes and the translation along
the phase-encode axis can be frozen.  Metric: Mattes mutual information
(Mattes et al. 2003); optimiser: regular-step gradient descent with physical
shift scaling; two-level pyramid.

References
----------
Mattes D, Haynor DR, Vesselle H, Lewellen TK, Eubank W. PET-CT image
registration in the chest using free-form deformations. IEEE Trans Med
Imaging 2003;22:120-128.

SimpleITK documentation, ``ImageRegistrationMethod``.
"""

from __future__ import annotations

import numpy as np
import SimpleITK as sitk

from ..registration import itk_threads

__all__ = ["rigid_register", "rigid_resample", "transform_magnitude"]


def _to_sitk(arr, spacing, origin=(0.0, 0.0, 0.0)):
    img = sitk.GetImageFromArray(np.ascontiguousarray(np.asarray(arr, dtype=np.float32).transpose(2, 1, 0)))
    img.SetSpacing(tuple(float(s) for s in spacing))
    img.SetOrigin(tuple(float(o) for o in origin))
    return img


def rigid_register(fixed, moving, *, spacing, frozen_translation_axis=None, iterations=60,
                   sampling=0.25, seed=20261201, origin=(0.0, 0.0, 0.0)):
    """Rigid (Euler 3-D) transform mapping ``fixed`` points into ``moving``.

    Parameters
    ----------
    fixed, moving : ndarray, shape (i, j, k)
    spacing : sequence of 3 float
        Voxel sizes, mm.
    origin : sequence of 3 float
        Position (mm) of voxel 0 in the frame shared with the full-resolution
        images (non-zero for a block-averaged copy), so the transform found on
        a coarse copy applies to the full grid.
    frozen_translation_axis : int or None
        Array axis whose translation is held at zero (used for the phase-encode
        axis, where a translation between polarities cannot be told apart from
        a uniform field offset).

    Returns
    -------
    sitk.Euler3DTransform
    """
    f = _to_sitk(fixed, spacing, origin)
    m = _to_sitk(moving, spacing, origin)
    tx = sitk.CenteredTransformInitializer(f, m, sitk.Euler3DTransform(),
                                           sitk.CenteredTransformInitializerFilter.GEOMETRY)
    reg = sitk.ImageRegistrationMethod()
    reg.SetMetricAsMattesMutualInformation(numberOfHistogramBins=32)
    reg.SetMetricSamplingStrategy(reg.RANDOM)
    reg.SetMetricSamplingPercentage(sampling, seed)
    reg.SetInterpolator(sitk.sitkLinear)
    reg.SetOptimizerAsRegularStepGradientDescent(learningRate=1.0, minStep=1e-3,
                                                 numberOfIterations=iterations,
                                                 gradientMagnitudeTolerance=1e-6)
    reg.SetOptimizerScalesFromPhysicalShift()
    if frozen_translation_axis is not None:
        weights = [1.0] * 6
        weights[3 + int(frozen_translation_axis)] = 0.0
        reg.SetOptimizerWeights(weights)
    reg.SetShrinkFactorsPerLevel([2, 1])
    reg.SetSmoothingSigmasPerLevel([1.0, 0.0])
    reg.SetInitialTransform(tx, inPlace=True)
    reg.SetNumberOfThreads(1)
    with itk_threads(1):  # bit-for-bit reproducible (see epicorr.registration.itk_threads)
        reg.Execute(f, m)
    return tx


def rigid_resample(moving, transform, *, spacing):
    """Resample ``moving`` onto its own grid through ``transform`` (linear)."""
    m = _to_sitk(moving, spacing)
    out = sitk.Resample(m, m, transform, sitk.sitkLinear, 0.0, sitk.sitkFloat32)
    return sitk.GetArrayFromImage(out).transpose(2, 1, 0).astype(np.float64)


def transform_magnitude(transform, shape, spacing):
    """Largest displacement (mm) the transform causes at the grid's corners."""
    sp = np.asarray(spacing, float)
    corners = np.array([[a, b, c] for a in (0, shape[0] - 1) for b in (0, shape[1] - 1)
                        for c in (0, shape[2] - 1)], float) * sp
    moved = np.array([transform.TransformPoint(tuple(p)) for p in corners])
    return float(np.max(np.linalg.norm(moved - corners, axis=1)))
