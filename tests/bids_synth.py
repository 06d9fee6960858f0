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


# -- a tiny study with real data, one subject per route ----------------------
TINY_SHAPE = (20, 24, 12)
TINY_EES = 0.0008


def tiny_phantom(shape=TINY_SHAPE):
    """An invented ellipsoid 'head' with texture and a smooth field (Hz)."""
    grids = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape], indexing="ij")
    x, y, z = grids
    r = np.sqrt((x / 0.75) ** 2 + (y / 0.8) ** 2 + (z / 0.8) ** 2)
    head = 1.0 / (1.0 + np.exp((r - 1.0) / 0.06))
    image = head * (1.0 + 0.3 * np.sin(4 * x) * np.cos(3 * y) + 0.2 * np.cos(5 * z))
    field = 70.0 * np.exp(-((x - 0.1) ** 2 + (y - 0.4) ** 2 + z ** 2) / 0.25) + 15.0 * y
    return image, field, head > 0.5


def _distorted(image, field, pe):
    from epicorr.displacement import distort, field_to_displacement

    disp = field_to_displacement(field, pe=pe, voxels_per_hz=TINY_EES * image.shape[1])
    return np.clip(distort(image, disp, pe_axis=1), 0, None)


def make_tiny_study(root: Path) -> Path:
    """Four subjects, one per route, real tiny images; returns ``root``.

    sub-01 phasediff, sub-02 two phases, sub-03 Hz field map, sub-04
    reversed-PE pair.  Each has a 3-volume bold (PE ``j``); sub-01's bold is
    2-echo and has an sbref; sub-04 has a dwi with bval/bvec.
    """
    image, field, _ = tiny_phantom()
    rng = np.random.default_rng(7)
    root.mkdir(parents=True, exist_ok=True)
    write_json(root / "dataset_description.json", {"Name": "tiny", "BIDSVersion": "1.9.0"})
    meta = {"PhaseEncodingDirection": "j", "EffectiveEchoSpacing": TINY_EES, "EchoTime": 0.03,
            "RepetitionTime": 2.0, "SliceThickness": 3.0}
    te1, te2 = 0.00492, 0.00738
    for i in range(1, 5):
        sub = f"sub-{i:02d}"
        func = root / sub / "func"
        dist = _distorted(image, field, "j")
        series = np.stack([dist * (1 + 0.01 * t) + 0.01 * rng.standard_normal(dist.shape)
                           for t in range(3)], axis=-1)
        targets = []
        if i == 1:
            for echo in (1, 2):
                p = write_nifti(func / f"{sub}_task-tap_echo-{echo}_bold.nii.gz", series * (0.8 ** echo))
                write_json(p.with_name(f"{sub}_task-tap_echo-{echo}_bold.json",),
                           dict(meta, EchoTime=0.015 * echo, TaskName="tap"))
                targets.append(p)
            p = write_nifti(func / f"{sub}_task-tap_echo-1_sbref.nii.gz", dist)
            write_json(p.with_name(f"{sub}_task-tap_echo-1_sbref.json"), dict(meta, EchoTime=0.015))
            p2 = write_nifti(func / f"{sub}_task-tap_echo-2_sbref.nii.gz", dist * 0.8)
            write_json(p2.with_name(f"{sub}_task-tap_echo-2_sbref.json"), dict(meta, EchoTime=0.03))
            targets += [p, p2]
        else:
            p = write_nifti(func / f"{sub}_task-tap_bold.nii.gz", series)
            write_json(p.with_name(f"{sub}_task-tap_bold.json"), dict(meta, TaskName="tap"))
            targets.append(p)
        if i == 4:
            dwi = root / sub / "dwi"
            p = write_nifti(dwi / f"{sub}_dwi.nii.gz", np.stack([dist, 0.5 * dist], axis=-1))
            write_json(dwi / f"{sub}_dwi.json", meta)
            (dwi / f"{sub}_dwi.bval").write_text("0 1000\n")
            (dwi / f"{sub}_dwi.bvec").write_text("0 1\n0 0\n0 0\n")
            targets.append(p)
        uris = [f"bids::{sub}/{t.parent.name}/{t.name}" for t in targets]
        fmap = root / sub / "fmap"
        mag = image + 0.01 * rng.standard_normal(image.shape)
        if i == 1:
            dphi = np.angle(np.exp(2j * np.pi * field * (te2 - te1)))
            write_nifti(fmap / f"{sub}_phasediff.nii.gz", dphi)
            write_nifti(fmap / f"{sub}_magnitude1.nii.gz", mag)
            write_nifti(fmap / f"{sub}_magnitude2.nii.gz", 0.9 * mag)
            write_json(fmap / f"{sub}_phasediff.json", {"EchoTime1": te1, "EchoTime2": te2,
                                                        "IntendedFor": uris})
        elif i == 2:
            for n, te in ((1, te1), (2, te2)):
                write_nifti(fmap / f"{sub}_phase{n}.nii.gz",
                            np.angle(np.exp(2j * np.pi * field * te + 0.3j)))
                write_nifti(fmap / f"{sub}_magnitude{n}.nii.gz", mag * (1.0 - 0.1 * (n - 1)))
                write_json(fmap / f"{sub}_phase{n}.json",
                           {"EchoTime": te, "IntendedFor": [u.split("/", 1)[1] for u in uris]})
        elif i == 3:
            write_nifti(fmap / f"{sub}_fieldmap.nii.gz", field)
            write_nifti(fmap / f"{sub}_magnitude.nii.gz", mag)
            write_json(fmap / f"{sub}_fieldmap.json", {"Units": "Hz", "B0FieldIdentifier": "gre"})
            for t in targets:
                side = t.with_name(t.name.replace(".nii.gz", ".json"))
                write_json(side, dict(json.loads(side.read_text()), B0FieldSource="gre"))
        else:
            for d, code in (("AP", "j-"), ("PA", "j")):
                epi = _distorted(image, field, code) + 0.01 * rng.standard_normal(image.shape)
                write_nifti(fmap / f"{sub}_dir-{d}_epi.nii.gz", epi)
                write_json(fmap / f"{sub}_dir-{d}_epi.json",
                           dict(meta, PhaseEncodingDirection=code, B0FieldIdentifier="pair"))
            for t in targets:
                side = t.with_name(t.name.replace(".nii.gz", ".json"))
                write_json(side, dict(json.loads(side.read_text()), B0FieldSource="pair"))
    return root
