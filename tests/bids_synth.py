"""Tiny synthetic BIDS datasets for the BIDS, node and batch tests.

``make_layout_dataset`` writes empty image files (enough for indexing);
``write_nifti`` writes small real images when a test reads data.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np


def write_json(path: Path, data: dict) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(data, indent=1))
    return path


def _touch(path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(b"")
    return path


def write_nifti(path: Path, data: np.ndarray, affine: np.ndarray | None = None) -> Path:
    import nibabel as nib

    path.parent.mkdir(parents=True, exist_ok=True)
    aff = np.diag([3.0, 3.0, 3.0, 1.0]) if affine is None else affine
    img = nib.Nifti1Image(np.asarray(data, dtype=np.float32), aff)
    img.header.set_xyzt_units("mm", "sec")
    nib.save(img, str(path))
    return path


EPI_META = {"PhaseEncodingDirection": "j", "EffectiveEchoSpacing": 0.0005,
            "EchoTime": 0.03, "RepetitionTime": 2.0}


def make_layout_dataset(root: Path, n_subjects: int = 3, *, sessions: bool = False,
                        headers: bool = False) -> Path:
    """A dataset of empty files covering every target and field-source case.

    Subject ``i`` uses case ``i % 4``: phasediff (IntendedFor, BIDS URI),
    two phases (IntendedFor, subject-relative), direct fieldmap
    (B0FieldIdentifier/B0FieldSource), reversed-PE epi (B0FieldIdentifier).
    Every subject has a 2-echo bold with an sbref, a second run, a dwi with
    bval/bvec; task-level sidecars live at the root (inheritance).  With
    ``headers=True`` the images are tiny real NIfTI files (4x6x3 voxels, 2
    volumes for the series) instead of empty ones.
    """
    def touch(path: Path) -> Path:
        if not headers:
            return _touch(path)
        n_t = 2 if path.name.endswith(("_bold.nii.gz", "_dwi.nii.gz")) else 1
        shape = (4, 6, 3, n_t) if n_t > 1 else (4, 6, 3)
        return write_nifti(path, np.ones(shape))

    root.mkdir(parents=True, exist_ok=True)
    write_json(root / "dataset_description.json", {"Name": "synthetic", "BIDSVersion": "1.9.0"})
    write_json(root / "task-tap_bold.json", dict(EPI_META, TaskName="tap"))
    write_json(root / "task-tap_sbref.json", dict(EPI_META, TaskName="tap"))
    (root / "participants.tsv").write_text("participant_id\n" + "".join(
        f"sub-{i:02d}\n" for i in range(1, n_subjects + 1)))
    for i in range(1, n_subjects + 1):
        sub = f"sub-{i:02d}"
        for ses in (["ses-a", "ses-b"] if sessions else [None]):
            base = root / sub / ses if ses else root / sub
            pre = f"{sub}_{ses}" if ses else sub
            rel = f"{sub}/{ses}" if ses else sub
            func = base / "func"
            targets = []
            for echo in (1, 2):
                f = touch(func / f"{pre}_task-tap_run-1_echo-{echo}_bold.nii.gz")
                write_json(f.with_name(f.name.replace(".nii.gz", ".json")),
                           {"EchoTime": 0.015 * echo})
                targets.append(f)
            targets.append(touch(func / f"{pre}_task-tap_run-1_echo-1_sbref.nii.gz"))
            targets.append(touch(func / f"{pre}_task-tap_run-1_echo-2_sbref.nii.gz"))
            targets.append(touch(func / f"{pre}_task-tap_run-2_bold.nii.gz"))
            dwi = touch(base / "dwi" / f"{pre}_dwi.nii.gz")
            write_json(dwi.with_name(f"{pre}_dwi.json"), EPI_META)
            (base / "dwi" / f"{pre}_dwi.bval").write_text("0 1000\n")
            (base / "dwi" / f"{pre}_dwi.bvec").write_text("0 1\n0 0\n0 0\n")
            targets.append(dwi)
            rels = [f"{rel}/{t.parent.name}/{t.name}" for t in targets]
            fmap = base / "fmap"
            case = i % 4 if not sessions else (3 if ses == 'ses-b' else 1)
            if case == 1:
                touch(fmap / f"{pre}_phasediff.nii.gz")
                touch(fmap / f"{pre}_magnitude1.nii.gz")
                touch(fmap / f"{pre}_magnitude2.nii.gz")
                write_json(fmap / f"{pre}_phasediff.json",
                           {"EchoTime1": 0.00492, "EchoTime2": 0.00738,
                            "IntendedFor": [f"bids::{r}" for r in rels]})
            elif case == 2:
                for n, te in ((1, 0.00492), (2, 0.00738)):
                    touch(fmap / f"{pre}_phase{n}.nii.gz")
                    touch(fmap / f"{pre}_magnitude{n}.nii.gz")
                    sub_rel = [r.split("/", 1)[1] for r in rels]  # older subject-relative form
                    write_json(fmap / f"{pre}_phase{n}.json", {"EchoTime": te, "IntendedFor": sub_rel})
            elif case == 3:
                touch(fmap / f"{pre}_fieldmap.nii.gz")
                touch(fmap / f"{pre}_magnitude.nii.gz")
                write_json(fmap / f"{pre}_fieldmap.json", {"Units": "Hz", "B0FieldIdentifier": "gre0"})
                write_json(fmap / f"{pre}_magnitude.json", {"B0FieldIdentifier": "gre0"})
                for t in targets:
                    side = t.with_name(t.name.replace(".nii.gz", ".json"))
                    meta = json.loads(side.read_text()) if side.exists() else {}
                    write_json(side, dict(meta, B0FieldSource="gre0"))
            else:
                for d, pe in (("AP", "j-"), ("PA", "j")):
                    touch(fmap / f"{pre}_dir-{d}_epi.nii.gz")
                    write_json(fmap / f"{pre}_dir-{d}_epi.json",
                               dict(EPI_META, PhaseEncodingDirection=pe, B0FieldIdentifier="pepolar"))
                for t in targets:
                    side = t.with_name(t.name.replace(".nii.gz", ".json"))
                    meta = json.loads(side.read_text()) if side.exists() else {}
                    write_json(side, dict(meta, B0FieldSource="pepolar"))
    return root
