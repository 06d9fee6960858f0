"""Driver: coarse-to-fine field estimation from a reversed phase-encode set."""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage

from ..brainmask import epi_brain_mask
from ..errors import EpicorrInputError
from . import _combine, _model, _rigid
from ._inputs import prepare_inputs
from ._solver import (LevelProblem, charbonnier_weights, downsample, harmonic_source_weights, solve_level,
                      upsample_to)

__all__ = ["PairEstimate", "estimate_field_from_pair", "DEFAULT_REGULARIZATION", "DEFAULT_BARRIER",
           "DEFAULT_UPSAMPLE", "DEFAULT_EDGE_PASSES", "DEFAULT_HARMONIC"]

#: Dimensionless smoothness constant ``lam`` of the automatic rule
#: ``alpha = lam * trace(J^T J) / trace(L)`` (common practice: tuned on
#: synthetic heads at SNR 20-60 for fields up to a few hundred Hz).
DEFAULT_REGULARIZATION = 0.2
#: Barrier weight relative to ``alpha`` (common practice).
DEFAULT_BARRIER = 0.1
#: Band-limited interpolation along PE: each line is DFT-interpolated onto a grid
#: this many times finer before cubic sampling (1 = plain cubic convolution).  An
#: EPI image along PE is the inverse DFT of its k-space lines, so the trigonometric
#: interpolant is its exact continuous form; cubic convolution on the raw grid
#: low-passes by an amount that depends on the sub-voxel shift (at half a voxel
#: it cancels the Nyquist component), which lets the fit trade field accuracy for
#: smoothing away Gibbs ringing.  Default 1 (plain cubic) until the accuracy
#: work on the reversed-PE route settles the trade-off; 4 gave the lowest field
#: error of 1-4 on the package simulator.
DEFAULT_UPSAMPLE = 1
#: Reweighting passes of the optional edge-preserving smoothness (common practice:
#: on the package simulator one pass and two differed by 0.02-0.2 Hz of field error).
DEFAULT_EDGE_PASSES = 2
#: Dimensionless constant of the harmonic penalty inside the brain
#: (``gamma = harmonic * trace(J^T J) / trace(L W L)``, see
#: :mod:`epicorr.pair._solver`); 0 = off, the default: it costs about three
#: times the time, and it lowers the pair agreement QC quotes (0.96 -> 0.87 in
#: the brain of the simulated head, where the true field itself gives 0.53).
#: 300 is a reasonable start (common practice, from the package simulator).
DEFAULT_HARMONIC = 0.0
#: Laplacian of the first field (voxels of displacement per squared PE voxel) at
#: which the harmonic penalty's weight is halved (:func:`._solver.harmonic_source_weights`).
#: From the package simulator (common practice): on heads of seeds 0/1/2 at 3 mm,
#: brain given, it lowered the field error from 4.34/4.07/5.19 Hz (no reweighting)
#: to 3.90/3.62/4.67 Hz; 1.0 gave 3.97/3.99/4.72 Hz, 0.1 gave 4.48 Hz (seed 0).
_HARMONIC_SOURCE_SCALE = 0.3
#: Gauss-Newton iterations of the harmonic refinement, as a multiple of ``iterations[0]``.
_HARMONIC_ITERATION_FACTOR = 2
#: Conjugate-gradient iterations per Gauss-Newton step with the harmonic penalty.
_HARMONIC_CG = 40
#: Smallest size of an axis that is still halved in the pyramid.
_MIN_HALVE = 16
#: Below this largest displacement (mm) a rigid correction is not applied.
_MOTION_NEGLIGIBLE_MM = 0.05
#: Rigid alignment runs on the half-resolution copies when they have at least this many voxels.
_REG_MIN_VOXELS = 50_000


