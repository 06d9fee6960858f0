"""Build the demo study: an invented BIDS dataset from the physics simulator, with ground truth.

An edge module (it writes files).  The study, "Harbour Lights", is invented:
four subjects, one per BIDS field-map case, each with a 4-D gradient-echo BOLD
run of the task ``lanterns``; the reversed phase-encode subject also has a
diffusion series.  Every image is simulated from the synthetic head
(:mod:`epicorr.simulate`): the field from the Fourier dipole model, EPI formed
in k-space, field maps as undistorted dual-echo gradient echoes on their own grid.

Layout::

    OUT_DIR/rawdata/   the BIDS dataset (validator-clean)
    OUT_DIR/truth/     ground truth, never inside rawdata:
        sub-<label>/sub-<label>_desc-truefield_fieldmap.nii.gz  field on the EPI grid, Hz
        sub-<label>/sub-<label>_desc-undistorted_bold.nii.gz    the BOLD's first volume as it would be
                                                                 without any off-resonance (same k-space
                                                                 simulation, field zero, no noise)
        sub-<label>/sub-<label>_desc-retained_bold.nii.gz        true gradient-echo signal kept (0-1)
        sub-<label>/sub-<label>_desc-brain_mask.nii.gz
        sub-<label>/sub-<label>_desc-labels_dseg.nii.gz          tissue classes (simulate.LABELS)
        sub-<label>/sub-<label>_desc-truefield_fmapgrid.nii.gz   field on the field-map grid (GRE cases)
        truth.json                                               what each file is, acquisition values

The data are synthetic and for demonstration and testing only.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

import nibabel as nib
import numpy as np

from .simulate import (default_affine, dipole_field_hz, phase_to_integer, shim, signal_side_field,
                       simulate_dual_echo, simulate_epi, synthetic_head, true_retained_signal)

__all__ = ["build_demo_study", "STUDY_NAME", "TASK", "SUBJECTS"]

STUDY_NAME = "Harbour Lights: an invented attention study (synthetic demo data)"
TASK = "lanterns"
#: subject label -> field-map case
SUBJECTS = {"amber": "reversed-pe", "birch": "phasediff", "cedar": "two-phases", "dune": "fieldmap"}

_B0 = 3.0
_TR = 2.0
_TE_BOLD = 0.03
_TE_SE = 0.06
_TE_DWI = 0.08
_EES = 4.0e-4
_ECHO_TIMES = (4.92e-3, 7.38e-3)   # 2.46 ms apart: common practice at 3 T
_BOLD_PE = "j-"                   # "AP" on the axis-aligned RAS grid (j runs posterior -> anterior)


def _grids(small: bool):
    if small:
        return ((36, 44, 28), 5.0), ((30, 36, 24), 6.0), 3
    return ((64, 64, 48), 3.0), ((56, 56, 40), 3.5), 8


def _write_text(path: Path, text: str) -> None:
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        fh.write(text)
    os.chmod(tmp, 0o644)
    os.replace(tmp, path)


def _savers():
    try:
        from .io import save_image_atomic, save_json_atomic
    except ImportError:  # pragma: no cover - io module always present in the package
        def save_image_atomic(img, path):
            nib.save(img, str(path))

        def save_json_atomic(obj, path):
            _write_text(Path(path), json.dumps(obj, indent=2) + "\n")
    return save_image_atomic, save_json_atomic


def _nifti(data, affine, *, tr=None, dtype=np.float32) -> nib.Nifti1Image:
    data = np.asarray(data)
    img = nib.Nifti1Image(data.astype(dtype), affine)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    zooms = tuple(np.sqrt(np.sum(affine[:3, :3] ** 2, axis=0)))
    if data.ndim == 4:
        img.header.set_zooms(zooms + (float(tr if tr is not None else 1.0),))
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_dim_info(phase=1, slice=2)
    return img


def _slice_timing(n_slices: int, tr: float) -> list[float]:
    """Interleaved ascending (odd slices first, then even), common practice."""
    order = list(range(0, n_slices, 2)) + list(range(1, n_slices, 2))
    times = [0.0] * n_slices
    for pos, sl in enumerate(order):
        times[sl] = round(pos * tr / n_slices, 6)
    return times


def _epi_meta(n_pe: int, n_slices: int, pe: str, te: float, tr: float) -> dict:
    return {
        "MagneticFieldStrength": _B0,
        "Manufacturer": "Synthetic",
        "ManufacturersModelName": "epicorr simulator",
        "PulseSequenceType": "EPI",
        "PhaseEncodingDirection": pe,
        "EffectiveEchoSpacing": _EES,
        "TotalReadoutTime": round(_EES * (n_pe - 1), 9),
        "EchoTime": te,
        "RepetitionTime": tr,
        "SliceEncodingDirection": "k",
        "SliceTiming": _slice_timing(n_slices, tr),
    }


def build_demo_study(out_dir, *, seed: int = 0, small: bool = True) -> dict:
    """Write the demo study under ``out_dir`` and return a summary.

    Parameters
    ----------
    out_dir : path-like
        Created if needed; the dataset goes to ``out_dir/rawdata``, the truth to
        ``out_dir/truth``.
    seed : int
        Base seed (heads and noise).
    small : bool
        Small grids (5 mm EPI, 3 BOLD volumes) for tests and the demo; else 3 mm, 8 volumes.

    Returns
    -------
    dict
        ``rawdata``, ``truth`` (paths), ``subjects`` (label -> case and the files written),
        ``truth_json`` (path).
    """
    save_image, save_json = _savers()
    out = Path(out_dir)
    raw, truth_dir = out / "rawdata", out / "truth"
    raw.mkdir(parents=True, exist_ok=True)
    truth_dir.mkdir(parents=True, exist_ok=True)
    (epi_shape, epi_vox), (fm_shape, fm_vox), n_vols = _grids(small)
    epi_aff = default_affine(epi_shape, epi_vox)
    fm_aff = default_affine(fm_shape, fm_vox)
    fm_aff[:3, 3] += (1.5, -2.0, 1.0)    # field-map grid: other size, other origin
    n_pe, n_sl = epi_shape[1], epi_shape[2]

    save_json({"Name": STUDY_NAME, "BIDSVersion": "1.8.0", "DatasetType": "raw", "License": "CC0",
               "Authors": ["Harbour Lights team (invented)", "The epicorr developers"],
               "HowToAcknowledge": "Synthetic data made by the epicorr simulator; no real person was scanned."},
              raw / "dataset_description.json")
    _write_text(raw / "README", (
        "Harbour Lights (invented study, synthetic data)\n\n"
        "Four simulated subjects, one per BIDS field-map case (reversed phase-encode EPI pair,\n"
        "phase difference, two phases, direct field map in Hz), each with a gradient-echo BOLD run of\n"
        "the invented task 'lanterns'; sub-amber also has a diffusion series. Every image was\n"
        "simulated from a synthetic head by the epicorr simulator (Fourier dipole field, EPI formed in\n"
        "k-space). Ground truth lives beside this dataset in ../truth, not inside it.\n"
        "For demonstration and testing only: no person was scanned.\n"))
    _write_text(raw / "CHANGES", "1.0.0 2026-12-01\n  - First synthetic release.\n")
    rows = ["participant_id\tage\tsex"] + [f"sub-{s}\t{30 + 3 * i}\t{'F' if i % 2 else 'M'}"
                                           for i, s in enumerate(SUBJECTS)]
    _write_text(raw / "participants.tsv", "\n".join(rows) + "\n")
    save_json({"age": {"Description": "age at the (simulated) scan", "Units": "year"},
               "sex": {"Description": "sex (invented)", "Levels": {"F": "female", "M": "male"}}},
              raw / "participants.json")
    save_json({"TaskName": TASK, "TaskDescription": "Attend to flashing lanterns (invented task)."},
              raw / f"task-{TASK}_bold.json")

    truth_index: dict = {"note": "synthetic ground truth for the rawdata next to this folder",
                         "field_units": "Hz", "B0_T": _B0, "subjects": {}}
    summary = {"rawdata": str(raw), "truth": str(truth_dir), "subjects": {}}
    for n_sub, (label, case) in enumerate(SUBJECTS.items()):
        sub = f"sub-{label}"
        sdir = raw / sub
        tdir = truth_dir / sub
        for d in ("func", "fmap") + (("dwi",) if case == "reversed-pe" else ()):
            (sdir / d).mkdir(parents=True, exist_ok=True)
        tdir.mkdir(parents=True, exist_ok=True)
        sseed = seed * 100 + n_sub
        head = synthetic_head(shape=epi_shape, voxel_size_mm=epi_vox, seed=sseed,
                              rotation_deg=(4.0 * (n_sub - 1.5), 0.0, 2.0 * (n_sub - 1.5)))
        field = shim(dipole_field_hz(head.chi_ppm, affine=head.affine, b0_tesla=_B0),
                     mask=head.brain_mask, affine=head.affine)
        # What the signal sees: tissue-side values carried into the air around the head (the
        # brain is untouched), so scalp signal is not thrown along PE by the air's field.
        field = signal_side_field(field, tissue_fraction=head.tissue_fraction, keep=head.brain_mask)
        files: list[str] = []
        fmap_id = f"fmap{label}"
        bold_name = f"{sub}_task-{TASK}_bold.nii.gz"
        targets = [f"bids::{sub}/func/{bold_name}"]

        # BOLD: gradient-echo EPI, noise per volume and a small signal change
        base = simulate_epi(head, field, pe=_BOLD_PE, effective_echo_spacing=_EES, echo_time=_TE_BOLD,
                            kind="gradient-echo", return_complex=True)
        rng = np.random.default_rng(sseed + 7)
        level = float(np.mean(np.abs(base)[head.brain_mask]))
        vols = []
        for t in range(n_vols):
            noise = level / 60.0 * (rng.standard_normal(base.shape) + 1j * rng.standard_normal(base.shape))
            vols.append(np.abs(base * (1 + 0.01 * np.sin(t)) + noise))
        bold = np.stack(vols, -1) * 1000.0
        save_image(_nifti(bold, epi_aff, tr=_TR), sdir / "func" / bold_name)
        meta = _epi_meta(n_pe, n_sl, _BOLD_PE, _TE_BOLD, _TR)
        meta.update({"TaskName": TASK, "B0FieldSource": fmap_id})
        save_json(meta, sdir / "func" / bold_name.replace(".nii.gz", ".json"))
        events = ["onset\tduration\ttrial_type"] + [f"{t * _TR:.1f}\t{_TR:.1f}\tlantern"
                                                    for t in range(0, n_vols, 2)]
        _write_text(sdir / "func" / bold_name.replace("_bold.nii.gz", "_events.tsv"), "\n".join(events) + "\n")
        files.append(f"func/{bold_name}")

        if case == "reversed-pe":
            dwi_name = f"{sub}_dwi.nii.gz"
            bvals = [0, 1000, 1000, 1000] if small else [0] + [1000] * 6
            dirs = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], [0.7071, 0.7071, 0],
                             [0.7071, 0, 0.7071], [0, 0.7071, 0.7071]], float)[:len(bvals)]
            adc = np.where(head.labels == 3, 3.0e-3, 0.8e-3)    # mm^2/s, common practice values
            dvols = []
            for b in bvals:
                obj = head.epi_contrast * np.exp(-b * adc)
                img = simulate_epi(obj, field, pe=_BOLD_PE, effective_echo_spacing=_EES, echo_time=_TE_DWI,
                                   affine=epi_aff, kind="spin-echo", snr=40, mask=head.brain_mask,
                                   seed=sseed + 11 + len(dvols))
                dvols.append(img * 1000.0)
            save_image(_nifti(np.stack(dvols, -1), epi_aff, tr=3.0), sdir / "dwi" / dwi_name)
            dmeta = _epi_meta(n_pe, n_sl, _BOLD_PE, _TE_DWI, 3.0)
            dmeta["B0FieldSource"] = fmap_id
            save_json(dmeta, sdir / "dwi" / dwi_name.replace(".nii.gz", ".json"))
            _write_text(sdir / "dwi" / f"{sub}_dwi.bval", " ".join(str(b) for b in bvals) + "\n")
            _write_text(sdir / "dwi" / f"{sub}_dwi.bvec",
                        "\n".join(" ".join(f"{v:g}" for v in row) for row in dirs.T) + "\n")
            files.append(f"dwi/{dwi_name}")
            targets.append(f"bids::{sub}/dwi/{dwi_name}")
            for code, name in (("j-", "AP"), ("j", "PA")):
                img = simulate_epi(head, field, pe=code, effective_echo_spacing=_EES, echo_time=_TE_SE,
                                   kind="spin-echo", snr=50, seed=sseed + (1 if code == "j" else 2))
                fname = f"{sub}_dir-{name}_epi.nii.gz"
                save_image(_nifti(img * 1000.0, epi_aff), sdir / "fmap" / fname)
                fmeta = _epi_meta(n_pe, n_sl, code, _TE_SE, 8.0)
                fmeta.update({"IntendedFor": targets, "B0FieldIdentifier": fmap_id})
                save_json(fmeta, sdir / "fmap" / fname.replace(".nii.gz", ".json"))
                files.append(f"fmap/{fname}")
        else:
            gre = simulate_dual_echo(head, field, echo_times=_ECHO_TIMES, target_shape=fm_shape,
                                     target_affine=fm_aff, snr=60, seed=sseed + 3)
            common = {"MagneticFieldStrength": _B0, "Manufacturer": "Synthetic",
                      "IntendedFor": targets, "B0FieldIdentifier": fmap_id}
            fm = sdir / "fmap"
            if case == "phasediff":
                dphi = np.angle(np.exp(1j * (gre.phases[1] - gre.phases[0])))
                save_image(_nifti(phase_to_integer(dphi), fm_aff, dtype=np.int16), fm / f"{sub}_phasediff.nii.gz")
                save_json({**common, "EchoTime1": _ECHO_TIMES[0], "EchoTime2": _ECHO_TIMES[1]},
                          fm / f"{sub}_phasediff.json")
                for e in (0, 1):
                    save_image(_nifti(gre.magnitudes[e] * 1000.0, fm_aff), fm / f"{sub}_magnitude{e + 1}.nii.gz")
                files += [f"fmap/{sub}_phasediff.nii.gz", f"fmap/{sub}_magnitude1.nii.gz",
                          f"fmap/{sub}_magnitude2.nii.gz"]
            elif case == "two-phases":
                for e in (0, 1):
                    save_image(_nifti(gre.phases[e], fm_aff), fm / f"{sub}_phase{e + 1}.nii.gz")
                    save_json({**common, "EchoTime": _ECHO_TIMES[e], "Units": "rad"},
                              fm / f"{sub}_phase{e + 1}.json")
                    save_image(_nifti(gre.magnitudes[e] * 1000.0, fm_aff), fm / f"{sub}_magnitude{e + 1}.nii.gz")
                    save_json({"EchoTime": _ECHO_TIMES[e]}, fm / f"{sub}_magnitude{e + 1}.json")
                    files += [f"fmap/{sub}_phase{e + 1}.nii.gz", f"fmap/{sub}_magnitude{e + 1}.nii.gz"]
            else:  # direct field map in Hz: the true field with a little noise, zero outside the head
                noisy = gre.field_hz + np.random.default_rng(sseed + 5).normal(0, 1.0, fm_shape)
                head_fm = gre.magnitudes[0] > 0.15 * np.percentile(gre.magnitudes[0], 99)
                save_image(_nifti(np.where(head_fm, noisy, 0.0), fm_aff), fm / f"{sub}_fieldmap.nii.gz")
                save_json({**common, "Units": "Hz"}, fm / f"{sub}_fieldmap.json")
                save_image(_nifti(gre.magnitudes[0] * 1000.0, fm_aff), fm / f"{sub}_magnitude.nii.gz")
                files += [f"fmap/{sub}_fieldmap.nii.gz", f"fmap/{sub}_magnitude.nii.gz"]
            save_image(_nifti(gre.field_hz, fm_aff), tdir / f"{sub}_desc-truefield_fmapgrid.nii.gz")

        # ground truth on the EPI grid
        kept = true_retained_signal(field, echo_time=_TE_BOLD, affine=epi_aff)
        save_image(_nifti(field, epi_aff), tdir / f"{sub}_desc-truefield_fieldmap.nii.gz")
        clean = simulate_epi(head, np.zeros_like(field), pe=_BOLD_PE, effective_echo_spacing=_EES,
                             echo_time=_TE_BOLD, kind="gradient-echo")
        save_image(_nifti(clean * 1000.0, epi_aff), tdir / f"{sub}_desc-undistorted_bold.nii.gz")
        save_image(_nifti(kept, epi_aff), tdir / f"{sub}_desc-retained_bold.nii.gz")
        save_image(_nifti(head.brain_mask, epi_aff, dtype=np.uint8), tdir / f"{sub}_desc-brain_mask.nii.gz")
        save_image(_nifti(head.labels, epi_aff, dtype=np.int16), tdir / f"{sub}_desc-labels_dseg.nii.gz")
        truth_index["subjects"][sub] = {
            "case": case, "seed": sseed, "EffectiveEchoSpacing": _EES, "bold_PhaseEncodingDirection": _BOLD_PE,
            "bold_EchoTime": _TE_BOLD, "n_pe": n_pe,
            "field": f"{sub}/{sub}_desc-truefield_fieldmap.nii.gz",
            "undistorted": f"{sub}/{sub}_desc-undistorted_bold.nii.gz (x1000, same scale as the BOLD)",
            "retained_signal": f"{sub}/{sub}_desc-retained_bold.nii.gz",
            "labels": list(head.LABELS),
        }
        summary["subjects"][label] = {"case": case, "files": files}
    save_json(truth_index, truth_dir / "truth.json")
    summary["truth_json"] = str(truth_dir / "truth.json")
    return summary
