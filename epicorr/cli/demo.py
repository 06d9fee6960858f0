"""``epicorr demo [OUT_DIR]``: a small end-to-end run on synthetic data.

An invented smooth phantom with a known field map is distorted with the
forward pixel-shift model, unwarped with the true field, and the error before
and after is printed.  Every file is written atomically.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

from . import CAUTION
from ..errors import EpicorrInputError

__all__ = ["register", "run", "make_phantom"]

_SHAPE = (40, 48, 24)        # i, j, k voxels (small: the demo runs in seconds)
_ZOOMS = (3.0, 3.0, 3.5)     # mm
_N_VOLUMES = 4
_TR = 2.0                    # s


def register(subparsers) -> None:
    """Add the ``demo`` sub-command."""
    p = subparsers.add_parser(
        "demo", help="run a small end-to-end demonstration on synthetic data",
        description=("Synthetic data only. (1) Build an invented phantom with a known B0 field, "
                     "distort it with the forward model, unwarp it with the true field and print "
                     "the error before and after. (2) Build the invented 'Harbour Lights' BIDS "
                     "study (four subjects, one per field-map case) at OUT_DIR/rawdata with its "
                     "ground truth at OUT_DIR/truth, run the whole pipeline into "
                     "OUT_DIR/derivatives/epicorr and print each route's field error against "
                     "the truth."),
        epilog="CAUTION: " + CAUTION)
    p.add_argument("out_dir", nargs="?", default="demo-output", metavar="OUT_DIR",
                   help="folder for the output files (default: ./demo-output)")
    p.add_argument("--echo-spacing", type=float, default=0.00055, metavar="SECONDS",
                   help="effective echo spacing of the simulated EPI in seconds (default 0.00055)")
    p.add_argument("--pe-direction", default="j-", metavar="CODE",
                   help="BIDS phase-encoding direction of the simulated EPI (default j-)")
    p.add_argument("--phantom-only", action="store_true",
                   help="run only part (1), the phantom check (a few seconds)")
    p.add_argument("--quick", action="store_true",
                   help="build the study on coarse grids (5 mm EPI, 6 mm field maps): faster, but too "
                        "coarse for the correction to show in the images")
    p.add_argument("--jobs", type=int, default=2, metavar="N",
                   help="parallel processes for the study run (default 2)")
    p.set_defaults(func=run)


def make_phantom(shape=_SHAPE) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Invented smooth head-like phantom, its field map (Hz) and a brain mask.

    Returns
    -------
    image : ndarray (X, Y, Z), float64
        Smooth ellipsoid "head" with a brighter inner region.
    field_hz : ndarray (X, Y, Z), float64
        A smooth off-resonance bump near the front of the head (invented,
        about +120 Hz at its peak) plus a gentle gradient.
    mask : ndarray (X, Y, Z), bool
    """
    grids = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    x, y, z = grids
    r = np.sqrt((x / 0.75) ** 2 + (y / 0.8) ** 2 + (z / 0.75) ** 2)
    head = 1.0 / (1.0 + np.exp((r - 1.0) / 0.04))
    inner = 1.0 / (1.0 + np.exp((np.sqrt((x / 0.5) ** 2 + ((y + 0.1) / 0.55) ** 2 + (z / 0.5) ** 2) - 1.0) / 0.06))
    texture = 0.08 * np.sin(5 * x) * np.cos(4 * y) * np.cos(3 * z)
    image = 100.0 * head * (0.6 + 0.4 * inner + texture)
    bump = 120.0 * np.exp(-((x / 0.3) ** 2 + ((y - 0.55) / 0.25) ** 2 + ((z + 0.3) / 0.35) ** 2))
    field = bump + 15.0 * y
    return image, field, head > 0.5


def _metrics(test: np.ndarray, truth: np.ndarray, mask: np.ndarray) -> dict:
    a, b = test[mask].astype(np.float64), truth[mask].astype(np.float64)
    return {"rmse": float(np.sqrt(np.mean((a - b) ** 2))),
            "correlation": float(np.corrcoef(a, b)[0, 1])}