@dataclass
class PairEstimate:
    """Result of :func:`estimate_field_from_pair` (all arrays on the pair's grid).

    Attributes
    ----------
    field_hz : ndarray, shape (i, j, k)
        Off-resonance field, Hz, in undistorted space.
    corrected : ndarray, shape (i, j, k)
        Corrected reference image (least-squares restoration from all
        images), in the input intensity units.
    residual : ndarray, shape (i, j, k)
        ``mean(+ unwarped) - mean(- unwarped)`` at the solution, input units.
    sigma_hz : ndarray, shape (i, j, k)
        Approximate standard deviation of ``field_hz``, Hz (from the
        Gauss-Newton Hessian diagonal and the local residual variance).
    mask : ndarray of bool, shape (i, j, k)
        The mask used for the statistics (given, or derived from ``corrected``):
        the head (foreground) when derived.
    brain_mask : ndarray of bool, shape (i, j, k)
        The given mask, or the brain of ``corrected`` inside ``mask``
        (:func:`epicorr.brainmask.epi_brain_mask`, the mask every route's QC uses).
    affine : ndarray, shape (4, 4)
        The grid's voxel-to-world affine.
    polarity_before : ndarray, shape (2, i, j, k), float32
        Mean of the + images and mean of the - images as acquired (after the
        rigid alignment), in the input intensity units: for QC figures.
    polarity_after : ndarray, shape (2, i, j, k), float32
        The same two means unwarped with the field (Jacobian-modulated).
    info : dict
        ``levels`` (per level: shape, alpha, beta, iterations, cg_iterations,
        seconds, min_jacobian), ``regularization`` (alpha per level),
        ``rigid`` (per outer iteration: largest displacement of each moved
        image, mm), ``edge_passes`` (reweighting passes run, 0 when off),
        ``harmonic_voxels`` (voxels under the harmonic penalty, 0 when off),
        ``agreement_before`` / ``agreement_after`` (correlation of the + and
        - means inside ``mask``), ``agreement_before_brain`` /
        ``agreement_after_brain`` (the same inside ``brain_mask``),
        ``timings`` (s), ``notes``.
    """

    field_hz: np.ndarray
    corrected: np.ndarray
    residual: np.ndarray
    sigma_hz: np.ndarray
    mask: np.ndarray
    affine: np.ndarray
    brain_mask: np.ndarray | None = None
    polarity_before: np.ndarray | None = None
    polarity_after: np.ndarray | None = None
    info: dict = field(default_factory=dict)


def _corr(a, b, mask):
    x = a[mask].astype(float)
    y = b[mask].astype(float)
    x -= x.mean()
    y -= y.mean()
    den = np.sqrt(float(np.sum(x * x) * np.sum(y * y)))
    return float(np.sum(x * y) / den) if den > 0 else float("nan")


def _auto_mask(img):
    """Foreground of the corrected reference: threshold, fill, largest component."""
    ref = ndimage.gaussian_filter(img, 1.0)
    thr = 0.2 * float(np.percentile(ref, 99))
    m = ref > thr
    lab, nlab = ndimage.label(m)
    if nlab > 1:
        sizes = ndimage.sum(m, lab, index=np.arange(1, nlab + 1))
        m = lab == (1 + int(np.argmax(sizes)))
    m = ndimage.binary_closing(m, iterations=2)
    m = ndimage.binary_fill_holes(m)
    return m if m.any() else np.ones_like(m, bool)


