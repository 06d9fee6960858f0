"""Benchmark: field from a reversed phase-encode pair, against a SimpleITK peer baseline.

Runs side by side in one process tree:

* a 96x96x60 pair (target: under 20 s on 2 cores);
* a 192x192x120 pair (4.4 M voxels; target: under 120 s and peak memory under
  2 GiB), in a subprocess whose peak resident set size is read with
  ``resource.getrusage`` (it includes making the data, so it is an upper bound);
* the peer baseline: a general-purpose deformable registration of the same
  96x96x60 pair with SimpleITK (B-spline transform whose coefficients move
  only along PE: optimiser weights are zero on the other two components;
  mean squares; three-level pyramid), field taken as ``-t / (2 v)`` at the
  undistorted position (midway relation of the two polarities);
* accuracy on the package's simulator (k-space EPI of the synthetic head
  with a Fourier dipole field), noiseless (the simulator's default) and at
  SNR 30.

Data: the analytic phantom of ``tests/pair_phantom.py`` (Chang & Fitzpatrick
intensity law by exact box integration) for the timing pairs; the simulator
for the accuracy rows.  Results are printed and written to
``benchmarks/results/bench_pair.json``.

Reference point (published): Macdonald & Ruthotto 2018 solved a
5-million-unknown problem in under 50 s on a laptop.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "tests"))

ECHO_SPACING = 0.52e-3  # s (common practice for 3 T EPI references)


def _phantom(shape, seed=0):
    from pair_phantom import pair

    vph = ECHO_SPACING * shape[1]
    p, m, f, obj, mask = pair(shape, pe_axis=1, voxels_per_hz=vph, snr=40.0, seed=seed)
    return p, m, f, mask, vph


def _affine(voxel_mm):
    return np.diag([voxel_mm, voxel_mm, voxel_mm, 1.0])


def _rmse(a, b, mask):
    return float(np.sqrt(np.mean((a - b)[mask] ** 2)))


def _run_epicorr(p, m, mask, vph, voxel_mm, **options):
    from epicorr.pair import estimate_field_from_pair

    t0 = time.perf_counter()
    c0 = time.process_time()
    est = estimate_field_from_pair([p, m], pe_directions=["j", "j-"], voxels_per_hz=vph,
                                   affine=_affine(voxel_mm), mask=mask, **options)
    return est, time.perf_counter() - t0, time.process_time() - c0


def worker(size: str, **options) -> None:
    """Subprocess entry: one pair of the given size (estimator ``options``); prints a JSON line."""
    shape = tuple(int(s) for s in size.split("x"))
    t0 = time.perf_counter()
    p, m, f, mask, vph = _phantom(shape, seed=1)
    t_data = time.perf_counter() - t0
    est, wall, cpu = _run_epicorr(p, m, mask, vph, 1.25, **options)
    usage = resource.getrusage(resource.RUSAGE_SELF)
    print(json.dumps(dict(shape=shape, voxels=int(np.prod(shape)), options=options,
                          data_seconds=t_data,
                          seconds=wall, cpu_seconds=cpu, peak_rss_mib=usage.ru_maxrss / 1024.0,
                          rmse_hz=_rmse(est.field_hz, f, mask),
                          field_rms_hz=float(np.sqrt(np.mean(f[mask] ** 2))),
                          agreement_before=est.info["agreement_before"],
                          agreement_after=est.info["agreement_after"],
                          gauss_newton_iterations=est.info["iterations"],
                          timings=est.info["timings"])))


def _in_subprocess(size: str, **options) -> dict:
    """Run :func:`worker` in a fresh process (its own peak memory); its JSON result."""
    out = subprocess.run([sys.executable, __file__, "--worker", size, json.dumps(options)],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def baseline_sitk(p, m, vph, voxel_mm, *, mesh=(8, 8, 6), iterations=30):
    """SimpleITK B-spline registration of the minus image onto the plus one, PE only."""
    import SimpleITK as sitk

    def img(a):
        im = sitk.GetImageFromArray(np.ascontiguousarray(a.transpose(2, 1, 0), dtype=np.float32))
        im.SetSpacing((voxel_mm,) * 3)
        return im

    fixed, moving = img(p), img(m)
    tx = sitk.BSplineTransformInitializer(fixed, list(mesh), order=3)
    n_par = tx.GetNumberOfParameters()
    weights = np.zeros(n_par)
    weights[n_par // 3: 2 * n_par // 3] = 1.0  # only the y (= array axis j = PE) coefficients
    reg = sitk.ImageRegistrationMethod()
    reg.SetMetricAsMeanSquares()
    reg.SetInterpolator(sitk.sitkLinear)
    reg.SetMetricSamplingStrategy(reg.RANDOM)
    reg.SetMetricSamplingPercentage(0.2, 1)
    reg.SetOptimizerAsRegularStepGradientDescent(learningRate=2.0, minStep=0.01,
                                                 numberOfIterations=iterations,
                                                 relaxationFactor=0.7,
                                                 gradientMagnitudeTolerance=1e-8)
    reg.SetOptimizerWeights(weights.tolist())
    reg.SetShrinkFactorsPerLevel([4, 2, 1])
    reg.SetSmoothingSigmasPerLevel([2.0, 1.0, 0.0])
    reg.SetInitialTransform(tx, inPlace=True)
    t0 = time.perf_counter()
    c0 = time.process_time()
    reg.Execute(fixed, moving)
    disp = sitk.TransformToDisplacementField(tx, sitk.sitkVectorFloat64, fixed.GetSize(),
                                             fixed.GetOrigin(), fixed.GetSpacing(),
                                             fixed.GetDirection())
    t_vox = sitk.GetArrayFromImage(disp)[..., 1].transpose(2, 1, 0) / voxel_mm  # along j, voxels
    # I+(x) ~ I-(x + t(x)); x = y + d(y) in the plus image, x + t = y - d: t(y + d) = -2 d(y).
    # Fixed-point iteration for the field in undistorted space.
    from scipy import ndimage
    d = -0.5 * t_vox
    grid = np.indices(p.shape).astype(float)
    for _ in range(3):
        coords = grid.copy()
        coords[1] += d
        d = -0.5 * ndimage.map_coordinates(t_vox, coords, order=1, mode="nearest")
    return d / vph, time.perf_counter() - t0, time.process_time() - c0


def _pullback_ceiling(ims, d_true, mask, err, steep=0.1, signal=None, fold_margin=3):
    """What the pull-back (Chang & Fitzpatrick) model can reach on this data.

    ``agreement_at_true_field``: correlation inside the brain of the two images
    unwarped with the *true* displacement (``I(y +/- d) (1 +/- d')``); if the
    simulator's images obeyed the pull-back law exactly this would be 1.
    ``steep_fraction``: brain voxels where the true ``|dd/dy| > steep`` (pile-up,
    stretching and fold-over), dilated by two voxels; the field error is split
    between them and the rest.  ``folded_fraction``: brain voxels within
    ``fold_margin`` voxels of a PE neighbour pair where the true ``|d(y+1) -
    d(y)| >= 1`` (one polarity's Jacobian is <= 0: the image folds there and an
    invertible model cannot represent it) among voxels with ``signal``;
    ``rmse_unfolded_hz`` is the field error outside them.
    """
    from scipy import ndimage

    from epicorr.pair._estimate import _corr
    from epicorr.pair._model import unwarp

    def pe1(x):
        return np.ascontiguousarray(np.moveaxis(x, 1, 0))

    up = np.moveaxis(unwarp(pe1(ims[0]), pe1(d_true)), 0, 1)
    dn = np.moveaxis(unwarp(pe1(ims[1]), -pe1(d_true)), 0, 1)
    slope = np.gradient(d_true, axis=1)
    bad = ndimage.binary_dilation(np.abs(slope) > steep, iterations=2) & mask
    calm = mask & ~bad
    step = np.abs(np.diff(d_true, axis=1)) >= 1.0
    folded = np.zeros(d_true.shape, bool)
    folded[:, :-1] |= step
    folded[:, 1:] |= step
    if signal is not None:
        folded &= signal
    near = ndimage.binary_dilation(folded, iterations=fold_margin) & mask
    return dict(folded_fraction=float(near.sum() / mask.sum()),
                rmse_unfolded_hz=float(np.sqrt(np.mean(err[mask & ~near] ** 2))),
                folded_signal_voxels=int(folded.sum()),
                agreement_at_true_field=_corr(up, dn, mask),
                agreement_at_true_field_calm=_corr(up, dn, calm),
                steep_fraction=float(bad.sum() / mask.sum()),
                rmse_steep_hz=float(np.sqrt(np.mean(err[bad] ** 2))) if bad.any() else 0.0,
                rmse_calm_hz=float(np.sqrt(np.mean(err[calm] ** 2))))


def simulator_accuracy(shape=(64, 64, 48), voxel_mm=3.0, ees=2.5e-4, snr=None, signal_side=False,
                       edge_scale=None, field_scale=1.0, harmonic=0.0, mask_given=True):
    """Accuracy on the package simulator (spin-echo EPI, j and j-).

    ``signal_side``: simulate with :func:`epicorr.simulate.signal_side_field`
    (tissue-side field carried into the air around the head, brain untouched),
    so scalp signal is not thrown along PE by the air's field.  The truth inside
    the brain is the same either way.  ``edge_scale``: the estimator's
    edge-preserving smoothness option (None = quadratic, the default).
    ``field_scale``: the head's field multiplied by this factor before
    simulating (and as the truth), to show how the error grows with the field's
    strength and steepness (1 = the head as it is).  ``harmonic``: the
    estimator's harmonic refinement (0 = off, the default).  ``mask_given``:
    pass the true brain mask to the estimator (else it derives its own; the
    error is quoted in the true brain either way).
    """
    from epicorr.pair import estimate_field_from_pair
    from epicorr.simulate import dipole_field_hz, shim, signal_side_field, simulate_epi, synthetic_head

    head = synthetic_head(shape=shape, voxel_size_mm=voxel_mm, seed=0)
    field = shim(dipole_field_hz(head.chi_ppm, affine=head.affine), mask=head.brain_mask,
                 affine=head.affine)
    if signal_side:
        field = signal_side_field(field, tissue_fraction=head.tissue_fraction, keep=head.brain_mask)
    field = field * float(field_scale)
    ims = [simulate_epi(head, field, pe=pe, effective_echo_spacing=ees, echo_time=0.03, snr=snr,
                        seed=k) for k, pe in enumerate(("j", "j-"))]
    vph = ees * shape[1]
    mask = head.brain_mask
    t0 = time.perf_counter()
    est = estimate_field_from_pair(ims, pe_directions=["j", "j-"], voxels_per_hz=vph,
                                   affine=head.affine, mask=mask if mask_given else None,
                                   edge_scale=edge_scale, harmonic=harmonic)
    wall = time.perf_counter() - t0
    err = est.field_hz - field
    ceiling = _pullback_ceiling(ims, field * vph, mask, err, signal=head.tissue_fraction > 0.5)
    return dict(shape=shape, voxel_mm=voxel_mm, effective_echo_spacing=ees, snr=snr,
                field_model="signal-side" if signal_side else "voxel-centre", edge_scale=edge_scale,
                field_scale=float(field_scale), harmonic=float(harmonic), mask_given=bool(mask_given),
                **ceiling,
                seconds=wall, rmse_hz=float(np.sqrt(np.mean(err[mask] ** 2))),
                median_abs_error_hz=float(np.median(np.abs(err[mask]))),
                mean_error_hz=float(err[mask].mean()),
                field_rms_hz=float(np.sqrt(np.mean(field[mask] ** 2))),
                max_displacement_vox=float(np.abs(field[mask]).max() * vph),
                agreement_before=est.info["agreement_before"],
                agreement_after=est.info["agreement_after"],
                agreement_after_brain=est.info["agreement_after_brain"])


def main(argv=None) -> dict:
    argv = sys.argv[1:] if argv is None else argv
    if argv and argv[0] == "--worker":
        worker(argv[1], **(json.loads(argv[2]) if len(argv) > 2 else {}))
        return {}
    quick = "--quick" in argv
    results: dict = {"cpus": len(os.sched_getaffinity(0)),
                     "load_average_at_start": os.getloadavg()}

    # 1. 96x96x60: epicorr and the SimpleITK baseline on the same pair.
    shape = (96, 96, 60)
    voxel = 2.5
    p, m, f, mask, vph = _phantom(shape)
    est, wall, cpu = _run_epicorr(p, m, mask, vph, voxel)
    ours = dict(seconds=wall, cpu_seconds=cpu, rmse_hz=_rmse(est.field_hz, f, mask),
                input_rmse_hz=float(np.sqrt(np.mean(f[mask] ** 2))),
                agreement_before=est.info["agreement_before"],
                agreement_after=est.info["agreement_after"],
                gauss_newton_iterations=est.info["iterations"], timings=est.info["timings"],
                regularization=est.info["regularization"])
    est_h, wall_h, _ = _run_epicorr(p, m, mask, vph, voxel, harmonic=300.0)
    ours["harmonic_300"] = dict(seconds=wall_h, rmse_hz=_rmse(est_h.field_hz, f, mask),
                                agreement_after=est_h.info["agreement_after"])
    base_field, b_wall, b_cpu = baseline_sitk(p, m, vph, voxel)
    base = dict(seconds=b_wall, cpu_seconds=b_cpu, rmse_hz=_rmse(base_field, f, mask))
    results["pair_96x96x60"] = dict(epicorr=ours, sitk_bspline_pe=base,
                                    speed_ratio=b_wall / wall,
                                    cpu_ratio=b_cpu / cpu,
                                    error_ratio=ours["rmse_hz"] / base["rmse_hz"],
                                    target_seconds=20.0)

    # 2. 192x192x120 in a subprocess (peak memory of a fresh process).
    if not quick:
        big = _in_subprocess("192x192x120")
        big.update(target_seconds=120.0, target_peak_rss_mib=2048.0,
                   unknowns_per_second=big["voxels"] / big["seconds"])
        results["pair_192x192x120"] = big
        # The same pair with the edge-preserving option (two extra finest-level solves).
        big_e = _in_subprocess("192x192x120", edge_scale=0.3)
        big_e.update(target_seconds=120.0, target_peak_rss_mib=2048.0)
        results["pair_192x192x120_edge_scale_0.3"] = big_e
        big_h = _in_subprocess("192x192x120", harmonic=300.0)
        big_h.update(target_seconds=120.0, target_peak_rss_mib=2048.0)
        results["pair_192x192x120_harmonic_300"] = big_h

    # 3. Accuracy on the simulator.
    results["simulator"] = [simulator_accuracy(snr=None), simulator_accuracy(snr=None, signal_side=True),
                            simulator_accuracy(snr=None, signal_side=True, edge_scale=0.3),
                            simulator_accuracy(snr=None, signal_side=True, harmonic=300.0),
                            simulator_accuracy(snr=None, signal_side=True, harmonic=300.0, mask_given=False)]
    if not quick:
        results["simulator"] += [simulator_accuracy(snr=30.0), simulator_accuracy(snr=30.0, signal_side=True),
                                 simulator_accuracy(snr=30.0, signal_side=True, edge_scale=0.3),
                                 simulator_accuracy(snr=30.0, signal_side=True, harmonic=300.0),
                                 simulator_accuracy(snr=30.0, signal_side=True, harmonic=300.0,
                                                    mask_given=False)]
        # The same head with a weaker field: how the error follows the field's strength.
        results["simulator"] += [simulator_accuracy(snr=None, signal_side=True, field_scale=x)
                                 for x in (0.25, 0.5)]

    r = results["pair_96x96x60"]
    print(f"96x96x60 pair:     epicorr {r['epicorr']['seconds']:.1f} s wall "
          f"({r['epicorr']['cpu_seconds']:.1f} s CPU), RMSE {r['epicorr']['rmse_hz']:.2f} Hz "
          f"(field RMS {r['epicorr']['input_rmse_hz']:.1f} Hz), agreement "
          f"{r['epicorr']['agreement_before']:.3f} -> {r['epicorr']['agreement_after']:.3f}")
    print(f"  with harmonic 300: {r['epicorr']['harmonic_300']['seconds']:.1f} s wall, RMSE "
          f"{r['epicorr']['harmonic_300']['rmse_hz']:.2f} Hz (this phantom's field is not harmonic)")
    print(f"  SimpleITK B-spline (PE only): {r['sitk_bspline_pe']['seconds']:.1f} s wall, "
          f"RMSE {r['sitk_bspline_pe']['rmse_hz']:.2f} Hz")
    print(f"  ratios: baseline/epicorr time {r['speed_ratio']:.2f}x wall, {r['cpu_ratio']:.2f}x CPU; "
          f"epicorr/baseline error {r['error_ratio']:.2f}")
    if "pair_192x192x120" in results:
        b = results["pair_192x192x120"]
        print(f"192x192x120 pair:  {b['seconds']:.1f} s wall ({b['cpu_seconds']:.1f} s CPU), peak RSS "
              f"{b['peak_rss_mib']:.0f} MiB, RMSE {b['rmse_hz']:.2f} Hz, "
              f"{b['unknowns_per_second'] / 1e3:.0f} k unknowns/s "
              f"(published reference: 5 M unknowns in < 50 s)")
    if "pair_192x192x120_edge_scale_0.3" in results:
        b = results["pair_192x192x120_edge_scale_0.3"]
        print(f"  same, edge_scale 0.3: {b['seconds']:.1f} s wall, peak RSS {b['peak_rss_mib']:.0f} MiB, "
              f"RMSE {b['rmse_hz']:.2f} Hz")
    if "pair_192x192x120_harmonic_300" in results:
        b = results["pair_192x192x120_harmonic_300"]
        print(f"  same, harmonic 300: {b['seconds']:.1f} s wall, peak RSS {b['peak_rss_mib']:.0f} MiB, "
              f"RMSE {b['rmse_hz']:.2f} Hz")
    for s in results["simulator"]:
        smooth = "quadratic" if s["edge_scale"] is None else f"edge-preserving {s['edge_scale']}"
        smooth += " smoothness"
        if s["harmonic"]:
            smooth += f" + harmonic {s['harmonic']:g} ({'given' if s['mask_given'] else 'derived'} brain)"
        scaled = "" if s["field_scale"] == 1.0 else f" x {s['field_scale']:g}"
        print(f"simulator {s['shape']} SNR {s['snr']} ({s['field_model']} field{scaled}, {smooth}): "
              f"RMSE {s['rmse_hz']:.2f} Hz (median |err| "
              f"{s['median_abs_error_hz']:.2f}, field RMS {s['field_rms_hz']:.1f} Hz, max displacement "
              f"{s['max_displacement_vox']:.1f} vox), agreement {s['agreement_before']:.3f} -> "
              f"{s['agreement_after']:.3f} ({s['agreement_after_brain']:.3f} in its brain)")
        print(f"  pull-back ceiling: agreement at the TRUE field {s['agreement_at_true_field']:.3f} "
              f"({s['agreement_at_true_field_calm']:.3f} away from steep field); error "
              f"{s['rmse_calm_hz']:.2f} Hz calm / {s['rmse_steep_hz']:.2f} Hz steep "
              f"({100 * s['steep_fraction']:.0f} % of brain |dd/dy| > 0.1, dilated)")
        print(f"  fold-over: {s['folded_signal_voxels']} tissue voxels where the true field folds the image; "
              f"error {s['rmse_unfolded_hz']:.2f} Hz outside the {100 * s['folded_fraction']:.1f} % of brain "
              f"within 3 voxels of them")
    print(f"load average at start: {results['load_average_at_start']}")
    outdir = HERE / "results"
    outdir.mkdir(exist_ok=True)
    (outdir / "bench_pair.json").write_text(json.dumps(results, indent=2, default=float))
    return results


if __name__ == "__main__":
    main()
