"""1-D interpolation matrices used to put the object and the field on finer grids.

* Linear, periodic: the object along the phase-encode axis (the PE field of
  view is periodic: signal leaving one edge aliases in at the other).
* Cubic convolution (Keys 1981, a = -1/2), edges clamped: the field, which is
  smooth; it reproduces polynomials up to degree 2 exactly away from the edges.

References
----------
Keys R. Cubic convolution interpolation for digital image processing. IEEE
Trans Acoust Speech Signal Process 1981;29:1153-1160.
"""

from __future__ import annotations

import numpy as np


def linear_matrix(n: int, positions, *, periodic: bool) -> np.ndarray:
    """Rows interpolate ``n`` samples (at 0..n-1) linearly at ``positions`` (voxel units)."""
    pos = np.asarray(positions, float)
    lo = np.floor(pos).astype(int)
    t = pos - lo
    m = np.zeros((pos.size, n))
    rows = np.arange(pos.size)
    for idx, w in ((lo, 1 - t), (lo + 1, t)):
        idx = np.mod(idx, n) if periodic else np.clip(idx, 0, n - 1)
        np.add.at(m, (rows, idx), w)
    return m


def _keys(s: np.ndarray, a: float = -0.5) -> np.ndarray:
    s = np.abs(s)
    w = np.where(s <= 1, (a + 2) * s ** 3 - (a + 3) * s ** 2 + 1, 0.0)
    return np.where((s > 1) & (s < 2), a * s ** 3 - 5 * a * s ** 2 + 8 * a * s - 4 * a, w)


def cubic_matrix(n: int, positions) -> np.ndarray:
    """Rows interpolate ``n`` samples at ``positions`` by Keys cubic convolution, edges clamped.

    Near an edge the missing samples are extrapolated linearly from the last
    two (so a linear field stays linear up to the edge)."""
    pos = np.asarray(positions, float)
    base = np.floor(pos).astype(int)
    m = np.zeros((pos.size, n))
    rows = np.arange(pos.size)
    for off in (-1, 0, 1, 2):
        idx = base + off
        w = _keys(pos - idx)
        if n == 1:
            np.add.at(m, (rows, np.zeros_like(idx)), w)
            continue
        # linear extrapolation beyond the edges: x[-e] = x0 + e (x0 - x1), etc.
        low = idx < 0
        high = idx > n - 1
        mid = ~(low | high)
        np.add.at(m, (rows[mid], idx[mid]), w[mid])
        e = -idx[low]
        np.add.at(m, (rows[low], np.zeros(low.sum(), int)), w[low] * (1 + e))
        np.add.at(m, (rows[low], np.ones(low.sum(), int)), -w[low] * e)
        e = idx[high] - (n - 1)
        np.add.at(m, (rows[high], np.full(high.sum(), n - 1)), w[high] * (1 + e))
        np.add.at(m, (rows[high], np.full(high.sum(), n - 2)), -w[high] * e)
    return m