def run(args: argparse.Namespace) -> int:
    """Run the demo; returns the exit code."""
    import nibabel as nib

    from ..displacement import distort, field_to_displacement, foldover_mask
    from ..geometry import parse_pe_direction, readout_timing
    from ..io import image_like, save_image_atomic, save_json_atomic
    from ..unwarp import unwarp

    # Validate everything before writing anything.
    pe = parse_pe_direction(args.pe_direction, key="--pe-direction")
    out = Path(args.out_dir)
    if out.exists() and not out.is_dir():
        raise EpicorrInputError("exists and is not a folder", file=out, hint="choose another OUT_DIR")
    metadata = {"EffectiveEchoSpacing": args.echo_spacing, "PhaseEncodingDirection": pe.bids}
    timing = readout_timing(metadata, n_pe_image=_SHAPE[pe.axis], file="--echo-spacing")

    image, field, mask = make_phantom()
    disp = field_to_displacement(field, pe=pe, voxels_per_hz=timing.voxels_per_hz)
    if foldover_mask(disp, pe_axis=pe.axis).any():
        raise EpicorrInputError("the simulated distortion folds over at this echo spacing",
                                key="--echo-spacing", value=args.echo_spacing,
                                hint="use a shorter echo spacing")
    drift = 1.0 + 0.01 * np.arange(_N_VOLUMES)              # a little signal change over time
    series = (image[..., None] * drift).astype(np.float32)
    distorted = distort(series, disp, pe_axis=pe.axis)
    corrected = unwarp(distorted, disp, pe_axis=pe.axis)

    truth = series[..., 0]
    before = _metrics(distorted[..., 0], truth, mask)
    after = _metrics(corrected[..., 0], truth, mask)

    affine = np.diag(list(_ZOOMS) + [1.0])
    affine[:3, 3] = -0.5 * (np.array(_SHAPE) - 1) * np.array(_ZOOMS)
    ref = nib.Nifti1Image(np.zeros(_SHAPE + (_N_VOLUMES,), np.float32), affine)
    ref.header.set_zooms(_ZOOMS + (_TR,))
    ref.header.set_xyzt_units("mm", "sec")
    ref.set_qform(affine, code=1)
    ref.set_sform(affine, code=1)

    out.mkdir(parents=True, exist_ok=True)
    files = {
        "truth_bold.nii.gz": series,
        "distorted_bold.nii.gz": distorted,
        "unwarped_bold.nii.gz": corrected,
        "fieldmap_hz.nii.gz": field,
        "displacement_vox.nii.gz": disp,
        "brainmask.nii.gz": mask.astype(np.uint8),
    }
    for name, data in files.items():
        dtype = np.uint8 if data.dtype == np.uint8 else np.float32
        save_image_atomic(image_like(data, ref, dtype=dtype), out / name)
    summary = {
        "synthetic": True,
        "PhaseEncodingDirection": pe.bids,
        "EffectiveEchoSpacing": timing.effective_echo_spacing,
        "voxels_per_hz": timing.voxels_per_hz,
        "max_abs_displacement_vox": float(np.abs(disp).max()),
        "before": before,
        "after": after,
    }
    if not getattr(args, "phantom_only", False):
        summary["study"] = _run_study(out, jobs=max(1, int(getattr(args, "jobs", 2))),
                                      small=bool(getattr(args, "quick", False)))
    save_json_atomic(summary, out / "demo_summary.json")

    print("epicorr demo: SYNTHETIC DATA (an invented phantom with a known field map).")
    print(f"  grid {_SHAPE} x {_N_VOLUMES} volumes, PE {pe.bids}, echo spacing "
          f"{timing.effective_echo_spacing * 1e3:.3g} ms, N_PE {timing.n_pe}; "
          f"displacement up to {summary['max_abs_displacement_vox']:.2f} voxels")
    print("  inside the mask, against the undistorted truth (volume 1):")
    print(f"    distorted: RMSE {before['rmse']:8.4f}   correlation {before['correlation']:.5f}")
    print(f"    unwarped:  RMSE {after['rmse']:8.4f}   correlation {after['correlation']:.5f}")
    print(f"  files written to {out}/: " + ", ".join(list(files) + ["demo_summary.json"]))
    for sub, row in summary.get("study", {}).get("subjects", {}).items():
        print(f"  study {sub} ({row['route']}): field error in the brain {row['field_rmse_hz']:.2f} Hz RMSE, "
              f"median {row['field_median_abs_hz']:.2f} Hz; BOLD vs reference correlation "
              f"{row['corr_before']:.3f} -> {row['corr_after']:.3f} (true field: {row['corr_true_field']:.3f})")
    if summary.get("study", {}).get("subjects"):
        print("  (reference: the undistorted simulation with the true through-slice signal loss applied; "
              "'true field': the same BOLD unwarped with the simulator's own field)")
    if "study" in summary:
        print(f"  study: {summary['study']['exit_code'] == 0 and 'all subjects corrected' or 'some subjects failed'}"
              f" in {summary['study']['seconds']:.0f} s; QC pages in {out}/derivatives/epicorr/qc/")
    print("  " + CAUTION)
    return 0


