"""Field-to-displacement, Jacobian, inverse and forward model (Jezzard & Balaban 1995)."""

import nibabel as nib
import numpy as np
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st
from scipy.optimize import brentq

from epicorr.displacement import (displacement_jacobian, displacement_to_mm, distort,
                                  field_to_displacement, foldover_mask, invert_displacement)
from epicorr.errors import EpicorrInputError
from epicorr.geometry import parse_pe_direction, readout_timing
from epicorr.io import load_image, save_image_atomic
from epicorr.unwarp import unwarp


def test_displacement_is_field_times_ees_times_n():
    # Jezzard & Balaban 1995: d = df * EES * N voxels; BIDS: EES from
    # TotalReadoutTime / (ReconMatrixPE - 1).  Worked example: 0.0441 s over 64 lines
    # -> EES = 0.7 ms, 50 Hz -> 50 * 0.0007 * 64 = 2.24 voxels.
    timing = readout_timing({"TotalReadoutTime": 0.0441}, n_pe_image=64)
    field = np.full((3, 64, 2), 50.0)
    d_pos = field_to_displacement(field, pe=parse_pe_direction("j"), voxels_per_hz=timing.voxels_per_hz)
    d_neg = field_to_displacement(field, pe="j-", voxels_per_hz=timing.voxels_per_hz)
    np.testing.assert_allclose(d_pos, 2.24, rtol=1e-12)
    np.testing.assert_allclose(d_neg, -2.24, rtol=1e-12)


@pytest.mark.parametrize("code,axis,direction", [("j", 1, +1), ("j-", 1, -1), ("i", 0, +1),
                                                 ("k-", 2, -1)])
def test_sign_convention_moves_signal(code, axis, direction):
    # Sign convention (epicorr.geometry, from the BIDS PhaseEncodingDirection
    # semantics): a positive field moves signal towards increasing index for "j",
    # decreasing for "j-", along the named array axis only.
    pe = parse_pe_direction(code)
    shape = (24, 24, 24)
    img = np.zeros(shape, np.float32)
    img[12, 12, 12] = 1.0
    img = _smooth_blob(shape, (12, 12, 12), 1.5)
    disp = field_to_displacement(np.full(shape, 100.0), pe=pe, voxels_per_hz=0.03)  # 3 voxels
    out = distort(img, disp, pe_axis=pe.axis)
    com = [float((out * g).sum() / out.sum()) for g in np.indices(shape)]
    expected = [12.0, 12.0, 12.0]
    expected[axis] += 3.0 * direction
    np.testing.assert_allclose(com, expected, atol=0.01)


def _smooth_blob(shape, centre, sigma):
    grids = np.indices(shape).astype(np.float64)
    r2 = sum((g - c) ** 2 for g, c in zip(grids, centre))
    return np.exp(-0.5 * r2 / sigma**2).astype(np.float32)


def test_displacement_to_mm():
    d = np.full((2, 3, 4), 1.5)
    np.testing.assert_allclose(displacement_to_mm(d, pe_axis=1, zooms=(2.0, 2.5, 3.0)), 3.75)
    with pytest.raises(EpicorrInputError, match="zooms"):
        displacement_to_mm(d, pe_axis=1, zooms=(2.0, 0.0, 3.0))


def test_jacobian_central_differences():
    # Analytic derivative of d = A sin(2 pi y / N); central differences are
    # second-order accurate: error <= A (2 pi/N)^3 / 6 (Taylor remainder).
    n, amp = 64, 2.0
    y = np.arange(n, dtype=np.float64)
    disp = np.tile(amp * np.sin(2 * np.pi * y / n)[None, None, :], (2, 3, 1))
    jac = displacement_jacobian(disp, pe_axis=2)
    exact = 1 + amp * 2 * np.pi / n * np.cos(2 * np.pi * y / n)
    k = 2 * np.pi / n
    np.testing.assert_allclose(jac[0, 0, 1:-1], exact[1:-1], atol=amp * k**3 / 6 * 1.01)
    assert not foldover_mask(disp, pe_axis=2).any()


