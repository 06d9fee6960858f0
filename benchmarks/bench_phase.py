"""Benchmark: the gradient-echo field-map route, 3 mm field map onto a 96x96x60 EPI reference.

Measured in one run (wall clock, this process, the machine's cores):

* the whole route for the ``phasediff`` and the ``phase1``/``phase2`` cases:
  phase coding, mask, 3-D unwrapping, uncertainty, despiking, extrapolation
  (``field_from_*``), then registration of the magnitude to the distorted EPI
  reference, one unwarp-and-re-register round and the resampling
  (``field_to_target``), with the time split per step;
* scikit-image's ``unwrap_phase`` on the same wrapped phase difference (the
  reference library's quality-guided unwrapper; the baseline of the unwrap
  step).

Target: the whole route under 10 s on 2 cores.  The field error inside the
brain against the simulator's truth is printed as a side figure.

Run: ``.venv/bin/python benchmarks/bench_phase.py`` (or ``make bench``).
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import numpy as np

RESULTS = Path(__file__).resolve().parent / "results"
TARGET_S = 10.0
EPI_SHAPE, EPI_VOX = (96, 96, 60), 2.5
FM_SHAPE, FM_VOX = (80, 80, 50), 3.0
EES, TE_EPI, PE = 5e-4, 0.03, "j-"


def make_scene(seed: int = 3) -> dict:
    """Dual-echo data on the field-map grid, a moved head's distorted EPI reference, the true field."""
    from epicorr.simulate import (default_affine, dipole_field_hz, motion_matrix, resample_to_grid, shim,
                                  simulate_dual_echo, simulate_epi, synthetic_head)
    fm_aff = default_affine(FM_SHAPE, FM_VOX)
    head = synthetic_head(shape=FM_SHAPE, affine=fm_aff, seed=seed)
    field = shim(dipole_field_hz(head.chi_ppm, affine=fm_aff), mask=head.brain_mask, affine=fm_aff)
    gre = simulate_dual_echo(head, field, seed=seed + 1)
    epi_aff = default_affine(EPI_SHAPE, EPI_VOX)
    motion = motion_matrix(rotation_deg=(2.0, -1.5, 1.0), translation_mm=(1.5, -2.0, 2.0))
    moved = synthetic_head(shape=EPI_SHAPE, affine=epi_aff, seed=seed).moved(motion)
    truth = resample_to_grid(field, affine=fm_aff, target_shape=EPI_SHAPE,
                             target_affine=np.linalg.inv(motion) @ epi_aff)
    epi = simulate_epi(moved, truth, pe=PE, effective_echo_spacing=EES, echo_time=TE_EPI)
    return dict(gre=gre, fm_aff=fm_aff, epi=epi, epi_aff=epi_aff, truth=truth, brain=moved.brain_mask)


def run_route(scene: dict, case: str) -> dict:
    from epicorr.phase import field_from_phasediff, field_from_two_phases, field_to_target, wrap
    gre = scene["gre"]
    te1, te2 = gre.echo_times
    t0 = time.perf_counter()
    if case == "phasediff":
        est = field_from_phasediff(wrap(gre.phases[1] - gre.phases[0]), gre.magnitudes[0],
                                   magnitude2=gre.magnitudes[1], echo_time1=te1, echo_time2=te2)
    else:
        est = field_from_two_phases(*gre.phases, *gre.magnitudes, echo_time1=te1, echo_time2=te2)
    t1 = time.perf_counter()
    target = field_to_target(est, source_affine=scene["fm_aff"], reference=scene["epi"],
                             reference_affine=scene["epi_aff"], pe=PE, voxels_per_hz=EES * EPI_SHAPE[1])
    t2 = time.perf_counter()
    b = scene["brain"]
    err = (target.field_hz - scene["truth"])[b]
    steps = {f"field.{k}": v for k, v in est.info["seconds"].items()}
    steps["field.coding_and_combination"] = (t1 - t0) - sum(est.info["seconds"].values())
    steps.update({f"target.{k}": v for k, v in target.info["seconds"].items()})
    return dict(case=case, total_s=t2 - t0, field_s=t1 - t0, target_s=t2 - t1, steps_s=steps,
                rmse_hz=float(np.sqrt(np.mean(err ** 2))), median_abs_hz=float(np.median(np.abs(err))))


def skimage_unwrap_seconds(scene: dict) -> float:
    from skimage.restoration import unwrap_phase
    from epicorr.phase import wrap
    gre = scene["gre"]
    dphi = wrap(gre.phases[1] - gre.phases[0])
    masked = np.ma.masked_array(dphi, mask=~(gre.magnitudes[0] > 0.2 * np.percentile(gre.magnitudes[0], 99)))
    import inspect
    seeding = {"rng": 0} if "rng" in inspect.signature(unwrap_phase).parameters else {"seed": 0}
    t0 = time.perf_counter()
    unwrap_phase(masked, **seeding)
    return time.perf_counter() - t0


def main(argv=None) -> dict:
    t0 = time.perf_counter()
    scene = make_scene()
    print(f"scene (not timed): field map {FM_SHAPE} at {FM_VOX} mm, EPI reference {EPI_SHAPE} at {EPI_VOX} mm, "
          f"{time.perf_counter() - t0:.1f} s to simulate")
    run_route(scene, "phasediff")  # warm-up: imports, FFT plans
    results = {"target_s": TARGET_S, "runs": []}
    for case in ("phasediff", "two-phases"):
        r = run_route(scene, case)
        results["runs"].append(r)
        print(f"{case}: {r['total_s']:.2f} s in all = {r['total_s'] / TARGET_S:.2f} x the {TARGET_S:.0f} s target "
              f"({'met' if r['total_s'] < TARGET_S else 'MISSED'}); field {r['field_s']:.2f} s, "
              f"onto the EPI grid {r['target_s']:.2f} s; error in the brain {r['rmse_hz']:.2f} Hz RMSE, "
              f"median |e| {r['median_abs_hz']:.2f} Hz")
        for step, sec in r["steps_s"].items():
            print(f"    {step:34s} {sec:7.3f} s")
    ours_unwrap = results["runs"][0]["steps_s"]["field.unwrap"]
    sk = skimage_unwrap_seconds(scene)
    results["unwrap_ours_s"], results["unwrap_skimage_s"] = ours_unwrap, sk
    print(f"unwrap step: ours {ours_unwrap:.2f} s, scikit-image unwrap_phase {sk:.2f} s "
          f"(ours / scikit-image = {ours_unwrap / sk:.2f})")
    RESULTS.mkdir(exist_ok=True)
    (RESULTS / "bench_phase.json").write_text(json.dumps(results, indent=2, default=float))
    return results


if __name__ == "__main__":
    main()
