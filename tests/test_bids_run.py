"""`epicorr run` on a whole (tiny) BIDS dataset: derivatives that pybids can index, bad subjects isolated.

External references:
* BIDS specification, "Derivatives": ``dataset_description.json`` with
  ``DatasetType: derivative`` and ``GeneratedBy``; derivative files keep the
  source entities and add ``desc``.
* pybids (reference library) indexes the output folder as a derivatives
  dataset and must find each output by its entities.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import nibabel as nib
import pytest

from bids_synth import make_tiny_study
from epicorr.cli import main

bids = pytest.importorskip("bids")

# In-process runs use the serial executor: a forking executor inside a test worker that already
# holds thread pools (from earlier tests) can deadlock its children.


def _hashes(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def finished_run(tmp_path_factory):
    base = tmp_path_factory.mktemp("bidsrun")
    raw, out = base / "raw", base / "out"
    make_tiny_study(raw)
    code = main(["run", str(raw), str(out), "participant", "--quiet", "--executor", "serial"])
    assert code == 0
    return raw, out


def test_pybids_indexes_the_outputs_as_a_derivatives_dataset(finished_run):
    raw, out = finished_run
    desc = json.loads((out / "dataset_description.json").read_text())
    assert desc["DatasetType"] == "derivative" and desc["GeneratedBy"][0]["Name"] == "epicorr"
    layout = bids.BIDSLayout(str(raw), derivatives=str(out), validate=False)
    deriv = layout.derivatives.get_pipeline("epicorr")
    assert sorted(deriv.get_subjects()) == ["01", "02", "03", "04"]
    # Every target of every subject has its corrected series and its field, found by entities.
    for sub in ("02", "03", "04"):
        unwarped = deriv.get(subject=sub, task="tap", desc="unwarped", suffix="bold", extension=".nii.gz")
        field = deriv.get(subject=sub, task="tap", desc="field", suffix="fieldmap", extension=".nii.gz")
        assert len(unwarped) == 1 and len(field) == 1, (sub, unwarped, field)
        src = layout.get(subject=sub, task="tap", suffix="bold", extension=".nii.gz", scope="raw")[0]
        assert nib.load(unwarped[0].path).shape == nib.load(src.path).shape
        assert field[0].get_metadata()["Units"] == "Hz"
    # Multi-echo: each echo of sub-01 is found by its echo entity; sbref and dwi too.
    for echo in (1, 2):
        assert len(deriv.get(subject="01", echo=echo, desc="unwarped", suffix="bold", extension=".nii.gz")) == 1
        assert len(deriv.get(subject="01", echo=echo, desc="unwarped", suffix="sbref",
                             extension=".nii.gz")) == 1
    assert len(deriv.get(subject="04", desc="unwarped", suffix="dwi", extension=".nii.gz")) == 1
    assert deriv.get(subject="04", suffix="dwi", extension=".bval"), "bval kept beside the output"
    masks = deriv.get(desc="dropout", suffix="mask", extension=".nii.gz")
    assert len(masks) >= 4
    # One brain mask per target (BIDS derivatives: desc-brain_mask), inside the brain's bounds: a
    # strict subset of the head (the measurement mask covers scalp too), never empty.
    brains = deriv.get(desc="brain", suffix="mask", extension=".nii.gz")
    assert len(brains) >= 4
    for b in brains:
        n = int(np.count_nonzero(np.asanyarray(nib.load(b.path).dataobj)))
        assert 0 < n < np.prod(nib.load(b.path).shape) // 2, (b.path, n)
    # Sources point back at the raw input (BIDS derivatives: "Sources").
    side = json.loads(Path(unwarped[0].path.replace(".nii.gz", ".json")).read_text())
    assert side["Sources"], side


def test_pair_subject_page_shows_both_polarities(finished_run):
    import re

    _, out = finished_run
    html = (out / "qc" / "sub-04.html").read_text()
    # Every target of the reversed-PE subject (bold and dwi share the pair) shows the figure,
    # drawn on the pair's own grid, with the agreement in its brain rising after correction.
    found = re.findall(r"correlation in the brain, on the grid of the reversed-PE "
                       r"images (-?[0-9]+\.[0-9]+) → (-?[0-9]+\.[0-9]+)", html)
    assert len(found) == html.count("Opposite phase-encode agreement") == 2, found
    assert all(float(after) > float(before) for before, after in found), found
    assert "Opposite phase-encode agreement" not in (out / "qc" / "sub-02.html").read_text()


def test_bad_subjects_fail_alone_with_file_and_key_and_inputs_untouched(tmp_path, capsys):
    raw, out = tmp_path / "raw", tmp_path / "out"
    make_tiny_study(raw)
    # sub-01's bold targets stay good.  sub-02: IntendedFor names a series that does not exist.
    side2 = raw / "sub-02" / "fmap" / "sub-02_phase1.json"
    meta = json.loads(side2.read_text())
    meta["IntendedFor"] = ["func/sub-02_task-nothere_bold.nii.gz"]
    side2.write_text(json.dumps(meta))
    # sub-03: the field map image is a corrupted gzip stream.
    fmap3 = raw / "sub-03" / "fmap" / "sub-03_fieldmap.nii.gz"
    blob = bytearray(fmap3.read_bytes())
    blob[len(blob) // 2: len(blob) // 2 + 64] = b"\x00" * 64
    fmap3.write_bytes(bytes(blob[: len(blob) - 10]))
    # sub-04: both pair images claim the same polarity.
    side4 = raw / "sub-04" / "fmap" / "sub-04_dir-PA_epi.json"
    side4.write_text(json.dumps(dict(json.loads(side4.read_text()), PhaseEncodingDirection="j-")))
    before = _hashes(raw)
    code = main(["run", str(raw), str(out), "participant", "--quiet", "--executor", "serial"])
    text = capsys.readouterr()
    lines = (text.out + text.err).splitlines()
    failed = [ln for ln in lines if "FAILED" in ln]
    assert code == 1, lines[-20:]
    assert _hashes(raw) == before, "an input was modified"
    assert list(out.glob("sub-01/func/*_desc-unwarped_bold.nii.gz")), "the good subject did not finish"

    def one(sub):
        hits = [ln for ln in failed if f"sub-{sub}" in ln]
        assert hits, (sub, failed)
        return hits[0]

    assert "sub-02_phase1.json" in one("02") and "IntendedFor" in one("02")
    assert "sub-03_fieldmap.nii.gz" in one("03")
    assert "sub-04_dir-PA_epi.json" in one("04") and "PhaseEncodingDirection" in one("04")
    for sub in ("02", "03", "04"):
        assert not list(out.glob(f"sub-{sub}/**/*.nii.gz")), f"derivatives written for failed sub-{sub}"
    shutil.rmtree(out)
