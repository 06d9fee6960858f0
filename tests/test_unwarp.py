"""The 1-D unwarping engine against scipy and the Jezzard & Balaban model."""

import numpy as np
import pytest
import scipy.ndimage as ndi

from epicorr.displacement import displacement_jacobian, field_to_displacement
from epicorr.errors import EpicorrInputError
from epicorr.unwarp import LineResampler, bspline_coefficients, resample_along_axis, unwarp


def _reference(volume, coords, axis, order):
    """scipy.ndimage.map_coordinates with full 3-D coordinates, zero outside [-0.5, N-0.5]."""
    grid = np.indices(volume.shape).astype(np.float64)
    grid[axis] = coords
    ref = ndi.map_coordinates(volume.astype(np.float64), grid, order=order, mode="mirror")
    n = volume.shape[axis]
    ref[(coords < -0.5) | (coords > n - 0.5)] = 0.0
    return ref


@pytest.mark.parametrize("axis", [0, 1, 2])
@pytest.mark.parametrize("interp,order", [("cubic", 3), ("linear", 1)])
@pytest.mark.parametrize("layout", ["C", "F"])
def test_matches_scipy_map_coordinates(rng, axis, interp, order, layout):
    # Reference library: scipy.ndimage.map_coordinates (order 3 = cubic B-spline with
    # mirror-prefilter, order 1 = linear) on the same coordinates.  Tolerance 2e-6
    # relative to the data range: our output is float32 (eps 1.2e-7), scipy's float64.
    vol = rng.normal(size=(11, 13, 9)).astype(np.float32)
    vol = np.asarray(vol, order=layout)
    n = vol.shape[axis]
    coords = rng.uniform(-2.0, n + 1.0, size=vol.shape)
    got = resample_along_axis(vol, coords, axis=axis, interpolation=interp)
    ref = _reference(vol, coords, axis, order)
    assert got.dtype == np.float32
    np.testing.assert_allclose(got, ref, rtol=0, atol=2e-6 * np.ptp(vol))
    # The whole range was exercised: some samples fell outside the field of view.
    assert np.any(got == 0) and np.any(got != 0)


def test_matches_scipy_inside_field_of_view_with_constant_mode(rng):
    # scipy.ndimage.map_coordinates(mode="constant") interpolates inside [0, N-1] and
    # gives cval outside; inside that range the two must agree (same tolerance as above).
    vol = rng.normal(size=(8, 20, 6))
    coords = rng.uniform(0.0, 19.0, size=vol.shape)
    grid = np.indices(vol.shape).astype(np.float64)
    grid[1] = coords
    ref = ndi.map_coordinates(vol, grid, order=3, mode="constant", cval=0.0)
    got = resample_along_axis(vol, coords, axis=1)
    np.testing.assert_allclose(got, ref, atol=2e-6 * np.ptp(vol))


@pytest.mark.parametrize("n", [1, 2, 3, 5, 15, 16, 17, 40, 97])
@pytest.mark.parametrize("layout", ["C", "F"])
def test_prefilter_matches_scipy_spline_filter1d(rng, n, layout):
    # Reference library: scipy.ndimage.spline_filter1d(order=3, mode="mirror") in
    # float64; ours is float32: tolerance 1e-6 relative to the largest value.
    for axis in range(3):
        shape = [6, 7, 5]
        shape[axis] = n
        vol = np.asarray(rng.normal(size=shape).astype(np.float32), order=layout)
        ref = ndi.spline_filter1d(vol.astype(np.float64), order=3, axis=axis, mode="mirror")
        got = bspline_coefficients(vol, axis=axis)
        assert got.dtype == np.float32
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-6 * np.abs(vol).max())


def test_edge_rule_half_voxel():
    # Our documented rule: the line spans the voxel extent [-0.5, N-0.5]; beyond it, zero.
    vol = np.ones((2, 10, 2), np.float32)
    coords = np.zeros(vol.shape)
    for c, want in [(-0.49, 1.0), (9.49, 1.0), (-0.51, 0.0), (9.51, 0.0), (0.0, 1.0), (9.0, 1.0)]:
        coords[:] = c
        got = resample_along_axis(vol, coords, axis=1)
        np.testing.assert_allclose(got, want, atol=1e-6)


