"""Regularised Gauss-Newton solver for the reversed-gradient problem.

Problem (per resolution level), with ``u`` the field in reference voxels
(``u = v_ref * field_hz``, PE axis first)::

    E(u) = 1/2 || r(u) ||^2  +  alpha/2 sum_a w_a || D+_a u ||^2  +  beta sum_k sum_y psi(1 + c_k u')

* ``r = mean_{k in +} U_k - mean_{k in -} U_k``, ``U_k`` the Jacobian-modulated
  unwarped images of :mod:`._model` (Chang & Fitzpatrick 1992);
* diffusion (gradient) smoothness along all three axes, forward differences
  with Neumann ends, weighted by ``w_a = (h_pe / h_a)^2`` so the penalty is on
  the physical gradient (Ruthotto et al. 2012);
* the barrier ``psi(v) = (v-1)^2 / v`` keeps every Jacobian ``1 + c_k u' > 0``;
  the line search also rejects any step that would make one non-positive.

Gauss-Newton: the data term's Hessian ``J^T J`` is block-diagonal with one
pentadiagonal block per PE line; so is the barrier's.  Only the smoothness
term couples lines.  Each Gauss-Newton system is solved by preconditioned
conjugate gradients whose preconditioner is the exact line-wise part (data +
barrier + PE smoothness + the diagonal of the cross-line smoothness),
factorised by a banded LDL^T vectorised over all lines at once (Macdonald &
Ruthotto 2018 exploit the same separability).

Edge-preserving smoothness (optional)
-------------------------------------
``LevelProblem.edge_weights`` multiplies the smoothness of each pair of
neighbours by a factor ``c_a`` in (0, 1].  :func:`charbonnier_weights` gives
the factors of one iteratively-reweighted least-squares (IRLS) pass for the
Charbonnier penalty ``delta^2 (sqrt(1 + (g / delta)^2) - 1)`` of the scaled
step ``g = sqrt(w_a) |D+_a u|`` (Charbonnier et al. 1997): ``c = 1 / sqrt(1
+ (g / delta)^2)``.  Steps much smaller than ``delta`` are smoothed as
before; larger ones (the steep field next to air-tissue interfaces) are
penalised roughly linearly instead of quadratically, so they are flattened
less.  ``alpha`` keeps the unweighted ``trace(L)`` of the rule below.

Harmonic penalty (optional)
---------------------------
``LevelProblem.harmonic_weights`` ``W`` (1 inside the brain) adds
``gamma/2 || W^(1/2) L u ||^2`` with ``L = sum_a w_a D+_a^T D+_a`` the
weighted graph Laplacian of the smoothness term.  Outside magnetised
sources the static field obeys Laplace's equation, so inside tissue of
nearly uniform susceptibility a harmonic field is penalised hardly at all,
however steep (the quadratic smoothness would flatten it); Li & Leigh (2001)
use the same property to map fields.  It is the curvature penalty of image
registration (Fischer & Modersitzki 2003) restricted to the brain.  Its
Hessian ``gamma L W L`` is applied exactly in the conjugate gradients; its
line-wise part (:func:`harmonic_line_bands`, pentadiagonal) joins the
preconditioner.  ``gamma = harmonic * trace(J^T J) / trace(L W L)``, so the
constant is dimensionless like ``lam``.  Right at the sources (within a voxel
or two of air) the field is not harmonic on the grid, so ``W`` is lowered
there by :func:`harmonic_source_weights` of the field before the refinement.

Automatic regularisation weight (per level)
-------------------------------------------
``alpha = lam * trace(J^T J) / trace(L)`` at the level's starting point,
where ``L`` is the smoothness Hessian (``sum_a w_a D+_a^T D+_a``).  The data
Hessian's trace measures the image energy (intensity and gradient squared)
that drives the fit at that resolution; dividing by ``trace(L)`` makes
``lam`` dimensionless and independent of the grid size, image scaling and
voxel size, so one ``lam`` serves every level and every input.  ``beta =
beta_rel * alpha``.  The defaults (``lam``, ``beta_rel``) are common practice
tuned on synthetic data, documented in :func:`epicorr.pair.estimate_field_from_pair`.

References
----------
Chang H, Fitzpatrick JM. IEEE Trans Med Imaging 1992;11:319-329.

Ruthotto L, Kugel H, Olesch J, Fischer B, Modersitzki J, Burger M, Wolters CH.
Diffeomorphic susceptibility artifact correction of diffusion-weighted
magnetic resonance images. Phys Med Biol 2012;57:5715-5731.

Macdonald J, Ruthotto L. J Math Imaging Vis 2018;60:268-282.

Charbonnier P, Blanc-Feraud L, Aubert G, Barlaud M. Deterministic
edge-preserving regularization in computed imaging. IEEE Trans Image Process
1997;6:298-311.

Li L, Leigh JS. High-precision mapping of the magnetic field utilizing the
harmonic function mean value property. J Magn Reson 2001;148:442-448
(citation from memory).

Fischer B, Modersitzki J. Curvature based image registration. J Math
Imaging Vis 2003;18:81-85.

Nocedal J, Wright SJ. Numerical Optimization, 2nd ed. Springer 2006
(Gauss-Newton, inexact Newton-CG, Armijo backtracking).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np

from . import _model as M

__all__ = ["LevelProblem", "solve_level", "downsample", "upsample_to", "factor_penta", "solve_penta",
           "charbonnier_weights", "harmonic_line_bands", "harmonic_source_weights"]


@dataclass
class LevelProblem:
    """One resolution level.

    Attributes
    ----------
    images : list of ndarray, shape (n, a, b)
        Normalised images, PE axis first.
    coefs : list of float
        ``c_k = polarity_k * v_k / v_ref`` (displacement per unit ``u``).
    weights : list of float
        ``+1/n_plus`` or ``-1/n_minus``: the residual is ``sum_k w_k U_k``.
    axis_weights : tuple of 3 float
        ``w_a`` for the axes of the ``(n, a, b)`` array (``w_0 = 1``).
    edge_weights : tuple of 3 ndarray, optional
        Per-edge factors ``c_a`` (shape of ``np.diff(u, axis=a)``, values in
        (0, 1]) multiplying the smoothness of each pair of neighbours; None = 1.
    harmonic_weights : ndarray, shape (n, a, b), optional
        Per-voxel weights ``W`` in [0, 1] of the harmonic penalty (1 inside
        the brain); None = no harmonic penalty.
    """

    images: list
    coefs: list
    weights: list
    axis_weights: tuple = (1.0, 1.0, 1.0)
    upsample: int = 1
    edge_weights: tuple | None = None
    harmonic_weights: np.ndarray | None = None
    info: dict = field(default_factory=dict)

    def __post_init__(self):
        self.samplers = [M.LineSampler(img, upsample=self.upsample) for img in self.images]


def _dot(a, b):
    """Inner product without BLAS threads (their start-up dominates at these sizes)."""
    return float(np.einsum("i,i->", a.ravel(), b.ravel()))


# ---------------------------------------------------------------- pentadiagonal LDL^T
def factor_penta(h0, h1, h2, *, overwrite=False):
    """Vectorised LDL^T of symmetric pentadiagonal matrices, one per PE line.

    ``h0, h1, h2`` have shape ``(n, ...)`` (see :func:`._model.gram_bands`):
    ``h0[i] = H[i, i]``, ``h1[i] = H[i, i+1]``, ``h2[i] = H[i, i+2]``.
    Returns ``(dinv, l1, l2)`` stored the same way as the bands:
    ``dinv[i] = 1 / D[i]``, ``l1[i] = L[i+1, i]`` and ``l2[i] = L[i+2, i]``.
    With ``overwrite=True`` the factors are written into the three input
    arrays (each band entry is read once, at its own step, before its slot is
    reused), so the factorisation needs no extra full-size arrays; the inputs
    are then destroyed.  The loop runs over the ``n`` positions of a line;
    every step is a numpy operation over all lines together.
    """
    if not overwrite:
        h0, h1, h2 = h0.copy(), h1.copy(), h2.copy()
    n = h0.shape[0]
    d, l1, l2 = h0, h1, h2
    floor = 1e-12 * max(float(np.mean(np.abs(h0))), 1e-300)
    for i in range(n):
        di = h0[i].copy()
        if i >= 1:
            di -= l1[i - 1] ** 2 * d[i - 1]
        if i >= 2:
            di -= l2[i - 2] ** 2 * d[i - 2]
        np.maximum(di, floor, out=di)
        d[i] = di
        if i + 2 < n:
            l2[i] = h2[i] / di
        else:
            l2[i] = 0.0
        if i + 1 < n:
            t = h1[i].copy()
            if i >= 1:
                t -= l2[i - 1] * d[i - 1] * l1[i - 1]
            l1[i] = t / di
        else:
            l1[i] = 0.0
    np.reciprocal(d, out=d)
    return d, l1, l2


def solve_penta(fac, rhs):
    """Solve with the factors of :func:`factor_penta` (all lines at once)."""
    dinv, l1, l2 = fac
    n = rhs.shape[0]
    z = np.array(rhs, dtype=np.float64, copy=True)
    for i in range(1, n):
        z[i] -= l1[i - 1] * z[i - 1]
        if i >= 2:
            z[i] -= l2[i - 2] * z[i - 2]
    z *= dinv
    for i in range(n - 2, -1, -1):
        z[i] -= l1[i] * z[i + 1]
        if i + 2 < n:
            z[i] -= l2[i] * z[i + 2]
    return z


# ---------------------------------------------------------------- smoothness
def _neighbour_count(n: int) -> np.ndarray:
    c = np.full(n, 2.0)
    if n == 1:
        c[:] = 0.0
    else:
        c[0] = c[-1] = 1.0
    return c


def charbonnier_weights(u, *, axis_weights, scale):
    """IRLS factors of the Charbonnier smoothness penalty at ``u``.

    Parameters
    ----------
    u : ndarray, shape (n, a, b)
        Field in reference voxels of displacement, PE axis first.
    axis_weights : tuple of 3 float
        ``w_a = (h_pe / h_a)^2`` of the level (``w_0 = 1``), so the step
        ``g = sqrt(w_a) |D+_a u|`` is in voxels of displacement per PE
        voxel length (a physical gradient, not a per-index one).
    scale : float
        ``delta`` > 0 in the same unit: steps below it are smoothed as by the
        quadratic penalty, larger ones less.

    Returns
    -------
    tuple of 3 ndarray
        ``c_a = 1 / sqrt(1 + (g / delta)^2)``, shape of ``np.diff(u, axis=a)``,
        values in (0, 1], single precision (they only scale the smoothness).
    """
    return tuple((1.0 / np.sqrt(1.0 + (np.sqrt(axis_weights[a]) * np.abs(np.diff(u, axis=a)) / scale) ** 2))
                 .astype(np.float32) for a in range(u.ndim))


def harmonic_source_weights(u, *, axis_weights, scale):
    """Weights of the harmonic penalty that spare the field's sources.

    The field obeys Laplace's equation only away from its sources; within a
    voxel or two of an air-tissue interface the discrete Laplacian of the true
    field is large (partial-volume susceptibility, and derivatives of the
    dipole field too steep for the grid).  Those voxels are outliers of the
    harmonic model, so they get the Cauchy weight of robust regression
    (Holland & Welsch 1977, from memory) of the Laplacian of a first field
    ``u``: ``1 / (1 + (|L u| / scale)^2)``.

    Parameters
    ----------
    u : ndarray, shape (n, a, b)
        First field (before the harmonic refinement), reference voxels of
        displacement, PE axis first.
    axis_weights : tuple of 3 float
        ``w_a = (h_pe / h_a)^2``; ``L u`` (:func:`_laplacian`) is then in voxels
        of displacement per squared PE voxel length.
    scale : float
        Laplacian at which the weight is 1/2, same unit, > 0.

    Returns
    -------
    ndarray, shape of ``u``, float32
        Values in (0, 1]; 1 where ``u`` is harmonic.
    """
    lu = _laplacian(np.asarray(u, dtype=np.float64), axis_weights)
    return (1.0 / (1.0 + (lu / scale) ** 2)).astype(np.float32)


def _laplacian(u, w, c=None):
    """``sum_a w_a D+_a^T C_a D+_a u`` (weighted graph Laplacian, Neumann ends)."""
    out = np.zeros_like(u)
    for ax in range(u.ndim):
        if u.shape[ax] < 2 or w[ax] == 0:
            continue
        du = np.diff(u, axis=ax)
        if c is not None:
            du = du * c[ax]
        sl_lo = [slice(None)] * u.ndim
        sl_hi = [slice(None)] * u.ndim
        sl_lo[ax] = slice(0, -1)
        sl_hi[ax] = slice(1, None)
        out[tuple(sl_lo)] -= w[ax] * du
        out[tuple(sl_hi)] += w[ax] * du
    return out


def _smooth_energy(u, w, c=None):
    return 0.5 * sum(w[ax] * float(np.sum((1.0 if c is None else c[ax]) * np.diff(u, axis=ax) ** 2))
                     for ax in range(u.ndim) if u.shape[ax] > 1)


def _cross_neighbours(x, w, c=None):
    """``sum_{a>0} w_a c_a * (sum of the two neighbours along a)`` (zero outside)."""
    out = np.zeros_like(x)
    for ax in range(1, x.ndim):
        if x.shape[ax] < 2 or w[ax] == 0:
            continue
        sl_lo = [slice(None)] * x.ndim
        sl_hi = [slice(None)] * x.ndim
        sl_lo[ax] = slice(0, -1)
        sl_hi[ax] = slice(1, None)
        wa = w[ax] if c is None else w[ax] * c[ax]
        out[tuple(sl_lo)] += wa * x[tuple(sl_hi)]
        out[tuple(sl_hi)] += wa * x[tuple(sl_lo)]
    return out


def _edge_sum(shape, ax, ca):
    """Per voxel: sum of ``ca`` over its (one or two) edges along ``ax``."""
    out = np.zeros(shape)
    sl_lo = [slice(None)] * len(shape)
    sl_hi = [slice(None)] * len(shape)
    sl_lo[ax] = slice(0, -1)
    sl_hi[ax] = slice(1, None)
    out[tuple(sl_lo)] += ca
    out[tuple(sl_hi)] += ca
    return out


def _smooth_diag_cross(shape, w, c=None):
    diag = np.zeros(shape)
    for ax in range(1, len(shape)):
        if c is not None and shape[ax] > 1:
            diag += w[ax] * _edge_sum(shape, ax, c[ax])
            continue
        cnt = _neighbour_count(shape[ax])
        bshape = [1] * len(shape)
        bshape[ax] = shape[ax]
        diag += w[ax] * cnt.reshape(bshape)
    return diag


# ---------------------------------------------------------------- harmonic penalty
def _harmonic_energy(u, w, hw):
    """``1/2 sum W (L u)^2`` with ``L`` the weighted graph Laplacian of :func:`_laplacian`."""
    lu = _laplacian(u, w)
    return 0.5 * float(np.sum(hw * lu * lu))


def _harmonic_apply(x, w, hw):
    """``L W L x``: the gradient of :func:`_harmonic_energy` (and its Hessian applied to ``x``)."""
    return _laplacian(hw * _laplacian(x, w), w)


def harmonic_line_bands(shape, w, hw):
    """Line-wise (PE) part of ``L W L``: pentadiagonal bands ``(h0, h1, h2)`` per line.

    Row ``i`` of ``L`` has the degree ``deg_i`` on the diagonal, ``-w_0`` at
    its PE neighbours and ``-w_a`` at its neighbours across lines.  Entries of
    ``L W L`` between two voxels of one line come from the line's own rows
    (the Gram matrix of ``sqrt(W) L_line``, pentadiagonal) and, on the
    diagonal only, from the cross-line neighbours ``j`` (``w_a^2 W_j``).
    """
    n = shape[0]
    deg = _smooth_diag_cross(shape, w)
    if n > 1:
        deg = deg + w[0] * _neighbour_count(n).reshape((n,) + (1,) * (len(shape) - 1))
    hw = np.asarray(hw, dtype=np.float64)
    sq = np.sqrt(hw)
    mid = sq * deg
    lo = np.zeros(shape)
    up = np.zeros(shape)
    if n > 1:
        lo[1:] = -w[0] * sq[1:]
        up[:-1] = -w[0] * sq[:-1]
    h0, h1, h2 = M.gram_bands(lo, mid, up)
    h0 += _cross_neighbours(hw, (0.0,) + tuple(wa * wa for wa in w[1:]))
    return h0, h1, h2


# ---------------------------------------------------------------- evaluation
def _evaluate(prob: LevelProblem, u, alpha, beta, *, full: bool, gamma: float = 0.0):
    """Objective (and, when ``full``, residual, Jacobian and barrier terms)."""
    w = prob.axis_weights
    du = M.derivative_pe(u)
    r = np.zeros_like(u)
    A = np.zeros_like(u) if full else None
    B = np.zeros_like(u) if full else None
    bar = 0.0
    bar_terms = []
    min_jac = np.inf
    for smp, c, wk in zip(prob.samplers, prob.coefs, prob.weights):
        jac = 1.0 + c * du
        mj = float(jac.min())
        min_jac = min(min_jac, mj)
        if mj <= 0:
            return np.inf, None
        if full:
            v, g = smp.sample(c * u, with_derivative=True)
            A += (wk * c) * g * jac
            B += (wk * c) * v
        else:
            v = smp.sample(c * u, with_derivative=False)
        r += wk * v * jac
        psi, d1, d2 = M.barrier(jac)
        bar += float(psi.sum())
        if full:
            bar_terms.append((c, d1, d2))
    energy = 0.5 * float(np.sum(r * r)) + alpha * _smooth_energy(u, w, prob.edge_weights) + beta * bar
    if gamma:
        energy += gamma * _harmonic_energy(u, w, prob.harmonic_weights)
    if not full:
        return energy, None
    return energy, dict(r=r, A=A, B=B, bar_terms=bar_terms, min_jac=min_jac)


def _line_hessian(prob, ev, alpha, beta, shape):
    """Bands of the line-wise part of the Gauss-Newton Hessian, and the data trace."""
    w = prob.axis_weights
    lo, mid, up = M.jacobian_bands(ev["A"], ev["B"])
    bands = M.gram_bands(lo, mid, up)
    data_trace = float(bands[0].sum())
    for c, _d1, d2 in ev["bar_terms"]:
        blo, bmid, bup = M.jacobian_bands(None, c * np.sqrt(d2))
        M.gram_bands(blo, bmid, bup, out=bands, scale=beta)
    h0, h1, h2 = bands
    n = shape[0]
    c = prob.edge_weights
    if n > 1 and c is not None:
        h0 += alpha * w[0] * _edge_sum(shape, 0, c[0])
        h1[:-1] -= alpha * w[0] * c[0]
    elif n > 1:
        h0 += alpha * w[0] * _neighbour_count(n).reshape((n,) + (1,) * (len(shape) - 1))
        h1[:-1] -= alpha * w[0]
    h0 += alpha * _smooth_diag_cross(shape, w, c)
    return (lo, mid, up), bands, data_trace


def _gradient(prob, ev, jb, u, alpha, beta, gamma=0.0):
    g = M.apply_bands_T(*jb, ev["r"])
    g += alpha * _laplacian(u, prob.axis_weights, prob.edge_weights)
    if gamma:
        g += gamma * _harmonic_apply(u, prob.axis_weights, prob.harmonic_weights)
    for c, d1, _d2 in ev["bar_terms"]:
        blo, bmid, bup = M.jacobian_bands(None, np.full_like(u, c))
        g += beta * M.apply_bands_T(blo, bmid, bup, d1)
    return g


def _pcg(bands, alpha, w, rhs, *, maxiter, rtol, c=None, gamma=0.0, hw=None, pre_bands=None):
    """PCG for ``H x = rhs``; H = line bands - alpha * cross-line neighbour coupling
    (+ ``gamma L W L`` when ``gamma``); preconditioned by ``pre_bands`` (default ``bands``).
    ``pre_bands`` must be arrays of their own: they are factorised in place (destroyed)."""
    h0, h1, h2 = bands
    fac = factor_penta(*bands) if pre_bands is None else factor_penta(*pre_bands, overwrite=True)

    def hmul(x):
        y = M.band_matvec(h0, h1, h2, x) - alpha * _cross_neighbours(x, w, c)
        if gamma:
            y += gamma * _harmonic_apply(x, w, hw)
        return y

    x = np.zeros_like(rhs)
    res = rhs.copy()
    z = solve_penta(fac, res)
    p = z.copy()
    rz = float(_dot(res, z))
    norm0 = float(np.sqrt(_dot(rhs, rhs)))
    it = 0
    if norm0 == 0:
        return x, 0
    for it in range(1, maxiter + 1):
        q = hmul(p)
        pq = float(_dot(p, q))
        if pq <= 0:
            break
        a = rz / pq
        x += a * p
        res -= a * q
        if float(np.sqrt(_dot(res, res))) <= rtol * norm0:
            break
        z = solve_penta(fac, res)
        rz_new = float(_dot(res, z))
        p *= rz_new / rz
        p += z
        rz = rz_new
    return x, it


def solve_level(prob: LevelProblem, u0, *, lam, beta_rel, max_iter, tol=1e-4,
                cg_maxiter=15, cg_rtol=2e-2, harmonic=0.0):
    """Minimise ``E`` on one level by Gauss-Newton-PCG with Armijo backtracking.

    Parameters
    ----------
    prob : LevelProblem
    u0 : ndarray, shape (n, a, b)
        Starting field, reference voxels of this level.
    lam : float
        Dimensionless regularisation constant (see the module docstring).
    beta_rel : float
        Barrier weight relative to ``alpha``.
    max_iter : int
        Gauss-Newton iterations at most.
    tol : float
        Stop when the relative decrease of ``E`` is below ``tol``.
    harmonic : float
        Dimensionless constant of the harmonic penalty (used when
        ``prob.harmonic_weights`` is given): ``gamma = harmonic *
        trace(J^T J) / trace(L W L)`` (see the module docstring).

    Returns
    -------
    u : ndarray
    info : dict
        ``alpha``, ``beta``, ``gamma``, ``iterations``, ``cg_iterations``,
        ``energy`` (first and last), ``hess_diag`` (Gauss-Newton Hessian
        diagonal at the solution), ``residual`` (at the solution),
        ``min_jacobian``.
    """
    t0 = time.perf_counter()
    u = np.array(u0, dtype=np.float64, copy=True)
    shape = u.shape
    w = prob.axis_weights
    hw = prob.harmonic_weights
    # Automatic weight: alpha = lam * trace(J^T J) / trace(L) at the start.
    e0, ev = _evaluate(prob, u, 0.0, 0.0, full=True)
    if ev is None:
        u[...] = 0.0
        e0, ev = _evaluate(prob, u, 0.0, 0.0, full=True)
    jb, bands, data_trace = _line_hessian(prob, ev, 0.0, 0.0, shape)
    lap_trace = float(w[0] * 2 * max(shape[0] - 1, 0) * np.prod(shape[1:])
                      + _smooth_diag_cross(shape, w).sum())
    alpha = lam * data_trace / max(lap_trace, 1e-300)
    if not np.isfinite(alpha) or alpha <= 0:
        alpha = lam
    beta = beta_rel * alpha
    gamma = 0.0
    hb = None
    if hw is not None and harmonic > 0:
        hb = harmonic_line_bands(shape, w, hw)
        h_trace = float(hb[0].sum())
        if h_trace > 0 and np.isfinite(data_trace) and data_trace > 0:
            gamma = harmonic * data_trace / h_trace
        else:
            hb = None

    def pre(bands):
        return None if hb is None else tuple(b + gamma * h for b, h in zip(bands, hb))

    energy, ev = _evaluate(prob, u, alpha, beta, full=True, gamma=gamma)
    energies = [energy]
    cg_total = 0
    it = 0
    for it in range(1, max_iter + 1):
        jb, bands, _ = _line_hessian(prob, ev, alpha, beta, shape)
        g = _gradient(prob, ev, jb, u, alpha, beta, gamma)
        step, ncg = _pcg(bands, alpha, w, -g, maxiter=cg_maxiter, rtol=cg_rtol, c=prob.edge_weights,
                         gamma=gamma, hw=hw, pre_bands=pre(bands))
        cg_total += ncg
        slope = float(_dot(g, step))
        if slope >= 0:  # not a descent direction (should not happen): steepest descent
            step = -g
            slope = -float(_dot(g, g))
        # The Hessian bands and the gradient are rebuilt from the accepted trial;
        # freeing them here lowers the peak memory of the line search.
        del jb, bands, g
        t = 1.0
        accepted = False
        for _ in range(12):
            cand = u + t * step
            # Evaluated in full: the accepted trial's Jacobian is reused next iteration.
            e_new, ev_new = _evaluate(prob, cand, alpha, beta, full=True, gamma=gamma)
            if np.isfinite(e_new) and e_new <= energy + 1e-4 * t * slope:
                accepted = True
                break
            t *= 0.5
        if not accepted:
            break
        u = cand
        decrease = energy - e_new
        energy, ev = e_new, ev_new
        energies.append(energy)
        if decrease <= tol * abs(energies[0]):
            break
    jb, bands, _ = _line_hessian(prob, ev, alpha, beta, shape)
    hdiag = bands[0] if hb is None else bands[0] + gamma * hb[0]
    info = dict(alpha=alpha, beta=beta, gamma=gamma, iterations=it, cg_iterations=cg_total,
                energy_start=energies[0], energy_end=energy, hess_diag=hdiag,
                residual=ev["r"], min_jacobian=ev["min_jac"],
                seconds=time.perf_counter() - t0)
    return u, info


# ---------------------------------------------------------------- pyramid
def downsample(x, factors):
    """Block mean by ``factors`` (1 or 2 per axis); odd sizes are edge-padded."""
    out = np.asarray(x, dtype=np.float64)
    for ax, f in enumerate(factors):
        if f == 1:
            continue
        n = out.shape[ax]
        if n % 2:
            pad = [(0, 0)] * out.ndim
            pad[ax] = (0, 1)
            out = np.pad(out, pad, mode="edge")
        sl0 = [slice(None)] * out.ndim
        sl1 = [slice(None)] * out.ndim
        sl0[ax] = slice(0, None, 2)
        sl1[ax] = slice(1, None, 2)
        out = 0.5 * (out[tuple(sl0)] + out[tuple(sl1)])
    return out


def upsample_to(x, shape, factors):
    """Linear interpolation from a :func:`downsample` grid back to ``shape``.

    Fine voxel ``i`` sits at coarse coordinate ``(i - 0.5) / 2`` on an axis
    that was halved (block centres), clamped at the ends.
    """
    out = np.asarray(x, dtype=np.float64)
    for ax, f in enumerate(factors):
        if f == 1:
            continue
        nc = out.shape[ax]
        pos = np.clip((np.arange(shape[ax]) - 0.5) / 2.0, 0, nc - 1)
        i0 = np.minimum(np.floor(pos).astype(int), max(nc - 2, 0))
        t = pos - i0
        i1 = np.minimum(i0 + 1, nc - 1)
        bshape = [1] * out.ndim
        bshape[ax] = shape[ax]
        t = t.reshape(bshape)
        out = np.take(out, i0, axis=ax) * (1 - t) + np.take(out, i1, axis=ax) * t
    return out