def _run_study(out: Path, *, jobs: int, small: bool = False) -> dict:
    """Build the demo study, run the pipeline on it, and score each route against the truth.

    Field: RMSE and median absolute error inside the brain, Hz.  Images: the
    correlation inside the brain of the first BOLD volume, before and after
    correction, with the *reference* = the undistorted simulation times the
    true fraction of signal kept through the slice (signal lost by dephasing
    cannot come back, so it is not counted against the correction); and, as
    the ceiling, the same score for the BOLD unwarped with the true field.
    """
    import json
    import time

    import nibabel as nib

    from ..demo_study import build_demo_study
    from . import main as cli_main

    from ..displacement import field_to_displacement
    from ..unwarp import unwarp

    built = build_demo_study(out, seed=0, small=small)
    raw, deriv = Path(built["rawdata"]), out / "derivatives" / "epicorr"
    print("epicorr demo: running the pipeline on the synthetic study ...", flush=True)
    start = time.perf_counter()
    code = cli_main(["run", str(raw), str(deriv), "participant", "--executor", "local",
                     "--jobs", str(jobs), "--quiet"])
    seconds = time.perf_counter() - start
    truth = json.loads((out / "truth" / "truth.json").read_text())
    rows = {}
    for sub, info in truth["subjects"].items():
        tdir = out / "truth" / sub
        field_out = next(iter(sorted((deriv / sub / "func").glob("*_desc-field_fieldmap.nii.gz"))), None)
        bold_out = next(iter(sorted((deriv / sub / "func").glob("*_desc-unwarped_bold.nii.gz"))), None)
        if field_out is None or bold_out is None:
            continue
        mask = np.asanyarray(nib.load(tdir / f"{sub}_desc-brain_mask.nii.gz").dataobj) > 0
        true_field = np.asanyarray(nib.load(tdir / f"{sub}_desc-truefield_fieldmap.nii.gz").dataobj)
        est = np.asanyarray(nib.load(field_out).dataobj)
        truth_img = np.asanyarray(nib.load(tdir / f"{sub}_desc-undistorted_bold.nii.gz").dataobj,
                                  dtype=np.float64)
        raw_bold = next(iter(sorted((raw / sub / "func").glob("*_bold.nii.gz"))))
        before = np.asanyarray(nib.load(raw_bold).dataobj, dtype=np.float64)[..., 0]
        after = np.asanyarray(nib.load(bold_out).dataobj, dtype=np.float64)[..., 0]
        if truth_img.ndim == 4:
            truth_img = truth_img[..., 0]
        kept = np.asanyarray(nib.load(tdir / f"{sub}_desc-retained_bold.nii.gz").dataobj, dtype=np.float64)
        reference = truth_img * kept
        ceiling = unwarp(before, field_to_displacement(true_field, pe=info["bold_PhaseEncodingDirection"],
                                                       voxels_per_hz=info["EffectiveEchoSpacing"] * info["n_pe"]),
                         pe_axis=1, jacobian=True)
        err = est[mask] - true_field[mask]

        def corr(img):
            return float(np.corrcoef(img[mask], reference[mask])[0, 1])

        rows[sub] = {
            "route": info.get("case", "?"),
            "field_rmse_hz": float(np.sqrt(np.mean(err ** 2))),
            "field_median_abs_hz": float(np.median(np.abs(err))),
            "corr_before": corr(before),
            "corr_after": corr(after),
            "corr_true_field": corr(ceiling),
        }
    return {"exit_code": code, "seconds": seconds, "subjects": rows,
            "rawdata": str(raw), "derivatives": str(deriv)}
