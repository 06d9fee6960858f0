"""Synthetic reversed-PE phantoms for the pair tests and benchmark.

The distorted images are made by the Chang & Fitzpatrick (1992) intensity
law, evaluated independently of the package's own resampling: on each PE
line the distorted image is ``I(x) = T(y(x)) * dy/dx`` where ``y(x)`` inverts
``x = y + d(y)`` by numpy's piecewise-linear ``np.interp`` of a 4x
supersampled line, and ``T`` is the analytic object sampled there.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage


def head(shape, *, seed=0):
    """A smooth head-like object (ellipsoids with texture), max about 1."""
    rng = np.random.default_rng(seed)
    grids = np.meshgrid(*[np.linspace(-1, 1, s) for s in shape], indexing="ij")
    x, y, z = grids
    r = np.sqrt((x / 0.8) ** 2 + (y / 0.85) ** 2 + (z / 0.8) ** 2)
    obj = 1.0 / (1.0 + np.exp((r - 1.0) / 0.03))
    r2 = np.sqrt(((x - 0.25) / 0.2) ** 2 + (y / 0.35) ** 2 + (z / 0.3) ** 2)
    obj += 0.6 / (1.0 + np.exp((r2 - 1.0) / 0.05))
    r3 = np.sqrt(((x + 0.3) / 0.15) ** 2 + ((y + 0.2) / 0.2) ** 2 + ((z - 0.1) / 0.25) ** 2)
    obj -= 0.5 / (1.0 + np.exp((r3 - 1.0) / 0.05))
    tex = ndimage.gaussian_filter(rng.standard_normal(shape), 1.5)
    tex /= tex.std()
    obj = obj * (1.0 + 0.25 * tex)
    return np.clip(obj, 0, None) / obj.max()


def brain_mask(shape):
    grids = np.meshgrid(*[np.linspace(-1, 1, s) for s in shape], indexing="ij")
    x, y, z = grids
    return np.sqrt((x / 0.72) ** 2 + (y / 0.77) ** 2 + (z / 0.72) ** 2) < 1.0


def field(shape, *, peak=120.0, gradient=20.0):
    """Smooth field (Hz): a frontal-sinus-like bump plus a linear gradient."""
    grids = np.meshgrid(*[np.linspace(-1, 1, s) for s in shape], indexing="ij")
    x, y, z = grids
    bump = peak * np.exp(-(((x) / 0.3) ** 2 + ((y - 0.6) / 0.25) ** 2 + ((z + 0.2) / 0.35) ** 2))
    return bump + gradient * y - 0.3 * peak * np.exp(-(((x - 0.5) / 0.3) ** 2 + ((z - 0.4) / 0.3) ** 2 + (y / 0.5) ** 2))


def distort(obj, field_hz, *, pe_axis, polarity, voxels_per_hz, sub=8):
    """Distorted image (same grid) by the Chang & Fitzpatrick law, line by line.

    Exact box integration: with ``C`` the cumulative signal along the line
    (``sub`` samples per voxel) and ``x(y) = y + d(y)`` monotone, distorted
    voxel ``x`` receives ``C(y(x + 1/2)) - C(y(x - 1/2))`` (np.interp inverts
    the map), which conserves signal and piles it up where ``x`` compresses.
    """
    T = np.ascontiguousarray(np.moveaxis(obj, pe_axis, -1))
    F = np.ascontiguousarray(np.moveaxis(field_hz, pe_axis, -1))
    n = T.shape[-1]
    centres = (np.arange(n * sub) + 0.5) / sub - 0.5
    edges = np.arange(n * sub + 1) / sub - 0.5
    x_edges = np.arange(n + 1) - 0.5
    grid = np.arange(n, dtype=float)
    Tl = T.reshape(-1, n)
    Fl = F.reshape(-1, n)
    out = np.empty(Tl.shape)
    for i in range(Tl.shape[0]):
        cum = np.concatenate([[0.0], np.cumsum(np.interp(centres, grid, Tl[i]) / sub)])
        xe = edges + polarity * voxels_per_hz * np.interp(edges, grid, Fl[i])
        out[i] = np.diff(np.interp(x_edges, xe, cum))
    return np.moveaxis(out.reshape(T.shape), -1, pe_axis)


def pair(shape=(48, 48, 32), *, pe_axis=1, voxels_per_hz=0.05, snr=40.0, seed=0, peak=120.0):
    """(plus, minus, field, obj, mask) with Rician-free Gaussian noise of sd 1/snr."""
    rng = np.random.default_rng(seed)
    obj = head(shape, seed=seed)
    f = field(shape, peak=peak)
    ims = []
    for pol in (1, -1):
        im = distort(obj, f, pe_axis=pe_axis, polarity=pol, voxels_per_hz=voxels_per_hz)
        if snr:
            im = np.abs(im + rng.standard_normal(shape) / snr)
        ims.append(im)
    return ims[0], ims[1], f, obj, brain_mask(shape)
