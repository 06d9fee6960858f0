"""Fourier dipole model against the analytic fields of a sphere and an infinite cylinder.

Analytic Lorentz-corrected fields for a region of susceptibility difference dchi in B0
(e.g. Schenck 1996, Med Phys 23:815, section on simple shapes; Marques & Bowtell 2005,
Concepts Magn Reson B 25B:65):
  sphere, outside:   dB = dchi B0 / 3 (a/r)^3 (3 cos^2 theta - 1);  inside: 0
  cylinder at angle theta to B0, inside:  dB = dchi / 6 (3 cos^2 theta - 1) B0
                                outside: dB = dchi / 2 (a/r)^2 sin^2 theta cos 2 phi B0
The convention here sets D(k=0) = 0 (Lorentz sphere correction), so the sphere's
inside field is 0.  Errors are checked away from the boundary (r < 0.6 a, 1.5 a < r < 3 a).
"""

import numpy as np
import pytest
from scipy import ndimage

from epicorr.constants import GAMMA_BAR_HZ_PER_T
from epicorr.errors import EpicorrInputError
from epicorr.simulate import dipole_field_hz, rigid_matrix, shim, signal_side_field, synthetic_head

B0 = 3.0
DCHI = 1.0  # ppm
SCALE = DCHI * 1e-6 * B0 * GAMMA_BAR_HZ_PER_T  # Hz, 127.7 Hz per ppm at 3 T


def _fraction(shape, inside, ss=4):
    """Partial-volume fraction of a shape given by ``inside(i, j, k)`` on voxel coordinates."""
    idx = np.indices(shape).astype(float)
    offs = (np.arange(ss) + 0.5) / ss - 0.5
    frac = np.zeros(shape)
    for ox in offs:
        for oy in offs:
            for oz in offs:
                frac += inside(idx[0] + ox, idx[1] + oy, idx[2] + oz)
    return frac / ss ** 3


