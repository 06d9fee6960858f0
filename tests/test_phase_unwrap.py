"""3-D phase unwrapping (epicorr.phase.unwrap_phase_3d).

External references:
* scikit-image's ``skimage.restoration.unwrap_phase`` (reliability-guided
  unwrapping, Herraez et al. 2002 / Abdul-Rahman et al. 2007) on shared cases;
* analytic smooth phases: where the true phase changes by less than pi per
  voxel, unwrapping must return it exactly up to one global multiple of 2 pi
  (Itoh's condition, Itoh 1982, from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from epicorr.phase import unwrap_phase_3d, wrap

skimage_restoration = pytest.importorskip("skimage.restoration")

TWO_PI = 2 * math.pi


def _grid(shape):
    return np.meshgrid(*[np.linspace(-1, 1, s) for s in shape], indexing="ij")


def _cycles_off(u, true, mask):
    """Whole cycles between ``u`` and ``true`` per voxel, minus the median offset."""
    k = np.round((u - true) / TWO_PI)
    return k - np.median(k[mask])


def test_analytic_phase_with_many_wraps_is_recovered_exactly():
    shape = (48, 44, 36)
    x, y, z = _grid(shape)
    # Many wraps: about 8 cycles across the volume, steepest step ~2.1 rad/voxel (< pi: Itoh's condition).
    true = 22 * x ** 2 + 12 * y ** 2 + 15 * z + 4 * np.sin(2.5 * x + y)
    assert (true.max() - true.min()) / TWO_PI > 7
    assert max(np.abs(np.diff(true, axis=a)).max() for a in range(3)) < math.pi
    u, info = unwrap_phase_3d(wrap(true))
    off = u - true
    # One global whole-cycle offset everywhere, exactly (to float rounding).
    n = np.round(np.median(off) / TWO_PI)
    np.testing.assert_allclose(off, TWO_PI * n, atol=1e-9)
    # The median of the result sits in (-pi, pi] (the brain-median rule).
    assert -math.pi < np.median(u) <= math.pi
    assert info["iterations"] >= 1


def test_result_is_congruent_and_deterministic(rng):
    shape = (32, 32, 24)
    x, y, z = _grid(shape)
    phi = wrap(9 * x + 6 * y ** 2 + rng.normal(0, 0.4, shape))
    u1, _ = unwrap_phase_3d(phi)
    u2, _ = unwrap_phase_3d(phi)
    np.testing.assert_array_equal(u1, u2)
    k = (u1 - phi) / TWO_PI
    np.testing.assert_allclose(k, np.round(k), atol=1e-9)


@pytest.mark.parametrize("noise", [0.0, 0.25, 0.5])
def test_agrees_with_scikit_image_on_a_noisy_ball(rng, noise):
    shape = (40, 40, 32)
    x, y, z = _grid(shape)
    true = 14 * x ** 2 - 10 * y * z + 8 * z + 3 * np.cos(3 * y)
    mask = x ** 2 + y ** 2 + z ** 2 < 0.85
    phi = wrap(true + rng.normal(0, noise, shape))
    ours, _ = unwrap_phase_3d(phi, mask=mask, quality=mask.astype(float))
    ref = skimage_restoration.unwrap_phase(np.ma.array(phi, mask=~mask)).filled(0.0)
    agree = _cycles_off(ours, ref, mask)[mask] == 0
    assert agree.mean() >= 0.999, agree.mean()
    # ...and both against the truth.
    assert (_cycles_off(ours, true, mask)[mask] == 0).mean() >= 0.999


def test_agrees_with_scikit_image_with_a_noise_patch_of_low_quality(rng):
    shape = (40, 40, 32)
    x, y, z = _grid(shape)
    true = 12 * x + 9 * y ** 2 + 6 * z ** 2
    mask = x ** 2 + y ** 2 + z ** 2 < 0.9
    magnitude = np.where(mask, 1.0, 0.0)
    phi = wrap(true + rng.normal(0, 0.1, shape))
    patch = mask & ((x - 0.3) ** 2 + y ** 2 + z ** 2 < 0.04)  # pure noise: a signal void
    phi[patch] = rng.uniform(-math.pi, math.pi, patch.sum())
    magnitude[patch] = 0.02
    ours, _ = unwrap_phase_3d(phi, mask=mask & ~patch, quality=magnitude)
    good = mask & ~patch
    ref = skimage_restoration.unwrap_phase(np.ma.array(phi, mask=~good)).filled(0.0)
    assert (_cycles_off(ours, ref, good)[good] == 0).mean() >= 0.999
    assert (_cycles_off(ours, true, good)[good] == 0).mean() >= 0.999


def test_isolated_noisy_voxels_do_not_spread(rng):
    shape = (36, 36, 28)
    x, y, z = _grid(shape)
    true = 16 * x ** 2 + 8 * y + 5 * z
    phi = wrap(true)
    bad = rng.random(shape) < 0.02
    phi[bad] = rng.uniform(-math.pi, math.pi, bad.sum())
    quality = np.where(bad, 0.0, 1.0)  # a magnitude-like quality flags them
    u, _ = unwrap_phase_3d(phi, quality=quality)
    good = ~bad
    assert (_cycles_off(u, true, good)[good] == 0).mean() >= 0.9995


def test_disconnected_pieces_take_the_cycle_of_the_smooth_trend(rng):
    shape = (56, 56, 32)
    x, y, z = _grid(shape)
    true = 20 * x ** 2 + 14 * y ** 2 + 6 * z  # quadratic: the second-order trend is exact
    main = x ** 2 + y ** 2 + z ** 2 < 0.55
    piece1 = (x + 0.8) ** 2 + (y - 0.8) ** 2 + z ** 2 < 0.02
    piece2 = (x - 0.82) ** 2 + (y + 0.8) ** 2 + z ** 2 < 0.015
    mask = main | piece1 | piece2
    phi = np.where(mask, wrap(true + rng.normal(0, 0.1, shape)), rng.uniform(-math.pi, math.pi, shape))
    u, info = unwrap_phase_3d(phi, quality=mask.astype(float), mask=mask)
    k = _cycles_off(u, true, mask)
    for piece in (main, piece1, piece2):
        assert np.all(k[piece] == 0)
    # scikit-image unwraps each piece on its own; inside each piece both agree up to a whole cycle.
    ref = skimage_restoration.unwrap_phase(np.ma.array(phi, mask=~mask)).filled(0.0)
    for piece in (main, piece1, piece2):
        kp = np.round((u - ref) / TWO_PI)[piece]
        assert np.all(kp == kp.flat[0])