def test_foldover_mask_flags_crossing_lines():
    # The mapping y -> y + d(y) folds where 1 + d' <= 0 (Jezzard & Balaban 1995).
    y = np.arange(40, dtype=np.float64)
    disp = np.where((y > 15) & (y < 25), -2.0 * (y - 15), 0.0)
    disp = np.where(y >= 25, -20.0, disp)
    d3 = np.tile(disp[None, :, None], (2, 1, 2))
    mask = foldover_mask(d3, pe_axis=1)
    jac = 1 + np.gradient(disp)
    np.testing.assert_array_equal(mask[0, :, 0], jac <= 0)
    assert mask[0, 20, 0] and not mask[0, 5, 0]


def test_inverse_against_root_finding():
    # Reference: scipy.optimize.brentq solves y + d(y) = y_d for each distorted
    # position.  Tolerance 5e-4 voxel (spline-refined inverse; common practice,
    # well below the 0.01-voxel level that matters for unwarping).
    n = 64
    y = np.arange(n, dtype=np.float64)

    def d_of(s):
        return 2.5 * np.sin(2 * np.pi * s / n) + 0.8 * np.cos(4 * np.pi * s / n)

    disp = np.tile(d_of(y)[None, :, None], (3, 1, 2))
    inv = invert_displacement(disp, pe_axis=1)
    f0, f1 = d_of(0.0), (n - 1) + d_of(n - 1.0)
    for yd in range(n):
        if yd < f0 or yd > f1:
            continue
        root = brentq(lambda s: s + d_of(s) - yd, -5, n + 5)
        assert abs(yd + inv[1, yd, 1] - root) < 5e-4, yd


def test_inverse_of_constant_shift_is_exact():
    disp = np.full((4, 30, 3), 2.75)
    np.testing.assert_allclose(invert_displacement(disp, pe_axis=1), -2.75, atol=1e-12)


def test_distort_matches_analytic_forward_model():
    # Forward model (Jezzard & Balaban 1995; intensity by conservation of signal,
    # Chang & Fitzpatrick 1992): I_dist(y_d) = I(y) / (1 + d'(y)) with y_d = y + d(y),
    # y found by root finding (scipy.optimize.brentq).  Tolerance 1 % of the peak.
    n = 64
    y = np.arange(n, dtype=np.float64)

    def d_of(s):
        return 3.0 * np.sin(2 * np.pi * (s - 8) / n)

    def dprime(s):
        return 3.0 * 2 * np.pi / n * np.cos(2 * np.pi * (s - 8) / n)

    def truth(s):
        return np.exp(-0.5 * ((s - 30.0) / 4.0) ** 2)

    img = np.tile(truth(y)[None, :, None], (2, 1, 2)).astype(np.float32)
    disp = np.tile(d_of(y)[None, :, None], (2, 1, 2))
    out = distort(img, disp, pe_axis=1)[0, :, 0]
    expected, moved = np.empty(n), np.empty(n)
    for yd in range(n):
        s = brentq(lambda s: s + d_of(s) - yd, -10, n + 10)
        moved[yd] = truth(s)
        expected[yd] = truth(s) / (1 + dprime(s))
    np.testing.assert_allclose(out, expected, atol=0.01 * expected.max())
    # Geometry only (no intensity change) when asked.
    geo = distort(img, disp, pe_axis=1, jacobian=False)[0, :, 0]
    np.testing.assert_allclose(geo, moved, atol=0.01)
    assert np.abs(out - geo).max() > 0.05


def test_distort_then_unwarp_round_trip(rng):
    # Jezzard & Balaban 1995: unwarping with the true field undoes the forward model.
    shape = (12, 48, 10)
    img = _smooth_blob(shape, (6, 24, 5), 4.0)
    field = 40.0 * np.sin(np.indices(shape)[1] / 48 * 2 * np.pi) + rng.uniform(-5, 5, (12, 1, 10))
    disp = field_to_displacement(field, pe="j-", voxels_per_hz=0.05)
    assert not foldover_mask(disp, pe_axis=1).any()
    back = unwarp(distort(img, disp, pe_axis=1), disp, pe_axis=1)
    np.testing.assert_allclose(back, img, atol=5e-3)


