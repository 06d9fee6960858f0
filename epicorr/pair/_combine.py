"""Corrected reference from both polarities by least-squares restoration.

Forward model (box integration along PE): undistorted voxel ``y`` is the
cell ``[y - 1/2, y + 1/2]``; image ``k`` maps it to ``[y - 1/2 + d_k(y - 1/2),
y + 1/2 + d_k(y + 1/2)]`` (cell-edge displacements by linear interpolation)
and spreads its signal ``T(y)`` uniformly over that interval, so distorted
voxel ``x`` receives ``T(y) * overlap(x, y) / length(y)``.  Signal is
conserved, compression piles it up and stretching spreads it: this is the
Chang & Fitzpatrick intensity law in integral form.  With ``A_k`` that
matrix (block-diagonal, one block per PE line)::

    T = argmin_T  sum_k || A_k T - I_k ||^2 + eps || D+ T ||^2

solved by conjugate gradients on the normal equations (all lines at once;
the system is block-diagonal, so this is the per-line least-squares
restoration).  Where one polarity is compressed (its ``A_k`` is
ill-conditioned) the other, stretched one carries the information; a plain
average of the two Jacobian-modulated unwarped images would instead copy
the compressed image's blur and noise amplification into the result
(Andersson et al. 2003 argue for this least-squares restoration).

References
----------
Chang H, Fitzpatrick JM. IEEE Trans Med Imaging 1992;11:319-329.

Andersson JLR, Skare S, Ashburner J. How to correct susceptibility
distortions in spin-echo echo-planar images: application to diffusion tensor
imaging. NeuroImage 2003;20:870-888.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse
from scipy.sparse import linalg as splinalg

from . import _model as M

__all__ = ["forward_matrix", "restore"]


def forward_matrix(d: np.ndarray) -> sparse.csc_matrix:
    """Box-integration distortion matrix ``A`` for displacement ``d`` (PE axis first).

    ``d`` has shape ``(n, ...)`` in voxels; the matrix acts on arrays of that
    shape raveled in C order and is block-diagonal along PE lines.
    """
    n = d.shape[0]
    m = int(np.prod(d.shape[1:], dtype=np.int64))
    dd = d.reshape(n, m)
    edge = np.empty((n + 1, m))
    edge[1:-1] = 0.5 * (dd[1:] + dd[:-1])
    edge[0] = dd[0]
    edge[-1] = dd[-1]
    y = np.arange(n, dtype=np.float64)[:, None]
    lo = y - 0.5 + edge[:-1]
    hi = y + 0.5 + edge[1:]
    length = np.maximum(hi - lo, 1e-6)
    k_taps = int(np.ceil(float(length.max()))) + 1
    first = np.floor(lo + 0.5)
    col = np.arange(m, dtype=np.int64)[None, :]
    nn = n * m
    itype = np.int32 if nn * k_taps < 2 ** 31 - 1 else np.int64
    rows = np.empty((n, m, k_taps), dtype=itype)
    vals = np.empty((n, m, k_taps))
    for j in range(k_taps):
        x = first + j
        ov = np.minimum(hi, x + 0.5) - np.maximum(lo, x - 0.5)
        ok = (ov > 0) & (x >= 0) & (x <= n - 1)
        vals[..., j] = np.where(ok, ov / length, 0.0)
        rows[..., j] = np.clip(x, 0, n - 1).astype(itype) * m + col
        del x, ov, ok
    indptr = np.arange(0, k_taps * nn + 1, k_taps, dtype=itype)
    del edge, lo, hi, length, first
    mat = sparse.csc_matrix((vals.reshape(-1), rows.reshape(-1), indptr), shape=(nn, nn), copy=False)
    return mat


def restore(images, displacements, *, eps=0.02, maxiter=30, rtol=1e-3):
    """Least-squares restoration of the undistorted image from several polarities.

    Parameters
    ----------
    images : list of ndarray, shape (n, ...)
        Distorted images (PE axis first), on a common intensity scale.
    displacements : list of ndarray, shape (n, ...)
        Each image's displacement in undistorted space, voxels.
    eps : float
        Weight of the smoothness term along PE, relative to one image's
        unit-Jacobian normal-matrix diagonal (common practice: small, only to
        keep the problem well-posed where every image is compressed).

    Returns
    -------
    restored : ndarray, shape (n, ...)
    info : dict
        ``cg_iterations`` and ``relative_residual`` of the data fit.
    """
    shape = images[0].shape
    n = shape[0]
    mats = [forward_matrix(d) for d in displacements]
    rhs = np.zeros(int(np.prod(shape)))
    diag = np.zeros_like(rhs)
    for A, img in zip(mats, images):
        rhs += A.T @ img.ravel()
        sq = A.copy()
        sq.data **= 2
        diag += np.asarray(sq.sum(axis=0)).ravel()
        del sq
    m = rhs.size // n
    eps_abs = eps * len(images)

    def smooth(x):
        x = x.reshape(n, m)
        out = np.zeros_like(x)
        dx = np.diff(x, axis=0)
        out[:-1] -= dx
        out[1:] += dx
        return out.ravel()

    def matvec(x):
        out = eps_abs * smooth(x)
        for A in mats:
            out += A.T @ (A @ x)
        return out

    cnt = np.full(n, 2.0)
    cnt[0] = cnt[-1] = 1.0
    diag += eps_abs * np.repeat(cnt, m)
    op = splinalg.LinearOperator((rhs.size, rhs.size), matvec=matvec, dtype=np.float64)
    pre = splinalg.LinearOperator((rhs.size, rhs.size), matvec=lambda x: x / diag, dtype=np.float64)
    x0 = np.mean([M.unwarp(img, d) for img, d in zip(images, displacements)], axis=0).ravel()
    iters = [0]

    def count(_):
        iters[0] += 1

    sol, _ = splinalg.cg(op, rhs, x0=x0, rtol=rtol, maxiter=maxiter, M=pre, callback=count)
    fit = sum(float(np.sum((A @ sol - img.ravel()) ** 2)) for A, img in zip(mats, images))
    energy = sum(float(np.sum(img ** 2)) for img in images)
    return sol.reshape(shape), dict(cg_iterations=iters[0], relative_residual=float(np.sqrt(fit / energy)))
