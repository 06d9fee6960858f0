"""Field from a reversed phase-encode pair: model, solver, restoration, inputs.

Phantoms come from ``tests/pair_phantom.py``, which distorts an analytic
object by the Chang & Fitzpatrick (1992) intensity law with numpy's own
piecewise-linear resampling (independent of the package's cubic sampler).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import linalg, ndimage

from epicorr.errors import EpicorrInputError
from epicorr.pair import PairEstimate, estimate_field_from_pair
from epicorr.pair import _combine, _model, _solver

from pair_phantom import brain_mask, distort, head, pair

AFF = np.diag([2.0, 2.0, 2.0, 1.0])
VPH = 0.05  # s: 0.52 ms echo spacing x 96 lines (common practice for 3 T EPI)


def _rmse(a, b, mask):
    return float(np.sqrt(np.mean((a - b)[mask] ** 2)))


# ----------------------------------------------------------------- the model
def test_cubic_sampler_reproduces_quadratics():
    # Keys 1981: cubic convolution with a = -1/2 reproduces polynomials up to degree 2 exactly.
    y = np.arange(40, dtype=float)
    line = 0.3 * y ** 2 - 2.0 * y + 5.0
    img = np.repeat(line[:, None], 3, axis=1)
    shift = np.full_like(img, 0.37)
    shift[:3] = 0.0
    shift[-4:] = 0.0
    v, g = _model.interp_pe(img, shift)
    x = y[:, None] + shift
    inner = slice(3, -4)
    np.testing.assert_allclose(v[inner], (0.3 * x ** 2 - 2 * x + 5)[inner], atol=1e-9)
    np.testing.assert_allclose(g[inner], (0.6 * x - 2)[inner], atol=1e-9)


def test_unwarp_uniform_shift_matches_scipy():
    # A uniform displacement is a translation: compare with scipy.ndimage.shift (cubic spline).
    rng = np.random.default_rng(1)
    img = ndimage.gaussian_filter(rng.standard_normal((64, 5, 4)), (3, 0, 0))
    d = np.full(img.shape, 2.4)
    ours = _model.unwarp(img, d)
    ref = ndimage.shift(img, (-2.4, 0, 0), order=3, mode="nearest")
    np.testing.assert_allclose(ours[8:-8], ref[8:-8], atol=2e-3 * np.abs(img).max())


def test_unwarp_conserves_line_signal():
    # Chang & Fitzpatrick 1992: I(y + d) (1 + d') integrates to the object's line integral.
    n = 128
    y = np.arange(n, dtype=float)
    obj = np.exp(-((y - 64) / 12.0) ** 2)[:, None]
    f = (40.0 * np.exp(-((y - 60) / 20.0) ** 2))[:, None]
    im = distort(obj, f, pe_axis=0, polarity=1, voxels_per_hz=VPH)
    back = _model.unwarp(im, VPH * f)
    assert abs(back.sum() - obj.sum()) < 1e-3 * obj.sum()
    assert np.max(np.abs(back - obj)) < 0.02


def test_pentadiagonal_solver_matches_solve_banded():
    # Reference: scipy.linalg.solve_banded on each line.
    rng = np.random.default_rng(2)
    n, m = 30, 7
    h1 = rng.normal(size=(n, m)) * 0.3
    h2 = rng.normal(size=(n, m)) * 0.2
    h0 = 2.0 + np.abs(h1).sum() / n + rng.random((n, m))
    h1[-1] = 0
    h2[-2:] = 0
    b = rng.normal(size=(n, m))
    given = [h.copy() for h in (h0, h1, h2)]
    x = _solver.solve_penta(_solver.factor_penta(h0, h1, h2), b)
    for h, h_given in zip((h0, h1, h2), given):  # the default keeps the bands intact
        np.testing.assert_array_equal(h, h_given)
    for j in range(m):
        ab = np.zeros((5, n))
        ab[0, 2:] = h2[:-2, j]
        ab[1, 1:] = h1[:-1, j]
        ab[2] = h0[:, j]
        ab[3, :-1] = h1[:-1, j]
        ab[4, :-2] = h2[:-2, j]
        np.testing.assert_allclose(x[:, j], linalg.solve_banded((2, 2), ab, b[:, j]), rtol=1e-10)
    np.testing.assert_allclose(_model.band_matvec(h0, h1, h2, x), b, atol=1e-10)
    # In place: the same factors, written into the given bands.
    bands = (h0.copy(), h1.copy(), h2.copy())
    fac = _solver.factor_penta(*bands, overwrite=True)
    assert all(f is band for f, band in zip(fac, bands))
    np.testing.assert_array_equal(_solver.solve_penta(fac, b), x)


def test_objective_gradient_and_jacobian_match_finite_differences():
    p, m, f, _obj, _mask = pair((24, 24, 12), snr=0)
    imgs = [np.moveaxis(x, 1, 0).copy() for x in (p, m)]
    prob = _solver.LevelProblem(images=imgs, coefs=[1.0, -1.0], weights=[1.0, -1.0],
                                axis_weights=(1.0, 1.0, 0.5))
    u = 0.5 * VPH * np.moveaxis(f, 1, 0)
    alpha, beta = 0.05, 0.01
    e0, ev = _solver._evaluate(prob, u, alpha, beta, full=True)
    jb, _bands, _ = _solver._line_hessian(prob, ev, alpha, beta, u.shape)
    g = _solver._gradient(prob, ev, jb, u, alpha, beta)
    v = np.random.default_rng(3).standard_normal(u.shape)
    h = 1e-5
    ep, _ = _solver._evaluate(prob, u + h * v, alpha, beta, full=False)
    em, _ = _solver._evaluate(prob, u - h * v, alpha, beta, full=False)
    assert abs((ep - em) / (2 * h) - float(np.sum(g * v))) < 1e-5 * abs(float(np.sum(g * v))) + 1e-8
    _, evp = _solver._evaluate(prob, u + h * v, alpha, beta, full=True)
    jv = _model.apply_bands(*jb, v)
    assert np.linalg.norm((evp["r"] - ev["r"]) / h - jv) < 1e-3 * np.linalg.norm(jv)


@pytest.mark.parametrize("edges", [False, True])
def test_weighted_smoothness_gradient_matches_finite_differences(edges):
    # Same finite-difference check with per-edge smoothness factors in (0.2, 1].
    p, m, f, _obj, _mask = pair((20, 20, 10), snr=0)
    imgs = [np.moveaxis(x, 1, 0).copy() for x in (p, m)]
    u = 0.5 * VPH * np.moveaxis(f, 1, 0)
    rng = np.random.default_rng(11)
    c = tuple(rng.uniform(0.2, 1.0, np.diff(u, axis=a).shape) for a in range(3)) if edges else None
    prob = _solver.LevelProblem(images=imgs, coefs=[1.0, -1.0], weights=[1.0, -1.0],
                                axis_weights=(1.0, 1.0, 0.5), edge_weights=c)
    alpha, beta = 0.5, 0.01
    _e0, ev = _solver._evaluate(prob, u, alpha, beta, full=True)
    jb, bands, _ = _solver._line_hessian(prob, ev, alpha, beta, u.shape)
    g = _solver._gradient(prob, ev, jb, u, alpha, beta)
    v = rng.standard_normal(u.shape)
    h = 1e-5
    ep, _ = _solver._evaluate(prob, u + h * v, alpha, beta, full=False)
    em, _ = _solver._evaluate(prob, u - h * v, alpha, beta, full=False)
    assert abs((ep - em) / (2 * h) - float(np.sum(g * v))) < 1e-5 * abs(float(np.sum(g * v))) + 1e-8
    # The quadratic smoothness part of the Hessian (line bands minus cross-line coupling)
    # applied to v equals the weighted Laplacian of v (the energy is quadratic in u).
    _e, ev0 = _solver._evaluate(prob, u, alpha, 0.0, full=True)
    _jb, b_all, _ = _solver._line_hessian(prob, ev0, alpha, 0.0, u.shape)
    _jb, b_data, _ = _solver._line_hessian(prob, ev0, 0.0, 0.0, u.shape)
    hv = (_model.band_matvec(*[a - b for a, b in zip(b_all, b_data)], v)
          - alpha * _solver._cross_neighbours(v, prob.axis_weights, c))
    np.testing.assert_allclose(hv, alpha * _solver._laplacian(v, prob.axis_weights, c), atol=1e-10)


def test_charbonnier_weights_are_the_half_quadratic_factors():
    # Charbonnier et al. 1997: for phi(t) = d^2 (sqrt(1 + (t/d)^2) - 1) the half-quadratic
    # (IRLS) weight is phi'(t) / t = 1 / sqrt(1 + (t/d)^2).
    u = np.zeros((6, 8, 5))
    u[:, 4:, :] = 1.2  # a 1.2-voxel step between index 3 and 4 of axis 1
    w = (1.0, 0.25, 1.0)
    c = _solver.charbonnier_weights(u, axis_weights=w, scale=0.3)
    assert [x.shape for x in c] == [(5, 8, 5), (6, 7, 5), (6, 8, 4)]
    assert np.all(c[0] == 1.0) and np.all(c[2] == 1.0)
    np.testing.assert_allclose(c[1][:, 3, :], 1.0 / np.sqrt(1.0 + (0.5 * 1.2 / 0.3) ** 2))
    assert np.all(np.delete(c[1], 3, axis=1) == 1.0)
    # At the current field, the weighted Laplacian is the gradient of the Charbonnier energy
    # sum_a sum d^2 (sqrt(1 + w_a (D_a u)^2 / d^2) - 1): checked by central differences.
    rng = np.random.default_rng(5)
    u = rng.standard_normal((7, 6, 5))
    d = 0.4

    def energy(x):
        return sum(float(np.sum(d * d * (np.sqrt(1 + w[a] * np.diff(x, axis=a) ** 2 / d ** 2) - 1)))
                   for a in range(3))

    grad = _solver._laplacian(u, w, _solver.charbonnier_weights(u, axis_weights=w, scale=d))
    v = rng.standard_normal(u.shape)
    h = 1e-6
    fd = (energy(u + h * v) - energy(u - h * v)) / (2 * h)
    assert fd == pytest.approx(float(np.sum(grad * v)), rel=1e-6)


def test_unit_edge_weights_change_nothing():
    p, m, _f, _obj, _mask = pair((20, 20, 10), snr=40.0, seed=2)
    imgs = [np.moveaxis(x, 1, 0).copy() for x in (p, m)]
    ones = tuple(np.ones(np.diff(imgs[0], axis=a).shape) for a in range(3))
    out = []
    for c in (None, ones):
        prob = _solver.LevelProblem(images=imgs, coefs=[1.0, -1.0], weights=[1.0, -1.0],
                                    axis_weights=(1.0, 1.0, 0.5), edge_weights=c)
        out.append(_solver.solve_level(prob, np.zeros(imgs[0].shape), lam=0.2, beta_rel=0.1, max_iter=4)[0])
    np.testing.assert_allclose(out[1], out[0], atol=1e-10)


def test_edge_preserving_smoothness_keeps_a_sharp_field_step():
    # A 120 Hz field step across two voxels of a non-PE axis (6 voxels of displacement, like
    # the edge of a sinus): quadratic smoothness blurs it; the Charbonnier option keeps it.
    shape = (48, 48, 24)
    obj, mask = head(shape, seed=2), brain_mask(shape)
    x = np.arange(shape[0])[:, None, None]
    f = 60.0 * np.tanh((x - 20.0) / 1.0) * np.ones(shape)
    rng = np.random.default_rng(0)
    imgs = [distort(obj, f, pe_axis=1, polarity=s, voxels_per_hz=VPH) + rng.normal(0, 1 / 60, shape)
            for s in (+1, -1)]
    err = {}
    for scale in (None, 0.3):
        est = estimate_field_from_pair(imgs, pe_directions=["j", "j-"], voxels_per_hz=VPH, affine=AFF,
                                       mask=mask, edge_scale=scale)
        err[scale] = _rmse(est.field_hz, f, mask)
        assert est.info["edge_passes"] == (0 if scale is None else 2)
    # Measured 6.2 Hz -> 2.5 Hz; acceptance (ours): at least 40 % lower and under 3.5 Hz.
    assert err[0.3] < 0.6 * err[None] and err[0.3] < 3.5, err


def test_barrier_blocks_folding():
    psi, d1, d2 = _model.barrier(np.array([1.0, 0.5, 0.0, -0.2]))
    assert psi[0] == 0 and d1[0] == 0 and np.isinf(psi[2]) and np.isinf(psi[3])
    assert psi[1] == pytest.approx(0.5)  # (0.5 - 1)^2 / 0.5


# ----------------------------------------------------------------- recovery
@pytest.fixture(scope="module")
def phantom():
    return pair((48, 48, 32), pe_axis=1, voxels_per_hz=VPH, snr=40.0, seed=4)


@pytest.fixture(scope="module")
def estimate(phantom):
    p, m, _f, _o, mask = phantom
    return estimate_field_from_pair([p, m], pe_directions=["j", "j-"], voxels_per_hz=VPH,
                                    affine=AFF, mask=mask)


def test_recovers_known_field(phantom, estimate):
    p, m, f, obj, mask = phantom
    est = estimate
    assert isinstance(est, PairEstimate)
    assert est.field_hz.shape == p.shape
    # Field with peak displacement ~6.5 voxels; our acceptance: <= 4 Hz RMSE in the brain.
    err = _rmse(est.field_hz, f, mask)
    assert err < 4.0, err
    assert np.corrcoef(est.field_hz[mask], f[mask])[0, 1] > 0.98
    assert est.info["agreement_after"] >= 0.97
    assert est.info["agreement_after"] > est.info["agreement_before"]
    # Every image's Jacobian stayed positive (invertibility constraint).
    assert all(li["min_jacobian"] > 0 for li in est.info["levels"])
    assert len(est.info["regularization"]) == len(est.info["levels"])
    assert np.all(np.isfinite(est.sigma_hz)) and np.all(est.sigma_hz >= 0)
    # Corrected reference: closer to the object than either distorted input.
    scale = obj[mask].mean() / est.corrected[mask].mean()
    e_corr = _rmse(est.corrected * scale, obj, mask)
    assert e_corr < 0.6 * min(_rmse(p, obj, mask), _rmse(m, obj, mask))


def test_without_a_mask_the_agreement_is_also_quoted_in_the_brain(phantom):
    # No mask given: the statistics mask is the corrected image's foreground, and the brain
    # (epicorr.brainmask, the mask every route's QC uses) lies inside it.
    p, m, _f, _o, _mask = phantom
    est = estimate_field_from_pair([p, m], pe_directions=["j", "j-"], voxels_per_hz=VPH, affine=AFF)
    assert est.brain_mask.shape == p.shape and not np.any(est.brain_mask & ~est.mask)
    assert 0 < est.brain_mask.sum() <= est.mask.sum()
    info = est.info
    assert info["agreement_after_brain"] > info["agreement_before_brain"]
    assert info["agreement_after_brain"] == pytest.approx(
        np.corrcoef(*(x[est.brain_mask] for x in est.polarity_after))[0, 1], abs=1e-4)
    assert est.polarity_before.shape == (2,) + p.shape and est.polarity_before.dtype == np.float32


def test_swapping_polarities_gives_the_same_field(phantom, estimate):
    p, m, _f, _o, mask = phantom
    swapped = estimate_field_from_pair([m, p], pe_directions=["j-", "j"], voxels_per_hz=VPH,
                                       affine=AFF, mask=mask)
    # Same physics, the images only listed in the other order: same field (the field is not negated).
    assert _rmse(swapped.field_hz, estimate.field_hz, mask) < 0.5


def test_pe_axis_i_and_invertibility_under_strong_field():
    # Peak displacement 7 voxels with |d'| up to about 0.9: near folding, still invertible.
    p, m, f, _o, mask = pair((48, 40, 24), pe_axis=0, voxels_per_hz=VPH, snr=60.0, seed=5, peak=140.0)
    est = estimate_field_from_pair([p, m], pe_directions=["i", "i-"], voxels_per_hz=VPH,
                                   affine=AFF, mask=mask)
    assert _rmse(est.field_hz, f, mask) < 6.0
    d = VPH * est.field_hz
    jac = 1.0 + np.gradient(d, axis=0)
    assert jac.min() > 0 and (1.0 - np.gradient(d, axis=0)).min() > 0


def test_noise_raises_uncertainty():
    p1, m1, _f, _o, mask = pair((32, 32, 16), snr=80.0, seed=6)
    p2, m2, _f, _o, _ = pair((32, 32, 16), snr=10.0, seed=6)
    lo = estimate_field_from_pair([p1, m1], pe_directions=["j", "j-"], voxels_per_hz=VPH,
                                  affine=AFF, mask=mask, rigid=False, combine=False)
    hi = estimate_field_from_pair([p2, m2], pe_directions=["j", "j-"], voxels_per_hz=VPH,
                                  affine=AFF, mask=mask, rigid=False, combine=False)
    assert np.median(hi.sigma_hz[mask]) > 1.5 * np.median(lo.sigma_hz[mask])


def test_four_images_series_and_different_readouts():
    shape = (40, 40, 24)
    rng = np.random.default_rng(7)
    _p, _m, f, obj, mask = pair(shape, snr=0, seed=7)
    vphs = [0.05, 0.035, 0.05, 0.035]
    pols = [1, 1, -1, -1]
    imgs = []
    for v, pol in zip(vphs, pols):
        clean = distort(obj, f, pe_axis=1, polarity=pol, voxels_per_hz=v)
        # a 2-volume series per image
        imgs.append(np.stack([clean + rng.standard_normal(shape) / 40 for _ in range(2)], -1))
    est = estimate_field_from_pair(imgs, pe_directions=["j", "j", "j-", "j-"],
                                   voxels_per_hz=vphs, affine=AFF, mask=mask, rigid=False)
    assert _rmse(est.field_hz, f, mask) < 4.0
    assert est.info["voxels_per_hz"] == vphs
    assert len(est.info["notes"]["series_motion_mm"][0]) == 1


def test_rigid_motion_between_polarities_is_removed():
    shape = (48, 48, 32)
    p, _m, f, obj, mask = pair(shape, snr=60.0, seed=8)
    # Move the head by 3 degrees about the slice axis before the reversed acquisition
    # (the field moves with it); the PE translation is zero.
    ang = np.deg2rad(3.0)
    rot = np.array([[np.cos(ang), -np.sin(ang), 0], [np.sin(ang), np.cos(ang), 0], [0, 0, 1]])
    c = (np.array(shape) - 1) / 2
    moved_obj = ndimage.affine_transform(obj, rot, offset=c - rot @ c, order=1)
    moved_f = ndimage.affine_transform(f, rot, offset=c - rot @ c, order=1, mode="nearest")
    m = distort(moved_obj, moved_f, pe_axis=1, polarity=-1, voxels_per_hz=VPH)
    m = np.abs(m + np.random.default_rng(8).standard_normal(shape) / 60)
    kw = dict(pe_directions=["j", "j-"], voxels_per_hz=VPH, affine=AFF, mask=mask)
    with_rigid = estimate_field_from_pair([p, m], **kw)
    without = estimate_field_from_pair([p, m], rigid=False, **kw)
    assert with_rigid.info["rigid"] and with_rigid.info["rigid"][0][1] > 1.0  # mm moved
    assert _rmse(with_rigid.field_hz, f, mask) < _rmse(without.field_hz, f, mask)
    assert with_rigid.info["agreement_after"] > without.info["agreement_after"]


# ----------------------------------------------------------------- restoration
def test_forward_matrix_integer_shift_and_conservation():
    rng = np.random.default_rng(9)
    t = rng.random((20, 3))
    a = _combine.forward_matrix(np.full((20, 3), 2.0))
    moved = (a @ t.ravel()).reshape(20, 3)
    np.testing.assert_allclose(moved[2:], t[:-2], atol=1e-12)  # exact translation by 2 voxels
    d = 3.0 * np.sin(np.linspace(0, np.pi, 20))[:, None] * np.ones((1, 3))
    a = _combine.forward_matrix(d)
    # Signal conservation of the box-integration model (columns sum to one inside the FOV).
    np.testing.assert_allclose(np.asarray(a.sum(axis=0)).ravel(), 1.0, atol=1e-12)


def test_least_squares_restoration_beats_the_jacobian_average():
    p, m, f, obj, mask = pair((48, 48, 16), snr=30.0, seed=10, peak=160.0)
    imgs = [np.moveaxis(x, 1, 0).copy() for x in (p, m)]
    d = [VPH * np.moveaxis(f, 1, 0), -VPH * np.moveaxis(f, 1, 0)]
    restored, info = _combine.restore(imgs, d)
    average = np.mean([_model.unwarp(i, dd) for i, dd in zip(imgs, d)], axis=0)
    o = np.moveaxis(obj, 1, 0)
    mk = np.moveaxis(mask, 1, 0)
    # Where one polarity is strongly compressed (|d'| > 0.3) the restoration is better.
    strong = mk & (np.abs(np.gradient(d[0], axis=0)) > 0.3)
    assert strong.sum() > 50
    assert _rmse(restored, o, strong) < _rmse(average, o, strong)
    assert info["relative_residual"] < 0.2


# ----------------------------------------------------------------- bad input
def _two(shape=(16, 16, 8)):
    rng = np.random.default_rng(11)
    return [rng.random(shape) + 0.1, rng.random(shape) + 0.1]


def test_same_polarity_rejected():
    with pytest.raises(EpicorrInputError, match="same phase-encode polarity") as err:
        estimate_field_from_pair(_two(), pe_directions=["j", "j"], voxels_per_hz=VPH, affine=AFF,
                                 files=["a_epi.nii.gz", "b_epi.nii.gz"])
    assert "PhaseEncodingDirection" in str(err.value)


@pytest.mark.parametrize("key,value", [("upsample", 0), ("upsample", 2.5), ("upsample", 64),
                                       ("regularization", -1.0), ("regularization", float("nan")),
                                       ("barrier", -0.1), ("levels", 0), ("iterations", (5,)),
                                       ("iterations", (5, 0)), ("motion_iterations", -1),
                                       ("edge_scale", 0.0), ("edge_scale", float("inf")),
                                       ("edge_passes", 0), ("harmonic", -1.0),
                                       ("harmonic", float("nan"))])
def test_bad_solver_options_rejected_before_any_work(key, value):
    # The option is named with its bad value in the one-line message (package error contract).
    with pytest.raises(EpicorrInputError, match=key) as err:
        estimate_field_from_pair(_two(), pe_directions=["j", "j-"], voxels_per_hz=VPH, affine=AFF,
                                 **{key: value})
    assert repr(value) in str(err.value)


@pytest.mark.parametrize("fill,word", [(np.nan, "NaN"), (0.0, "all zero")])
def test_empty_volumes_rejected_with_file_name(fill, word):
    imgs = _two()
    imgs[1] = np.full_like(imgs[1], fill)
    with pytest.raises(EpicorrInputError, match=word) as err:
        estimate_field_from_pair(imgs, pe_directions=["j", "j-"], voxels_per_hz=VPH, affine=AFF,
                                 files=["a_epi.nii.gz", "b_epi.nii.gz"])
    assert "b_epi.nii.gz" in str(err.value)


def test_missing_readout_and_mixed_axes_rejected():
    with pytest.raises(EpicorrInputError, match="TotalReadoutTime"):
        estimate_field_from_pair(_two(), pe_directions=["j", "j-"], voxels_per_hz=[VPH, None],
                                 affine=AFF)
    with pytest.raises(EpicorrInputError, match="different phase-encode axes"):
        estimate_field_from_pair(_two(), pe_directions=["i", "j-"], voxels_per_hz=VPH, affine=AFF)
    with pytest.raises(EpicorrInputError, match="at least two"):
        estimate_field_from_pair(_two()[:1], pe_directions=["j"], voxels_per_hz=VPH, affine=AFF)


def test_irreconcilable_grids_rejected():
    imgs = _two()
    rotated = AFF.copy()
    rotated[:3, :3] = AFF[:3, :3][:, [1, 0, 2]]  # PE axis j now points along world x
    with pytest.raises(EpicorrInputError, match="another way") as err:
        estimate_field_from_pair(imgs, pe_directions=["j", "j-"], voxels_per_hz=VPH,
                                 affine=[AFF, rotated], files=["a.nii", "b.nii"])
    assert "b.nii" in str(err.value)
    far = AFF.copy()
    far[:3, 3] = [500.0, 0, 0]
    with pytest.raises(EpicorrInputError, match="covers only"):
        estimate_field_from_pair(imgs, pe_directions=["j", "j-"], voxels_per_hz=VPH,
                                 affine=[AFF, far])


def test_shifted_grid_is_reconciled():
    p, m, f, _o, mask = pair((48, 48, 32), snr=60.0, seed=12)
    shifted = AFF.copy()
    shifted[2, 3] = 2.0  # one slice along k: resampled onto the first grid
    m_shift = ndimage.shift(m, (0, 0, -1.0), order=1, mode="nearest")
    kw = dict(pe_directions=["j", "j-"], voxels_per_hz=VPH, mask=mask, rigid=False, combine=False)
    est = estimate_field_from_pair([p, m_shift], affine=[AFF, shifted], **kw)
    base = estimate_field_from_pair([p, m], affine=AFF, **kw)
    assert est.info["notes"]["resampled"] == [1]
    inner = mask.copy()
    inner[..., :2] = inner[..., -2:] = False
    assert _rmse(est.field_hz, base.field_hz, inner) < 0.5
    assert _rmse(est.field_hz, f, inner) < 4.0


def test_band_limited_upsample_matches_the_continuous_sinusoid():
    # Source: the DFT interpolation theorem (a sampled sinusoid below Nyquist is
    # reproduced exactly by its trigonometric interpolant); reference values from
    # numpy's closed-form cosine.
    from epicorr.pair._model import LineSampler, band_limited_upsample

    n = 32
    y = np.arange(n)
    line = np.cos(2 * np.pi * 3 * y / n + 0.4)[:, None] * np.array([1.0, -2.0])[None, :]
    up = band_limited_upsample(line, 4)
    yf = np.arange(4 * n) / 4.0
    ref = np.cos(2 * np.pi * 3 * yf / n + 0.4)[:, None] * np.array([1.0, -2.0])[None, :]
    np.testing.assert_allclose(up, ref, atol=1e-12)
    # sampling at a third of a voxel beyond each sample: close to the analytic value
    smp = LineSampler(line, upsample=4)
    shift = np.full(line.shape, 1.0 / 3.0)
    val = smp.sample(shift, with_derivative=False)
    exact = np.cos(2 * np.pi * 3 * (y + 1.0 / 3.0) / n + 0.4)[:, None] * np.array([1.0, -2.0])[None, :]
    inner = slice(2, n - 2)  # positions clamp to the line's ends
    np.testing.assert_allclose(val[inner], exact[inner], atol=2e-3)
    plain = LineSampler(line).sample(shift, with_derivative=False)
    assert np.abs(val[inner] - exact[inner]).max() < np.abs(plain[inner] - exact[inner]).max()


def test_band_limited_sampler_derivative_matches_the_analytic_slope():
    # Source: the derivative of cos(2 pi k y / n + phi) in closed form; the
    # Gauss-Newton linearisation uses this derivative, scaled to raw voxels.
    from epicorr.pair._model import LineSampler

    n = 40
    y = np.arange(n)
    line = np.cos(2 * np.pi * 2 * y / n + 0.3)[:, None]
    shift = np.full(line.shape, 0.37)
    _, der = LineSampler(line, upsample=4).sample(shift)
    exact = -(2 * np.pi * 2 / n) * np.sin(2 * np.pi * 2 * (y + 0.37) / n + 0.3)[:, None]
    inner = slice(2, n - 2)
    np.testing.assert_allclose(der[inner], exact[inner], atol=2e-3)