@pytest.mark.parametrize("affine", [
    np.diag([-2.0, 2.0, 2.0, 1.0]),                       # flipped i (LAS storage)
    np.diag([2.0, -2.0, -2.0, 1.0]),                      # flipped j and k
    np.array([[0.0, 0.0, 2.0, 0.0], [-1.9, 0.6, 0.0, 0.0],  # oblique, axes permuted
              [0.6, 1.9, 0.0, 0.0], [0.0, 0.0, 0.0, 1.0]]),
])
def test_pe_axis_is_the_array_axis_whatever_the_affine(tmp_path, affine):
    # BIDS specification, PhaseEncodingDirection: "i/j/k" refer to the axes of the
    # data array, not to world directions; the affine plays no part.
    shape = (20, 22, 18)
    blob = _smooth_blob(shape, (10, 11, 9), 1.5)
    path = save_image_atomic(nib.Nifti1Image(blob, affine), tmp_path / "epi.nii.gz")
    img = load_image(path)
    data = np.asanyarray(img.dataobj)
    pe = parse_pe_direction("j")
    disp = field_to_displacement(np.full(shape, 50.0), pe=pe, voxels_per_hz=0.04)  # +2 voxels
    out = distort(data, disp, pe_axis=pe.axis)
    com = [float((out * g).sum() / out.sum()) for g in np.indices(shape)]
    np.testing.assert_allclose(com, [10.0, 13.0, 9.0], atol=0.01)


def test_bad_inputs():
    field = np.zeros((4, 5, 6))
    bad = field.copy()
    bad[1, 1, 1] = np.nan
    with pytest.raises(EpicorrInputError, match="NaN or infinite"):
        field_to_displacement(bad, pe="j", voxels_per_hz=0.03)
    for vph in (0.0, -1.0, float("nan"), float("inf"), None, "0.03"):
        with pytest.raises(EpicorrInputError, match="voxels_per_hz"):
            field_to_displacement(field, pe="j", voxels_per_hz=vph)
    with pytest.raises(EpicorrInputError, match="3-D"):
        field_to_displacement(np.zeros((4, 5)), pe="j", voxels_per_hz=0.03)
    with pytest.raises(EpicorrInputError, match="PhaseEncodingDirection"):
        field_to_displacement(field, pe="y", voxels_per_hz=0.03)
    with pytest.raises(EpicorrInputError, match="NaN or infinite"):
        invert_displacement(bad, pe_axis=1)
    with pytest.raises(EpicorrInputError, match="axis"):
        displacement_jacobian(field, pe_axis=4)
    before = field.copy()
    field_to_displacement(field, pe="j", voxels_per_hz=0.03)
    np.testing.assert_array_equal(field, before)


@settings(max_examples=25, deadline=None)
@given(amps=st.lists(st.floats(-1.0, 1.0), min_size=3, max_size=3),
       offset=st.floats(-3.0, 3.0), n=st.integers(32, 96))
@example(amps=[-1.0, -0.5, 0.0], offset=2.0, n=32)  # once beyond 5e-3 when checked through a spline of d_inv
def test_inverse_composes_to_identity(amps, offset, n):
    # Definition of the inverse mapping: y_d = y + d(y)  <=>  y = y_d + d_inv(y_d).
    # Smooth random d (shortest wavelength >= 10 voxels, |d'| <= 0.6: invertible), known in closed form;
    # the exact inverse at each distorted grid position y_d = k is the root of y + d(y) - k, found with
    # scipy.optimize.brentq (reference library).  Only the samples d(0..n-1) reach the code under test.
    # Tolerance 5e-3 voxel (common practice).
    def d_of(t):
        return offset + sum(a * (n / (2 * np.pi * (m + 1))) * 0.2 * np.sin(2 * np.pi * (m + 1) * t / n + m)
                            for m, a in enumerate(amps))

    y = np.arange(n, dtype=np.float64)
    d = d_of(y)
    disp = np.tile(d[None, :, None], (2, 1, 2))
    assert not foldover_mask(disp, pe_axis=1).any()
    inv = invert_displacement(disp, pe_axis=1)[0, :, 0]
    y_d = y + d
    # Away from the line ends, where d_inv is extrapolated (documented end rule).
    ks = np.arange(int(np.ceil(y_d[0])) + 2, int(np.floor(y_d[-1])) - 1)
    ks = ks[(ks >= 0) & (ks < n)]
    assert ks.size >= n // 2
    exact = np.array([brentq(lambda t, k=k: t + d_of(t) - k, -n, 2.0 * n, xtol=1e-12) - k for k in ks])
    np.testing.assert_allclose(inv[ks], exact, atol=5e-3)
