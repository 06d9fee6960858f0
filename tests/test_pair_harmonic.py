"""Harmonic penalty of the reversed-PE solver (``harmonic=``).

Known answers: the graph Laplacian and ``L W L`` are checked against dense
matrices built with scipy.sparse (Kronecker sums of 1-D Neumann second
differences, the textbook construction); the penalty vanishes on the harmonic
polynomial ``x^2 - y^2`` and equals ``1/2 * 4^2`` per voxel on ``x^2 + y^2``
(second differences of ``x^2`` are exactly 2); the gradient is checked by
central differences; and on a pair distorted by a physical field (a
magnetised sphere outside the brain, which is harmonic there) the option
lowers the field error.
"""

from __future__ import annotations

import numpy as np
import pytest
from pair_phantom import brain_mask, distort, head
from scipy import sparse

from epicorr.pair import estimate_field_from_pair
from epicorr.pair._solver import (LevelProblem, _harmonic_apply, _harmonic_energy, _laplacian,
                                  harmonic_line_bands, harmonic_source_weights, solve_level)

SHAPE = (6, 5, 4)
W_AX = (1.0, 0.5, 2.0)


def _dense_laplacian(shape, w):
    """``sum_a w_a D_a^T D_a`` (Neumann forward differences) as a dense matrix, C order."""
    def second_diff(n):
        d = sparse.diags([-np.ones(n - 1), np.ones(n - 1)], [0, 1], shape=(n - 1, n))
        return (d.T @ d).toarray()

    eye = [np.eye(n) for n in shape]
    total = np.zeros((int(np.prod(shape)),) * 2)
    for a in range(3):
        factors = [second_diff(shape[b]) if b == a else eye[b] for b in range(3)]
        total += w[a] * np.kron(np.kron(factors[0], factors[1]), factors[2])
    return total


def test_laplacian_matches_kronecker_sum():
    rng = np.random.default_rng(0)
    u = rng.standard_normal(SHAPE)
    ref = _dense_laplacian(SHAPE, W_AX) @ u.ravel()
    assert np.allclose(_laplacian(u, W_AX).ravel(), ref)


def test_line_bands_are_the_line_blocks_of_lwl():
    rng = np.random.default_rng(1)
    hw = (rng.random(SHAPE) > 0.4).astype(np.float32) * rng.random(SHAPE).astype(np.float32)
    lap = _dense_laplacian(SHAPE, W_AX)
    full = lap @ np.diag(hw.ravel().astype(float)) @ lap
    h0, h1, h2 = harmonic_line_bands(SHAPE, W_AX, hw)
    idx = np.arange(int(np.prod(SHAPE))).reshape(SHAPE)
    n = SHAPE[0]
    for i in range(n):
        assert np.allclose(h0[i], full[idx[i], idx[i]])
        if i + 1 < n:
            assert np.allclose(h1[i], full[idx[i], idx[i + 1]])
        if i + 2 < n:
            assert np.allclose(h2[i], full[idx[i], idx[i + 2]])
    # and L W L x applied matrix-free is the dense product
    x = rng.standard_normal(SHAPE)
    assert np.allclose(_harmonic_apply(x, W_AX, hw).ravel(), full @ x.ravel())


def test_penalty_known_answers():
    shape = (9, 8, 7)
    i, j, _ = np.meshgrid(*[np.arange(s, dtype=float) for s in shape], indexing="ij")
    interior = np.zeros(shape, np.float32)
    interior[1:-1, 1:-1, 1:-1] = 1.0
    w = (1.0, 1.0, 1.0)
    assert _harmonic_energy(i ** 2 - j ** 2, w, interior) == pytest.approx(0.0, abs=1e-9)
    assert _harmonic_energy(i ** 2 + j ** 2, w, interior) == pytest.approx(0.5 * 16.0 * interior.sum())


def test_gradient_by_central_differences():
    rng = np.random.default_rng(2)
    u = rng.standard_normal(SHAPE)
    hw = rng.random(SHAPE).astype(np.float32)
    v = rng.standard_normal(SHAPE)
    eps = 1e-5
    num = (_harmonic_energy(u + eps * v, W_AX, hw) - _harmonic_energy(u - eps * v, W_AX, hw)) / (2 * eps)
    assert np.sum(_harmonic_apply(u, W_AX, hw) * v) == pytest.approx(num, rel=1e-6)


def test_solve_level_without_weights_is_unchanged():
    rng = np.random.default_rng(3)
    img = np.clip(rng.random((16, 6, 5)), 0.1, None)
    moved = np.roll(img, 1, axis=0)
    args = dict(lam=0.2, beta_rel=0.1, max_iter=4)
    base = LevelProblem(images=[img, moved], coefs=[1.0, -1.0], weights=[1.0, -1.0])
    u0, info0 = solve_level(base, np.zeros(img.shape), **args)
    u1, info1 = solve_level(base, np.zeros(img.shape), harmonic=300.0, **args)  # no weights: off
    assert info0["gamma"] == 0.0 and info1["gamma"] == 0.0
    assert np.array_equal(u0, u1)
    with_w = LevelProblem(images=[img, moved], coefs=[1.0, -1.0], weights=[1.0, -1.0],
                          harmonic_weights=np.ones(img.shape, np.float32))
    u2, info2 = solve_level(with_w, np.zeros(img.shape), harmonic=300.0, **args)
    assert info2["gamma"] > 0 and info2["energy_end"] < info2["energy_start"]