def test_nan_does_not_spread_along_the_line():
    # Common practice: a NaN voxel must only affect samples within one voxel of it
    # (an IIR spline prefilter would otherwise turn the whole line into NaN).
    vol = np.tile(np.linspace(0, 1, 30)[None, :, None], (3, 1, 4)).astype(np.float32)
    vol[1, 15, 2] = np.nan
    coords = np.broadcast_to(np.arange(30.0)[None, :, None] + 0.3, vol.shape).copy()
    got = resample_along_axis(vol, coords, axis=1)
    bad = np.isnan(got)
    assert bad[1, :, 2].sum() == 2 and bad[1, 14, 2] and bad[1, 15, 2]   # 14.3 and 15.3
    assert bad.sum() == 2
    # Away from the NaN the result equals the NaN-free one: the 0-filled hole's
    # influence decays by |sqrt(3) - 2| = 0.268 per voxel (the cubic B-spline
    # prefilter pole; Unser 1999), so 9 voxels away it is below 1e-4 of the signal.
    clean = vol.copy()
    clean[1, 15, 2] = 15 / 29
    ref = resample_along_axis(clean, coords, axis=1)
    far = np.abs(np.arange(30) - 15) > 8
    np.testing.assert_allclose(got[1, far, 2], ref[1, far, 2], atol=1e-4)
    np.testing.assert_array_equal(got[0], ref[0])   # other lines untouched


def test_jezzard_constant_field_shift_recovered():
    # Jezzard & Balaban 1995: a constant off-resonance df shifts the image by
    # df * EES * N voxels along PE.  The distorted profile is built analytically
    # (a Gaussian, band-limited in practice for sigma = 3 voxels); unwarping must
    # put its centroid back to within 0.01 voxel.
    n, ees, df = 64, 0.0006, 75.0
    shift = df * ees * n                                     # 2.88 voxels
    y = np.arange(n, dtype=np.float64)
    truth = np.exp(-0.5 * ((y - 30.0) / 3.0) ** 2)
    distorted = np.exp(-0.5 * ((y - 30.0 - shift) / 3.0) ** 2)
    vol = np.tile(distorted[None, :, None], (4, 1, 3)).astype(np.float32)
    disp = field_to_displacement(np.full(vol.shape, df), pe="j", voxels_per_hz=ees * n)
    np.testing.assert_allclose(disp, shift, rtol=1e-12)
    out = unwarp(vol, disp, pe_axis=1)[2, :, 1].astype(np.float64)
    centroid = (out * y).sum() / out.sum()
    assert abs(centroid - 30.0) < 0.01
    np.testing.assert_allclose(out, truth, atol=2e-3)


def test_signal_conserved_with_jacobian(rng):
    # Conservation of signal along each PE line (Jezzard & Balaban 1995; Chang &
    # Fitzpatrick 1992): sum_y I_dist(y + d(y)) (1 + d'(y)) = sum_y' I_dist(y') for a
    # smooth invertible d that keeps the signal in the field of view.  Tolerance 1e-3
    # relative (quadrature of a smooth integrand, common practice).
    n = 64
    y = np.arange(n, dtype=np.float64)
    amp = rng.uniform(1.0, 3.0, size=(6, 1, 5))
    disp = amp * np.sin(2 * np.pi * y / n)[None, :, None]      # |d'| <= 0.3: invertible
    assert displacement_jacobian(disp, pe_axis=1).min() > 0.6
    profile = np.exp(-0.5 * ((y - 32.0) / 6.0) ** 2)
    data = (profile[None, :, None] * rng.uniform(0.5, 2.0, size=(6, 1, 5))).astype(np.float32)
    with_j = unwarp(data, disp, pe_axis=1, jacobian=True).sum(axis=1)
    without_j = unwarp(data, disp, pe_axis=1, jacobian=False).sum(axis=1)
    want = data.astype(np.float64).sum(axis=1)
    np.testing.assert_allclose(with_j, want, rtol=1e-3)
    # Without the modulation the sum is not conserved (the check can fail).
    assert np.max(np.abs(without_j / want - 1)) > 1e-2