def _plan(shape, max_levels):
    """Per-level halving factors, finest first: ``[(1,1,1), f1, f2, ...]``."""
    plans = [(1, 1, 1)]
    cur = list(shape)
    while len(plans) < max_levels:
        f = tuple(2 if s >= _MIN_HALVE else 1 for s in cur)
        if f[0] == 1:  # the PE axis cannot be halved any more
            break
        plans.append(f)
        cur = [(s + 1) // 2 if fi == 2 else s for s, fi in zip(cur, f)]
    return plans


def _pyramid(vol, plans):
    out = [vol]
    for f in plans[1:]:
        out.append(downsample(out[-1], f))
    return out


#: Largest accepted band-limited interpolation factor (memory grows with it).
_MAX_UPSAMPLE = 16


def _whole(value, *, key, low, high=None):
    ok = isinstance(value, (int, np.integer)) and not isinstance(value, bool)
    if not ok or value < low or (high is not None and value > high):
        span = f"from {low} to {high}" if high is not None else f"of at least {low}"
        raise EpicorrInputError(f"must be a whole number {span}", key=key, value=value)
    return int(value)


def _real(value, *, key, positive):
    try:
        x = float(value)
    except (TypeError, ValueError):
        x = float("nan")
    if isinstance(value, bool) or not np.isfinite(x) or (x <= 0 if positive else x < 0):
        raise EpicorrInputError("must be a finite number " + ("> 0" if positive else ">= 0"),
                                key=key, value=value)
    return x


def _check_solver_options(regularization, barrier, levels, iterations, motion_iterations, upsample,
                          edge_scale=None, edge_passes=DEFAULT_EDGE_PASSES, harmonic=DEFAULT_HARMONIC):
    """Validate the numeric options of :func:`estimate_field_from_pair` (one place)."""
    try:
        its = tuple(iterations)
    except TypeError:
        its = ()
    if len(its) != 2 or not all(isinstance(i, (int, np.integer)) and not isinstance(i, bool) and i >= 1
                                for i in its):
        raise EpicorrInputError("must be two whole numbers >= 1 (finest level, other levels)",
                                key="iterations", value=iterations)
    return dict(regularization=_real(regularization, key="regularization", positive=True),
                barrier=_real(barrier, key="barrier", positive=False),
                levels=_whole(levels, key="levels", low=1),
                iterations=tuple(int(i) for i in its),
                motion_iterations=_whole(motion_iterations, key="motion_iterations", low=0),
                upsample=_whole(upsample, key="upsample", low=1, high=_MAX_UPSAMPLE),
                edge_scale=None if edge_scale is None else _real(edge_scale, key="edge_scale", positive=True),
                edge_passes=_whole(edge_passes, key="edge_passes", low=1),
                harmonic=_real(harmonic, key="harmonic", positive=False))


def estimate_field_from_pair(images, *, pe_directions, voxels_per_hz, affine, mask=None,
                             files=None, regularization=DEFAULT_REGULARIZATION,
                             barrier=DEFAULT_BARRIER, levels=5, iterations=(5, 15),
                             rigid=True, motion_iterations=3, combine=True,
                             upsample=DEFAULT_UPSAMPLE, edge_scale=None,
                             edge_passes=DEFAULT_EDGE_PASSES, harmonic=DEFAULT_HARMONIC) -> PairEstimate:
    """Estimate the B0 field from EPI images with reversed phase-encode polarity.

    Solves the reversed-gradient problem of Chang & Fitzpatrick (1992):
    find a smooth field such that every image, unwarped along PE and
    multiplied by its Jacobian, gives the same undistorted image.  A
    regularised variational formulation (diffusion smoothness along all axes,
    a barrier keeping every Jacobian positive) is minimised coarse-to-fine by
    Gauss-Newton with line-wise preconditioned conjugate gradients (see
    :mod:`epicorr.pair._solver`).

    Parameters
    ----------
    images : sequence of ndarray, each shape (i, j, k) or (i, j, k, t)
        Magnitude EPI images; a 4-D series is rigidly aligned and averaged.
    pe_directions : sequence of str or PEDirection
        BIDS ``PhaseEncodingDirection`` of each image (one axis, both polarities).
    voxels_per_hz : float or sequence of float
        Readout scaling of each image, s (= voxels of displacement per Hz,
        ``EffectiveEchoSpacing * N``; see :func:`epicorr.geometry.readout_timing`).
        The displacement of image ``k`` is ``polarity_k * field_hz * voxels_per_hz_k``.
    affine : ndarray (4, 4) or sequence of them
        Voxel-to-world (RAS+ mm) affine(s).  Other grids are resampled onto
        the first image's when their PE axis points the same way.
    mask : ndarray of bool, shape (i, j, k), optional
        Brain mask for the statistics; derived from the corrected image if None.
    files : sequence of str, optional
        Names of the images, used in error messages.
    regularization : float
        ``lam`` of the automatic smoothness weight: on each level ``alpha =
        lam * trace(J^T J) / trace(L)`` (data Hessian trace over smoothness
        Hessian trace at the level's start), so the weight follows the
        image energy at each resolution.  Larger is smoother.
    barrier : float
        Weight of the Jacobian barrier relative to ``alpha``.
    levels : int
        Resolution levels at most (each halves the axes of at least 16 voxels).
    iterations : (int, int)
        Gauss-Newton iterations at most on the finest level and on the others.
    rigid : bool
        Align the opposite-polarity images rigidly during the fit: after a
        coarse estimate, the unwarped images of one polarity are registered
        to those of the other (mutual information) with the translation along
        PE frozen (it cannot be told apart from a uniform field offset, so it
        is left to the field); the raw images are moved and the coarse levels
        re-run, ``motion_iterations`` times at most.
    combine : bool
        Compute the least-squares corrected reference (else the mean of the
        unwarped images is returned).
    upsample : int
        Band-limited interpolation factor along PE (see ``DEFAULT_UPSAMPLE``);
        1 samples the raw grid by cubic convolution.
    edge_scale : float, optional
        Edge-preserving smoothness on the finest level (Charbonnier penalty by
        iteratively reweighted least squares, see :mod:`epicorr.pair._solver`):
        the scale ``delta`` of the field step between neighbours, in voxels of
        displacement per PE voxel length (``v_ref * |grad field_hz| * h_pe``).
        Steps above it are flattened less than by the quadratic smoothness.
        None (default) keeps the quadratic smoothness.  0.3 is a reasonable
        start (common practice, from the package simulator, 64x64x48 head at 3 mm:
        field error 7.2 -> 7.0 Hz noiseless and 7.8 -> 7.7 Hz at SNR 30,
        agreement of the unwarped pair +0.008; smaller values
        raise the agreement further by fitting noise and intensity mismatch,
        not the field).
    edge_passes : int
        Reweighting passes (each re-solves the finest level) when
        ``edge_scale`` is given.
    harmonic : float
        Harmonic refinement inside the brain (0 = off, the default): after
        the coarse-to-fine solve, the finest level is solved again with the
        penalty ``gamma/2 ||W^(1/2) L u||^2`` added, ``L`` the Laplacian and
        ``W`` the brain (``mask`` when given, else the brain of the pair
        unwarped with the first field, :func:`epicorr.brainmask.epi_brain_mask`),
        lowered where the first field's Laplacian shows a source
        (:func:`epicorr.pair._solver.harmonic_source_weights`),
        ``gamma = harmonic * trace(J^T J) / trace(L W L)``.  Inside tissue of
        uniform susceptibility the field obeys Laplace's equation, so a harmonic
        field costs nothing there while the quadratic smoothness flattens the
        steep field next to the sinuses.  300 is a reasonable start (common
        practice, from the package simulator, 64x64x48 head at 3 mm, mask
        given: field error 7.2 -> 3.9 Hz noiseless, 7.8 -> 3.8 Hz at SNR 30;
        brain derived, noiseless, heads of seeds 0/1/2: 7.2/6.4/8.6 -> 3.9/3.5/4.7 Hz;
        on fields that are not harmonic, such as the analytic Gaussian-bump
        phantom of the tests, it can be worse).  It about triples the time.

    Returns
    -------
    PairEstimate

    Raises
    ------
    EpicorrInputError
        See :func:`epicorr.pair._inputs.prepare_inputs`; also when a numeric
        option is out of range (``regularization`` > 0, ``barrier`` >= 0,
        whole ``levels`` >= 1, ``iterations`` two whole numbers >= 1, whole
        ``motion_iterations`` >= 0, whole ``upsample`` from 1 to 16,
        ``edge_scale`` None or > 0, whole ``edge_passes`` >= 1), checked
        before any work.

    References
    ----------
    Chang H, Fitzpatrick JM. IEEE Trans Med Imaging 1992;11:319-329.
    Ruthotto L et al. Phys Med Biol 2012;57:5715-5731.
    Macdonald J, Ruthotto L. J Math Imaging Vis 2018;60:268-282.
    Li L, Leigh JS. J Magn Reson 2001;148:442-448 (harmonic field mapping; citation from memory).
    Fischer B, Modersitzki J. J Math Imaging Vis 2003;18:81-85 (curvature penalty).
    """
    opts = _check_solver_options(regularization, barrier, levels, iterations, motion_iterations, upsample,
                                 edge_scale, edge_passes, harmonic)
    regularization, barrier, levels = opts["regularization"], opts["barrier"], opts["levels"]
    iterations, motion_iterations, upsample = opts["iterations"], opts["motion_iterations"], opts["upsample"]
    edge_scale, edge_passes, harmonic = opts["edge_scale"], opts["edge_passes"], opts["harmonic"]
    t_start = time.perf_counter()
    inp = prepare_inputs(images, pe_directions=pe_directions, voxels_per_hz=voxels_per_hz,
                         affine=affine, mask=mask, files=files)
    t_inputs = time.perf_counter() - t_start
    ax = inp.pe_axis
    n_img = len(inp.volumes)
    scales = [float(np.mean(np.abs(v))) for v in inp.volumes]
    vols = [v / s for v, s in zip(inp.volumes, scales)]
    top = float(np.percentile(np.mean(vols, axis=0), 99))
    vols = [v / top for v in vols]
    intensity = top * float(np.mean(scales))
    v_ref = float(np.mean(inp.voxels_per_hz))
    coefs = [p.polarity * v / v_ref for p, v in zip(inp.pe, inp.voxels_per_hz)]
    n_plus = sum(1 for p in inp.pe if p.polarity > 0)
    n_minus = n_img - n_plus
    weights = [1.0 / n_plus if p.polarity > 0 else -1.0 / n_minus for p in inp.pe]

    def pe_first(x):
        return np.ascontiguousarray(np.moveaxis(x, ax, 0))

    def pe_back(x):
        return np.moveaxis(x, 0, ax)

    spacing_pe = np.concatenate([[inp.spacing[ax]], np.delete(inp.spacing, ax)])
    shape0 = pe_first(vols[0]).shape
    plans = _plan(shape0, max(1, int(levels)))
    cum = [np.ones(3)]
    for f in plans[1:]:
        cum.append(cum[-1] * np.asarray(f))
    pyramids = [_pyramid(pe_first(v), plans) for v in vols]
    level_info = []
    edge_w0 = None  # Charbonnier factors of the finest level (set by the IRLS passes below)
    harm_w0 = None  # harmonic-penalty weights of the finest level (the brain), set below

    def run_levels(u, lo, hi):
        """Solve levels hi-1 .. lo (coarse to fine); ``u`` is on level hi (or None)."""
        for lev in range(hi - 1, lo - 1, -1):
            shape = pyramids[0][lev].shape
            if u is None:
                u = np.zeros(shape)
            elif u.shape != shape:
                u = upsample_to(u, shape, plans[lev + 1]) * plans[lev + 1][0]
            h = spacing_pe * cum[lev]
            axis_w = tuple(float((h[0] / h[a]) ** 2) for a in range(3))
            hw = harm_w0 if lev == 0 else None
            prob = LevelProblem(images=[p[lev] for p in pyramids],
                                coefs=coefs, weights=weights, axis_weights=axis_w,
                                upsample=upsample, edge_weights=edge_w0 if lev == 0 else None,
                                harmonic_weights=hw)
            n_it = iterations[0] if lev == 0 else iterations[1]
            extra = {}
            if hw is not None:  # the harmonic penalty converges more slowly
                n_it *= _HARMONIC_ITERATION_FACTOR
                extra = dict(harmonic=harmonic, cg_maxiter=_HARMONIC_CG)
            u, info = solve_level(prob, u, lam=regularization, beta_rel=barrier, max_iter=n_it, **extra)
            info["level"] = lev
            info["shape"] = tuple(int(s) for s in shape)
            level_info.append(info)
        return u

    def to_level0(u, lev):
        for L in range(lev, 0, -1):
            u = upsample_to(u, pyramids[0][L - 1].shape, plans[L]) * plans[L][0]
        return u

    n_lev = len(plans)
    rigid_log = []
    t0 = time.perf_counter()
    coarse_lo = 1 if n_lev > 1 else 0
    u = run_levels(None, coarse_lo, n_lev)
    if rigid:
        # Registered on the level-1 copies (block means: voxel 0 sits half a fine voxel
        # in) when they are big enough, else at full resolution.
        reg_lev = coarse_lo if pyramids[0][coarse_lo].size >= _REG_MIN_VOXELS else 0
        sp1 = np.empty(3)
        org1 = np.empty(3)
        order = [ax] + [a for a in range(3) if a != ax]
        for pos, a in enumerate(order):
            sp1[a] = inp.spacing[a] * cum[reg_lev][pos]
            org1[a] = 0.5 * (cum[reg_lev][pos] - 1) * inp.spacing[a]
        for _ in range(int(motion_iterations)):
            u_reg = u if reg_lev == coarse_lo else to_level0(u, coarse_lo)
            unw = [pe_back(_model.unwarp(pyr[reg_lev], c * u_reg, upsample=upsample))
                   for pyr, c in zip(pyramids, coefs)]
            fixed = np.mean([w for w, p in zip(unw, inp.pe) if p.polarity > 0], axis=0)
            moved = {}
            for k, p in enumerate(inp.pe):
                if p.polarity > 0:
                    continue
                tx = _rigid.rigid_register(fixed, unw[k], spacing=sp1, origin=org1,
                                           frozen_translation_axis=ax,
                                           sampling=0.25 if fixed.size < 5e5 else 0.1)
                mag = _rigid.transform_magnitude(tx, vols[k].shape, inp.spacing)
                moved[k] = mag
                if mag > _MOTION_NEGLIGIBLE_MM:
                    vols[k] = _rigid.rigid_resample(vols[k], tx, spacing=inp.spacing)
                    pyramids[k] = _pyramid(pe_first(vols[k]), plans)
            rigid_log.append(moved)
            if max(moved.values(), default=0.0) <= _MOTION_NEGLIGIBLE_MM:
                break
            u = run_levels(downsample_to(u, coarse_lo, n_lev, pyramids, plans), coarse_lo, n_lev)
    t_coarse = time.perf_counter() - t0
    if coarse_lo == 1:
        u = run_levels(u, 0, 1)
    axis_w0 = tuple(float((spacing_pe[0] / spacing_pe[a]) ** 2) for a in range(3))
    if harmonic > 0:
        # Harmonic refinement of the finest level inside the brain: the given mask,
        # else the brain of the pair unwarped with the current field; its sources spared.
        if inp.mask is not None:
            brain0 = inp.mask
        else:
            mean0 = pe_back(np.mean([_model.unwarp(pe_first(v), c * u, upsample=upsample)
                                     for v, c in zip(vols, coefs)], axis=0)) * intensity
            brain0 = _brain_of(mean0, _auto_mask(mean0))
            del mean0
        harm_w0 = np.asarray(pe_first(brain0), dtype=np.float32)
        harm_w0 *= harmonic_source_weights(u, axis_weights=axis_w0, scale=_HARMONIC_SOURCE_SCALE)
        u = run_levels(u, 0, 1)
    n_passes = edge_passes if edge_scale is not None else 0
    # IRLS on the finest level: Charbonnier factors at the current field, then re-solve.
    for _ in range(n_passes):
        edge_w0 = charbonnier_weights(u, axis_weights=axis_w0, scale=edge_scale)
        u = run_levels(u, 0, 1)
    t_fine = time.perf_counter() - t0 - t_coarse
    final = level_info[-1]
    field_pe = u / v_ref

    t1 = time.perf_counter()
    vols_pe = [pe_first(v) for v in vols]
    disp = [c * u for c in coefs]
    unw = [_model.unwarp(v, d, upsample=upsample) for v, d in zip(vols_pe, disp)]
    plus = np.mean([w for w, p in zip(unw, inp.pe) if p.polarity > 0], axis=0)
    minus = np.mean([w for w, p in zip(unw, inp.pe) if p.polarity < 0], axis=0)
    if combine:
        corrected, cinfo = _combine.restore(vols_pe, disp)
    else:
        corrected, cinfo = 0.5 * (plus + minus), {}
    t_combine = time.perf_counter() - t1
    resid_pe = plus - minus
    local_var = ndimage.gaussian_filter(resid_pe ** 2, 2.0)
    sigma_pe = np.sqrt(local_var / np.maximum(final["hess_diag"], 1e-12)) / v_ref

    corrected_b = pe_back(corrected) * intensity
    msk = inp.mask if inp.mask is not None else _auto_mask(corrected_b)
    brain = msk if inp.mask is not None else _brain_of(corrected_b, msk)
    raw_plus = np.mean([v for v, p in zip(vols, inp.pe) if p.polarity > 0], axis=0)
    raw_minus = np.mean([v for v, p in zip(vols, inp.pe) if p.polarity < 0], axis=0)
    info = dict(
        levels=[{k: v for k, v in li.items() if k not in ("hess_diag", "residual")}
                for li in level_info],
        regularization=[li["alpha"] for li in level_info],
        iterations=sum(li["iterations"] for li in level_info),
        rigid=rigid_log,
        edge_passes=n_passes,
        harmonic_voxels=int(np.count_nonzero(harm_w0)) if harm_w0 is not None else 0,
        agreement_before=_corr(raw_plus, raw_minus, msk),
        agreement_after=_corr(pe_back(plus), pe_back(minus), msk),
        agreement_before_brain=_corr(raw_plus, raw_minus, brain),
        agreement_after_brain=_corr(pe_back(plus), pe_back(minus), brain),
        combine=cinfo,
        timings=dict(inputs=t_inputs, coarse=t_coarse, fine=t_fine, combine=t_combine,
                     total=time.perf_counter() - t_start),
        voxels_per_hz=inp.voxels_per_hz,
        pe=[p.bids for p in inp.pe],
        notes=inp.notes,
    )
    return PairEstimate(field_hz=pe_back(field_pe).copy(), corrected=corrected_b.copy(),
                        residual=(pe_back(resid_pe) * intensity).copy(),
                        sigma_hz=pe_back(sigma_pe).copy(), mask=msk, brain_mask=brain,
                        affine=inp.affine,
                        polarity_before=_pair32(raw_plus, raw_minus, intensity),
                        polarity_after=_pair32(pe_back(plus), pe_back(minus), intensity),
                        info=info)


def _brain_of(corrected, head):
    """Brain mask of the corrected reference inside ``head`` (:func:`epicorr.brainmask.epi_brain_mask`);
    ``head`` itself when no brain is found."""
    try:
        brain = epi_brain_mask(corrected) & head
    except EpicorrInputError:
        return head
    return brain if brain.any() else head


def _pair32(a, b, scale):
    """``(2, ...)`` float32 stack of ``a * scale`` and ``b * scale`` (no float64 stack)."""
    out = np.empty((2,) + a.shape, dtype=np.float32)
    np.multiply(a, scale, out=out[0], casting="same_kind")
    np.multiply(b, scale, out=out[1], casting="same_kind")
    return out


def downsample_to(u, lev, n_lev, pyramids, plans):
    """Bring a field on level ``lev`` to the coarsest level (block means, rescaled)."""
    for L in range(lev + 1, n_lev):
        u = downsample(u, plans[L])[tuple(slice(0, s) for s in pyramids[0][L].shape)] / plans[L][0]
    return u