def _sphere_field(shape, centre, radius, amplitude):
    """Field (Hz) of a uniformly magnetised sphere: outside it, a point dipole at its centre,
    ``amplitude * a^3 (2 z^2 - x^2 - y^2) / r^5`` (B0 along k; standard magnetostatics, from memory)."""
    g = np.meshgrid(*[np.arange(s, dtype=float) for s in shape], indexing="ij")
    x, y, z = [gi - ci for gi, ci in zip(g, centre)]
    r2 = x * x + y * y + z * z
    f = amplitude * radius ** 3 * (2 * z * z - x * x - y * y) / np.maximum(r2, 1e-9) ** 2.5
    f[r2 < radius ** 2] = 0.0
    return f


def test_harmonic_option_lowers_error_on_a_physical_field():
    shape = (48, 48, 32)
    vph = 0.52e-3 * shape[1]
    obj = head(shape)
    mask = brain_mask(shape)
    f = _sphere_field(shape, (24.0, 46.0, 12.0), 5.0, 100.0)   # an air-like pocket in front of the brain
    # the test field really is harmonic in the brain: its discrete Laplacian is small
    # next to its second differences along one axis (two voxels off the sphere, where
    # the 7-point stencil resolves the 1/r^3 fall-off)
    lap = -_laplacian(f, (1.0, 1.0, 1.0))
    d2 = np.zeros_like(f)
    d2[:, 1:-1] = np.diff(f, 2, axis=1)
    g = np.meshgrid(*[np.arange(s, dtype=float) for s in shape], indexing="ij")
    off = (g[0] - 24.0) ** 2 + (g[1] - 46.0) ** 2 + (g[2] - 12.0) ** 2 >= 7.0 ** 2
    inner = mask & off
    inner[:, [0, -1]] = False
    assert np.sqrt(np.mean(lap[inner] ** 2)) < 0.2 * np.sqrt(np.mean(d2[inner] ** 2))
    rng = np.random.default_rng(0)
    ims = [distort(obj, f, pe_axis=1, polarity=s, voxels_per_hz=vph) + rng.normal(0, 1 / 40, shape)
           for s in (1, -1)]
    errs = {}
    for h in (0.0, 300.0):
        est = estimate_field_from_pair(ims, pe_directions=["j", "j-"], voxels_per_hz=vph,
                                       affine=np.diag([3.0, 3.0, 3.0, 1.0]), mask=mask, harmonic=h)
        errs[h] = float(np.sqrt(np.mean((est.field_hz - f)[mask] ** 2)))
        assert est.info["harmonic_voxels"] == (int(mask.sum()) if h else 0)
    assert errs[300.0] < 0.7 * errs[0.0], errs


def test_source_weights_known_answers_and_sphere():
    # Interior of x^2 - y^2 (harmonic): L u = 0, weight exactly 1.  Interior of x^2 + y^2:
    # second differences of x^2 are exactly 2, so |L u| = 4 and the weight is 1 / (1 + (4/s)^2).
    g = np.meshgrid(*[np.arange(n, dtype=float) for n in (9, 8, 7)], indexing="ij")
    inner = (slice(1, -1),) * 3
    w = harmonic_source_weights(g[0] ** 2 - g[1] ** 2, axis_weights=(1.0, 1.0, 1.0), scale=0.3)
    assert w.dtype == np.float32 and np.all(w[inner] == 1.0)
    w = harmonic_source_weights(g[0] ** 2 + g[1] ** 2, axis_weights=(1.0, 1.0, 1.0), scale=2.0)
    np.testing.assert_allclose(w[inner], 1.0 / (1.0 + 2.0 ** 2), rtol=1e-6)
    # A magnetised sphere's field (point dipole outside, 0 inside, from memory): the step at its
    # surface is a source, its far field is not.
    shape = (40, 40, 40)
    f = _sphere_field(shape, (20.0, 20.0, 20.0), 5.0, 3.0)
    w = harmonic_source_weights(f, axis_weights=(1.0, 1.0, 1.0), scale=0.3)
    r = np.sqrt(sum((gi - 20.0) ** 2 for gi in np.meshgrid(*[np.arange(40.0)] * 3, indexing="ij")))
    assert w[(r > 4.0) & (r < 6.0)].min() < 0.5
    assert w[(r > 10.0) & (r < 15.0)].min() > 0.9


def test_harmonic_without_mask_uses_the_derived_brain():
    shape = (40, 40, 24)
    vph = 0.52e-3 * shape[1]
    obj = head(shape)
    f = _sphere_field(shape, (20.0, 39.0, 9.0), 4.0, 100.0)
    ims = [distort(obj, f, pe_axis=1, polarity=s, voxels_per_hz=vph) for s in (1, -1)]
    est = estimate_field_from_pair(ims, pe_directions=["j", "j-"], voxels_per_hz=vph,
                                   affine=np.diag([3.0, 3.0, 3.0, 1.0]), harmonic=300.0)
    assert 0 < est.info["harmonic_voxels"] < int(np.prod(shape))
    assert np.isfinite(est.field_hz).all()