def test_4d_series_streams_and_matches_per_volume(rng):
    data = rng.normal(size=(10, 12, 8, 5)).astype(np.float32)
    disp = rng.uniform(-2, 2, size=(10, 1, 8)) * np.ones((1, 12, 1)) * 0.5
    before = data.copy()
    out = unwarp(data, disp, pe_axis=1, n_threads=2)
    serial = unwarp(data, disp, pe_axis=1, n_threads=1)
    assert out.dtype == np.float32 and out.shape == data.shape
    np.testing.assert_array_equal(out, serial)
    for t in range(data.shape[3]):
        np.testing.assert_array_equal(out[..., t], unwarp(data[..., t], disp, pe_axis=1))
    np.testing.assert_array_equal(data, before)  # input unmodified


def test_integer_data_and_out_argument(rng):
    data = rng.integers(0, 1000, size=(6, 8, 5, 3)).astype(np.int16)
    disp = np.full((6, 8, 5), 0.5)
    out = np.empty(data.shape, np.float32)
    res = unwarp(data, disp, pe_axis=1, out=out, interpolation="linear")
    assert res is out
    # Linear interpolation half-way between neighbours (away from the last voxel).
    np.testing.assert_allclose(out[:, :-1], 0.5 * (data[:, :-1] + data[:, 1:]), rtol=1e-6)


def test_bad_input_rejected(rng):
    data = rng.normal(size=(6, 8, 5, 2)).astype(np.float32)
    disp = np.zeros((6, 8, 5))
    with pytest.raises(EpicorrInputError, match="5-D"):
        unwarp(data[..., None], disp, pe_axis=1)
    with pytest.raises(EpicorrInputError, match="does not match"):
        unwarp(data, np.zeros((6, 8, 4)), pe_axis=1)
    bad = disp.copy()
    bad[2, 3, 1] = np.nan
    with pytest.raises(EpicorrInputError, match="NaN or infinite"):
        unwarp(data, bad, pe_axis=1)
    bad[2, 3, 1] = np.inf
    with pytest.raises(EpicorrInputError, match="NaN or infinite"):
        unwarp(data, bad, pe_axis=1)
    with pytest.raises(EpicorrInputError, match="axis"):
        unwarp(data, disp, pe_axis=3)
    with pytest.raises(EpicorrInputError, match="interpolation"):
        unwarp(data, disp, pe_axis=1, interpolation="quintic")
    with pytest.raises(EpicorrInputError, match="out"):
        unwarp(data, disp, pe_axis=1, out=np.empty(data.shape, np.float64))
    with pytest.raises(EpicorrInputError, match="match"):
        LineResampler(np.zeros((6, 8, 5)), axis=1)(np.zeros((6, 8, 4)))


def test_series_read_one_volume_at_a_time_from_disk(tmp_path, rng):
    # Streaming: a nibabel array proxy is read volume by volume (never the whole
    # series at once), and the on-disk dtype (int16 here) is what each read returns.
    import nibabel as nib

    from epicorr.io import load_image, save_image_atomic

    data = rng.integers(0, 2000, size=(10, 12, 6, 7)).astype(np.int16)
    path = save_image_atomic(nib.Nifti1Image(data, np.eye(4)), tmp_path / "bold.nii.gz")
    proxy = load_image(path).dataobj
    requests = []

    class Recorder:
        shape = proxy.shape

        def __getitem__(self, key):
            block = proxy[key]
            requests.append(block.shape)
            assert block.dtype == np.int16
            return block

    disp = np.tile(np.linspace(-1.5, 2.0, 12)[None, :, None], (10, 1, 6))
    got = unwarp(Recorder(), disp, pe_axis=1)
    assert requests == [(10, 12, 6)] * 7
    np.testing.assert_array_equal(got, unwarp(data, disp, pe_axis=1))
    # C-ordered input gives the same result as Fortran-ordered input.
    np.testing.assert_array_equal(unwarp(np.ascontiguousarray(data), disp, pe_axis=1),
                                  unwarp(np.asfortranarray(data), disp, pe_axis=1))