def test_sphere_matches_analytic_field():
    n, a = 48, 7.0
    c = n / 2 - 0.5
    chi = DCHI * _fraction((n, n, n), lambda i, j, k: (i - c) ** 2 + (j - c) ** 2 + (k - c) ** 2 < a * a)
    field = dipole_field_hz(chi, affine=np.eye(4), b0_tesla=B0, background_ppm=0.0)
    x, y, z = np.indices((n, n, n)).astype(float) - c
    r = np.sqrt(x * x + y * y + z * z)
    cos2 = z * z / np.maximum(r * r, 1e-12)
    analytic = SCALE / 3 * (a / np.maximum(r, 1e-12)) ** 3 * (3 * cos2 - 1)
    outside = (r > 1.5 * a) & (r < 3 * a)
    inside = r < 0.6 * a
    err_out = np.abs(field - analytic)[outside].max()
    err_in = np.abs(field[inside]).max()
    # measured: 0.11 Hz outside (of 25 Hz at r = 1.5 a on axis), 0.16 Hz inside (of 128 Hz/ppm)
    assert err_out < 0.004 * SCALE
    assert err_in < 0.004 * SCALE
    # sanity: the field is really there: near the axis at r ~ 2 a it is ~ 2/3 * 1/8 * SCALE
    k_axis = int(round(c + 2 * a))
    assert analytic[n // 2, n // 2, k_axis] == pytest.approx(SCALE * 2 / 3 / 8, rel=0.15)
    assert field[n // 2, n // 2, k_axis] == pytest.approx(analytic[n // 2, n // 2, k_axis], rel=0.01)


@pytest.mark.parametrize("tilt_deg", [30.0, 60.0, 90.0])
def test_tilted_cylinder_matches_analytic_field(tilt_deg):
    # The cylinder runs along voxel axis 0 through the whole (unpadded, periodic) axis, so it
    # is infinite; the affine tilts that axis by tilt_deg from the scanner z axis (B0).
    shape, a = (8, 80, 80), 7.0
    c = shape[1] / 2 - 0.5
    aff = rigid_matrix(rotation_deg=(0.0, 90.0 - tilt_deg, 0.0))
    axis = aff[:3, 0]
    theta = np.arccos(abs(axis[2]))
    assert np.degrees(theta) == pytest.approx(tilt_deg)
    chi = DCHI * _fraction(shape, lambda i, j, k: (j - c) ** 2 + (k - c) ** 2 < a * a)
    field = dipole_field_hz(chi, affine=aff, b0_tesla=B0, background_ppm=0.0, pad_factor=(1, 2, 2))
    idx = np.indices(shape).astype(float)
    rho = (idx[1] - c)[..., None] * aff[:3, 1] + (idx[2] - c)[..., None] * aff[:3, 2]
    r = np.linalg.norm(rho, axis=-1)
    b = np.array([0.0, 0.0, 1.0])
    b_perp = b - (b @ axis) * axis
    cos_phi = (rho @ b_perp) / np.maximum(r, 1e-12) / np.linalg.norm(b_perp)
    inside_value = SCALE / 6 * (3 * np.cos(theta) ** 2 - 1)
    outside_value = SCALE / 2 * (a / np.maximum(r, 1e-12)) ** 2 * np.sin(theta) ** 2 * (2 * cos_phi ** 2 - 1)
    inside = r < 0.6 * a
    outside = (r > 1.5 * a) & (r < 3 * a)
    # measured: <= 0.38 Hz inside and <= 0.31 Hz outside (of 21-28 Hz) on an 80 x 80 section
    assert np.abs(field[inside] - inside_value).max() < 0.005 * SCALE
    assert np.abs(field - outside_value)[outside].max() < 0.005 * SCALE


def test_shim_removes_linear_terms_exactly():
    # A field that is exactly mean + linear in world mm is removed to rounding error.
    aff = rigid_matrix(rotation_deg=(10, 0, 5))
    aff[:3, :3] *= 2.0
    idx = np.indices((12, 10, 8)).astype(float)
    xyz = np.moveaxis(idx, 0, -1) @ aff[:3, :3].T + aff[:3, 3]
    field = 12.0 + xyz @ np.array([0.5, -1.0, 2.0])
    mask = np.zeros(field.shape, bool)
    mask[2:10, 2:8, 2:6] = True
    out = shim(field, mask=mask, affine=aff, order=1)
    assert np.abs(out).max() < 1e-8
    # a quadratic term survives a first-order shim but not a second-order one
    quad = field + 0.01 * xyz[..., 0] ** 2
    assert np.abs(shim(quad, mask=mask, affine=aff, order=1)[mask]).max() > 0.05
    assert np.abs(shim(quad, mask=mask, affine=aff, order=2)).max() < 1e-8


def test_head_field_has_air_tissue_pattern():
    # Air cavities (chi higher than tissue) raise the field above and below them along B0
    # and lower it beside them (dipole pattern); the head's field stays within a few
    # hundred Hz at 3 T (common practice: 100-300 Hz near the sinuses after shimming).
    head = synthetic_head(shape=(48, 48, 36), voxel_size_mm=4.0, seed=1)
    field = shim(dipole_field_hz(head.chi_ppm, affine=head.affine), mask=head.brain_mask,
                 affine=head.affine)
    brain = field[head.brain_mask]
    assert np.abs(np.median(brain)) < 10
    assert 50 < np.percentile(np.abs(brain), 99.5) < 600


def test_frontal_sinus_is_walled_off_from_the_brain():
    # Anatomy (from memory, any anatomy text): the frontal sinus is a cavity between the
    # outer and inner tables of the frontal bone, so bone, meninges and CSF always lie
    # between its air and the brain.  On a 1 mm grid around the sinus no brain voxel may
    # share a face with sinus air (distance 1 mm); the cavity itself must remain (adult
    # frontal sinuses hold a few cm^3, from memory).
    shape = (56, 40, 44)
    aff = np.eye(4)
    aff[:3, 3] = (-28.0, 52.0, -22.0)
    for seed in range(4):
        head = synthetic_head(shape=shape, affine=aff, seed=seed, supersample=1)
        air = head.labels == head.LABELS.index("frontal sinus air")
        assert air.sum() > 2000  # mm^3
        gap_mm = ndimage.distance_transform_edt(~air)[head.brain_mask].min()
        assert gap_mm > 1.0, (seed, gap_mm)


def test_signal_side_field_of_a_sphere_is_its_inside_value():
    # Sphere of tissue in air: the analytic Lorentz-corrected field inside is 0
    # (Schenck 1996), outside it reaches 2/3 dchi B0 at the poles.  The field the
    # sphere's own signal sees is the inside value, also in its partial-volume rim.
    n, a = 40, 8.0
    c = n / 2 - 0.5
    frac = _fraction((n, n, n), lambda i, j, k: (i - c) ** 2 + (j - c) ** 2 + (k - c) ** 2 < a * a)
    field = dipole_field_hz(DCHI * frac, affine=np.eye(4), b0_tesla=B0, background_ppm=0.0)
    side = signal_side_field(field, tissue_fraction=frac, min_fraction=0.99)
    full = frac >= 0.99
    rim = (frac > 0) & ~full
    np.testing.assert_array_equal(side[full], field[full])       # kept values are untouched
    # before: the rim's voxel-centre values are part air, tens of Hz off the inside value
    assert np.abs(field[rim]).max() > 0.1 * SCALE
    # after: every voxel carries a tissue-side value; the sphere's inside field is 0 (analytic),
    # and the full voxels next to the border stay within 6 % of dchi B0 of it (measured 0.04)
    assert np.abs(side).max() == pytest.approx(np.abs(field[full]).max())
    assert np.abs(side[rim]).max() < 0.06 * SCALE


def test_signal_side_field_keeps_the_brain_of_the_head():
    head = synthetic_head(shape=(32, 32, 24), voxel_size_mm=6.0, seed=1)
    field = shim(dipole_field_hz(head.chi_ppm, affine=head.affine), mask=head.brain_mask,
                 affine=head.affine)
    side = signal_side_field(field, tissue_fraction=head.tissue_fraction, keep=head.brain_mask)
    np.testing.assert_array_equal(side[head.brain_mask], field[head.brain_mask])
    assert 0.0 <= head.tissue_fraction.min() and head.tissue_fraction.max() <= 1.0
    assert head.tissue_fraction[0, 0, 0] == 0.0 and head.tissue_fraction[head.brain_mask].min() > 0
    # signal-bearing voxels no longer see the outside air's field: steps of the field
    # between PE neighbours, weighted by the smaller of their two EPI signals, shrink
    # (measured on this grid: RMS 37.6 -> 22.0 Hz; signal in steps over 60 Hz 171 -> 62).
    # The largest step stays: it is genuine, brain beside a sinus.
    rho = head.epi_contrast
    w = np.minimum(rho[:, 1:], rho[:, :-1])

    def steps(f):
        st = np.abs(np.diff(f, axis=1))
        return np.sqrt(np.sum(w * st ** 2) / w.sum()), w[st > 60.0].sum()

    rms_before, steep_before = steps(field)
    rms_after, steep_after = steps(side)
    assert rms_after < 0.7 * rms_before
    assert steep_after < 0.5 * steep_before


def test_signal_side_field_rejects_mismatched_shapes():
    with pytest.raises(EpicorrInputError, match="same shape"):
        signal_side_field(np.zeros((4, 4, 4)), tissue_fraction=np.ones((4, 4, 5)))
