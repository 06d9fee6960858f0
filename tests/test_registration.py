"""Rigid registration and resampling (epicorr.registration).

External references: nibabel's ``apply_affine`` (voxel -> RAS+ world),
SimpleITK's ``TransformIndexToPhysicalPoint`` (index -> LPS+ world) and
``scipy.ndimage.map_coordinates``; the RAS+ -> LPS+ flip of x and y is the
DICOM/ITK patient convention (NIfTI-1 header documentation, from memory).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.ndimage as ndi
import SimpleITK as sitk
from nibabel.affines import apply_affine

from epicorr.errors import EpicorrInputError
from epicorr.registration import (_to_sitk, ras_to_lps, register_rigid, resample_to_grid,
                                  rigid_matrix_ras)


def _oblique_affine(zooms, origin, rotation_deg):
    a = np.eye(4)
    a[:3, :3] = rigid_matrix_ras(rotation_deg=rotation_deg)[:3, :3] @ np.diag(zooms)
    a[:3, 3] = origin
    return a


def _head(points):
    """Smooth analytic head at world points (N, 3), RAS+ mm: skin, brain, ventricles, a bright blob."""
    x, y, z = points.T

    def soft(r2, width=0.08):
        return 1.0 / (1.0 + np.exp((np.sqrt(r2) - 1.0) / width))

    img = 0.6 * soft((x / 72) ** 2 + (y / 92) ** 2 + (z / 64) ** 2)
    img += 0.8 * soft((x / 58) ** 2 + ((y - 4) / 78) ** 2 + ((z - 6) / 48) ** 2)
    img -= 0.6 * soft(((x - 8) / 10) ** 2 + ((y + 5) / 25) ** 2 + ((z - 10) / 12) ** 2, 0.2)
    img += 0.7 * soft(((x + 25) / 14) ** 2 + ((y - 35) / 16) ** 2 + ((z + 15) / 12) ** 2, 0.2)
    img += 0.5 * soft(((x - 30) / 12) ** 2 + ((y + 40) / 12) ** 2 + ((z - 20) / 20) ** 2, 0.2)
    return img


def _sample(shape, affine, motion=np.eye(4)):
    """Image of the head after ``motion`` (head point p appears at motion @ p) on a grid."""
    ijk = np.indices(shape).reshape(3, -1).T
    world = apply_affine(affine, ijk)
    return _head(apply_affine(np.linalg.inv(motion), world)).reshape(shape)


def test_itk_image_geometry_matches_nibabel_with_the_lps_flip():
    affine = _oblique_affine((2.5, 3.0, 3.5), (-100.0, 20.0, -60.0), (10, -5, 20))
    img = _to_sitk(np.zeros((7, 8, 9)), affine)
    for ijk in [(0, 0, 0), (6, 1, 3), (2, 7, 8)]:
        ras = apply_affine(affine, ijk)
        lps = np.asarray(img.TransformIndexToPhysicalPoint([int(v) for v in ijk]))
        np.testing.assert_allclose(lps, ras * [-1, -1, 1], atol=1e-6)
    # An ITK transform conjugated to RAS+ moves RAS points as the LPS original moves LPS points.
    m = rigid_matrix_ras(rotation_deg=(5, 10, -7), translation_mm=(3, -2, 1))
    p = np.array([10.0, -20.0, 30.0])
    np.testing.assert_allclose(apply_affine(ras_to_lps(m), p * [-1, -1, 1]) * [-1, -1, 1],
                               apply_affine(m, p), atol=1e-9)


def test_resample_to_grid_matches_a_brute_force_reference(rng):
    src_aff = _oblique_affine((3.0, 3.0, 3.0), (-45.0, -45.0, -36.0), (0, 0, 8))
    tgt_aff = _oblique_affine((2.0, 2.5, 2.0), (-30.0, -40.0, -20.0), (4, -3, 0))
    data = ndi.gaussian_filter(rng.normal(size=(30, 30, 24)), 2)
    motion = rigid_matrix_ras(rotation_deg=(2, -3, 4), translation_mm=(1.5, -2, 3))
    shape = (20, 24, 18)
    out = resample_to_grid(data, source_affine=src_aff, target_shape=shape, target_affine=tgt_aff,
                           transform=motion, order=1, mode="nearest")
    ijk = np.indices(shape).reshape(3, -1).T
    src_vox = apply_affine(np.linalg.inv(src_aff), apply_affine(motion, apply_affine(tgt_aff, ijk)))
    ref = ndi.map_coordinates(data, src_vox.T, order=1, mode="nearest").reshape(shape)
    np.testing.assert_allclose(out, ref, atol=1e-10)


def test_resample_identity_on_the_same_grid_is_exact(rng):
    aff = _oblique_affine((2.0, 2.0, 3.0), (0.0, 0.0, 0.0), (0, 15, 0))
    data = rng.normal(size=(10, 11, 12))
    out = resample_to_grid(data, source_affine=aff, target_shape=data.shape, target_affine=aff)
    np.testing.assert_allclose(out, data, atol=1e-10)
    with pytest.raises(EpicorrInputError, match="source_affine"):
        resample_to_grid(data, source_affine=np.zeros((4, 4)), target_shape=data.shape, target_affine=aff)


def test_registration_recovers_a_known_rigid_motion():
    fixed_aff = _oblique_affine((4.0, 4.0, 4.0), (-96.0, -110.0, -80.0), (0, 0, 0))
    fixed_shape = (48, 56, 40)
    moving_aff = _oblique_affine((4.5, 4.5, 4.5), (-100.0, -112.0, -70.0), (0, 0, 6))  # other grid and FOV
    moving_shape = (46, 52, 34)
    # The head moved between the scans by a few degrees and mm.
    motion = rigid_matrix_ras(rotation_deg=(4, -3, 5), translation_mm=(5, -4, 3))
    moving = _sample(moving_shape, moving_aff, motion)
    fixed = _sample(fixed_shape, fixed_aff) ** 2 * 3.0 + 0.1  # another contrast: mutual information copes
    reg = register_rigid(moving, fixed, moving_affine=moving_aff, fixed_affine=fixed_aff)
    # Truth: the moving image at motion @ x shows what the fixed image shows at x.
    pts = np.random.default_rng(7).normal(size=(2000, 3)) * 40
    err = apply_affine(reg.transform, pts) - apply_affine(motion, pts)
    rms = np.sqrt((err ** 2).sum(axis=1).mean())
    assert rms < 0.6, (rms, reg.info)
    assert reg.correlation > 0.9
    assert np.isfinite(reg.metric) and reg.metric < 0
    # Started from the answer, it stays there.
    again = register_rigid(moving, fixed, moving_affine=moving_aff, fixed_affine=fixed_aff,
                           initial=reg.transform, shrink_factors=(1,), smoothing_voxels=(0,))
    err2 = apply_affine(again.transform, pts) - apply_affine(reg.transform, pts)
    assert np.sqrt((err2 ** 2).sum(axis=1).mean()) < 0.5


_REPRO_SCRIPT = r"""
import sys
import SimpleITK as sitk
sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(2)   # a caller's multi-threaded default
from epicorr.simulate import default_affine, motion_matrix, synthetic_head
from epicorr.registration import register_rigid
aff = default_affine((32, 40, 28), 4.0)
head = synthetic_head(shape=(32, 40, 28), affine=aff, seed=2)
moved = head.moved(motion_matrix(rotation_deg=(2, 1, 0), translation_mm=(1, -2, 1)))
reg = register_rigid(head.gre_magnitude, moved.epi_contrast, moving_affine=aff, fixed_affine=aff)
assert sitk.ProcessObject.GetGlobalDefaultNumberOfThreads() == 2   # restored
print(reg.transform.tobytes().hex())
"""


def test_registration_is_bit_for_bit_reproducible_across_processes():
    # Same inputs, same bytes: ITK reductions with several threads sum in a run-dependent order,
    # so the registration pins ITK's global default to one thread for its call (and restores it).
    import subprocess
    import sys

    outs = {subprocess.run([sys.executable, "-c", _REPRO_SCRIPT], capture_output=True, text=True,
                           check=True, timeout=120).stdout.strip() for _ in range(3)}
    assert len(outs) == 1, outs
