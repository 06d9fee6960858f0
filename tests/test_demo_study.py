"""The demo study: BIDS layout and sidecars (BIDS specification 1.8, "Fieldmap data",
"Magnetic Resonance Imaging" metadata, BIDS URIs), truth outside rawdata, and the
official BIDS validator (npm bids-validator 1.15.0, installed by `make install-validator`)."""

import json
import subprocess
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from conftest import REPO, require_tool
from epicorr.demo_study import SUBJECTS, TASK, build_demo_study


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    summary = build_demo_study(out, seed=0, small=True)
    return out, summary


def _json(path: Path) -> dict:
    return json.loads(path.read_text())


def test_layout_and_truth_outside_rawdata(study):
    out, summary = study
    raw, truth = out / "rawdata", out / "truth"
    assert Path(summary["rawdata"]) == raw and Path(summary["truth"]) == truth
    for name in ("dataset_description.json", "README", "participants.tsv"):
        assert (raw / name).is_file()
    assert _json(raw / "dataset_description.json")["BIDSVersion"]
    rows = (raw / "participants.tsv").read_text().splitlines()
    assert rows[0].split("\t")[0] == "participant_id" and len(rows) == 1 + len(SUBJECTS)
    # the four BIDS field-map cases
    fm = {s: sorted(p.name for p in (raw / f"sub-{s}" / "fmap").glob("*.nii.gz")) for s in SUBJECTS}
    assert fm["amber"] == ["sub-amber_dir-AP_epi.nii.gz", "sub-amber_dir-PA_epi.nii.gz"]
    assert fm["birch"] == ["sub-birch_magnitude1.nii.gz", "sub-birch_magnitude2.nii.gz",
                           "sub-birch_phasediff.nii.gz"]
    assert fm["cedar"] == ["sub-cedar_magnitude1.nii.gz", "sub-cedar_magnitude2.nii.gz",
                           "sub-cedar_phase1.nii.gz", "sub-cedar_phase2.nii.gz"]
    assert fm["dune"] == ["sub-dune_fieldmap.nii.gz", "sub-dune_magnitude.nii.gz"]
    # no truth inside rawdata, truth present beside it
    assert not any("truth" in p.name or "desc-" in p.name for p in raw.rglob("*"))
    for s in SUBJECTS:
        assert (truth / f"sub-{s}" / f"sub-{s}_desc-truefield_fieldmap.nii.gz").is_file()
        assert (truth / f"sub-{s}" / f"sub-{s}_desc-undistorted_bold.nii.gz").is_file()
        assert (truth / f"sub-{s}" / f"sub-{s}_desc-retained_bold.nii.gz").is_file()
    assert set(_json(truth / "truth.json")["subjects"]) == {f"sub-{s}" for s in SUBJECTS}


def test_targets_and_sidecars(study):
    out, _ = study
    raw = out / "rawdata"
    for s in SUBJECTS:
        bold = raw / f"sub-{s}" / "func" / f"sub-{s}_task-{TASK}_bold.nii.gz"
        img = nib.load(bold)
        assert img.ndim == 4 and img.shape[3] >= 2
        meta = _json(bold.with_name(bold.name.replace(".nii.gz", ".json")))
        n_pe, n_sl = img.shape[1], img.shape[2]
        assert meta["PhaseEncodingDirection"] in ("j", "j-")
        # BIDS: TotalReadoutTime = EffectiveEchoSpacing * (ReconMatrixPE - 1)
        assert meta["TotalReadoutTime"] == pytest.approx(meta["EffectiveEchoSpacing"] * (n_pe - 1))
        assert img.header.get_zooms()[3] == pytest.approx(meta["RepetitionTime"])
        assert len(meta["SliceTiming"]) == n_sl and max(meta["SliceTiming"]) < meta["RepetitionTime"]
        assert meta["B0FieldSource"] == f"fmap{s}" and meta["TaskName"] == TASK
        fmaps = [p for p in (raw / f"sub-{s}" / "fmap").glob("*.json")
                 if "IntendedFor" in _json(p)]
        assert fmaps
        for p in fmaps:
            m = _json(p)
            assert m["B0FieldIdentifier"] == f"fmap{s}"
            for uri in m["IntendedFor"]:
                assert uri.startswith(f"bids::sub-{s}/")              # BIDS URI
                assert (raw / uri[len("bids::"):]).is_file()
    pd = _json(raw / "sub-birch" / "fmap" / "sub-birch_phasediff.json")
    assert pd["EchoTime2"] - pd["EchoTime1"] == pytest.approx(2.46e-3)
    assert _json(raw / "sub-dune" / "fmap" / "sub-dune_fieldmap.json")["Units"] == "Hz"
    assert {_json(raw / "sub-amber" / "fmap" / f"sub-amber_dir-{d}_epi.json")["PhaseEncodingDirection"]
            for d in ("AP", "PA")} == {"j", "j-"}
    dwi = raw / "sub-amber" / "dwi"
    n_vol = nib.load(dwi / "sub-amber_dwi.nii.gz").shape[3]
    bvals = (dwi / "sub-amber_dwi.bval").read_text().split()
    bvecs = np.loadtxt(dwi / "sub-amber_dwi.bvec")
    assert len(bvals) == n_vol and bvecs.shape == (3, n_vol)


def test_truth_field_matches_direct_fieldmap(study):
    # The direct Hz field map is the truth on its own grid plus 1 Hz noise.
    out, _ = study
    fm = nib.load(out / "rawdata" / "sub-dune" / "fmap" / "sub-dune_fieldmap.nii.gz").get_fdata()
    true = nib.load(out / "truth" / "sub-dune" / "sub-dune_desc-truefield_fmapgrid.nii.gz").get_fdata()
    inside = fm != 0
    assert inside.mean() > 0.1
    assert np.std((fm - true)[inside]) == pytest.approx(1.0, rel=0.1)


@pytest.mark.validator
def test_official_bids_validator_reports_no_errors(study):
    out, _ = study
    tool = require_tool(str(REPO / ".tools" / "node" / "node_modules" / ".bin" / "bids-validator"),
                        why="run `make install-validator`")
    proc = subprocess.run([tool, str(out / "rawdata"), "--json"], capture_output=True, text=True,
                          timeout=300)
    report = json.loads(proc.stdout)
    errors = report["issues"]["errors"]
    assert errors == [], [e.get("key") for e in errors]
    assert proc.returncode == 0
