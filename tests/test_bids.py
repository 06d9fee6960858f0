"""BIDS discovery: names, inheritance, targets, field sources, priority, derivative names.

Outside references: the BIDS specification (file-name structure, inheritance
principle, "Fieldmap data", IntendedFor and BIDS URIs, derivatives) and pybids
(a general-purpose BIDS library) as a second reading of the same dataset.
"""

from __future__ import annotations

import json
import os

import pytest

from bids_synth import EPI_META, make_layout_dataset, write_json, write_nifti
import numpy as np

from epicorr.bids import (build_name, find_field_sources, find_targets, index_dataset,
                          output_path, parse_name, plan_subject, target_outputs,
                          write_dataset_description)
from epicorr.errors import EpicorrInputError
from epicorr.options import FieldSourceKind


# -- names -----------------------------------------------------------------
def test_parse_and_build_names_follow_the_specification():
    # BIDS specification, "File name structure": key-value entities, suffix, extension.
    p = parse_name("sub-01_ses-pre_task-rest_acq-mb4_dir-AP_run-2_echo-3_bold.nii.gz")
    assert p.entities == {"sub": "01", "ses": "pre", "task": "rest", "acq": "mb4", "dir": "AP",
                          "run": "2", "echo": "3"}
    assert (p.suffix, p.extension) == ("bold", ".nii.gz")
    # Entity table order: sub, ses, task, acq, ..., dir, run, echo, ..., desc.
    shuffled = {"desc": "unwarped", "echo": "3", "run": "2", "task": "rest", "sub": "01", "ses": "pre"}
    assert build_name(shuffled, "bold", ".nii.gz") == \
        "sub-01_ses-pre_task-rest_run-2_echo-3_desc-unwarped_bold.nii.gz"
    assert parse_name("sub-01_task-rest_bold").extension == ""
    for bad in ("README", "sub-01_task_rest_bold.nii", "sub-01_sub-02_bold.nii.gz",
                "sub-01_bold-x.nii.gz"):
        assert parse_name(bad) is None, bad


# -- index, inheritance and targets ------------------------------------------
def test_targets_multi_echo_sbref_and_dwi(tmp_path):
    ds = index_dataset(make_layout_dataset(tmp_path / "raw", 1))
    assert ds.subjects() == ["01"]
    targets = {t.name: t for t in find_targets(ds, "01")}
    assert sorted(targets) == ["sub-01_dwi", "sub-01_task-tap_run-1_bold", "sub-01_task-tap_run-2_bold"]
    me = targets["sub-01_task-tap_run-1_bold"]
    # The echoes form one target (shared field); the sbref of the same run joins it.
    assert [f.entities["echo"] for f in me.echoes] == ["1", "2"]
    assert [f.suffix for f in me.sbref] == ["sbref", "sbref"]
    assert me.reference.suffix == "sbref"
    dwi = targets["sub-01_dwi"]
    assert dwi.bval.name == "sub-01_dwi.bval" and dwi.bvec.name == "sub-01_dwi.bvec"


def test_sidecar_inheritance_matches_the_principle_and_pybids(tmp_path):
    root = make_layout_dataset(tmp_path / "raw", 2)
    # A subject-level sidecar overrides the root one for that subject only
    # (BIDS specification, "The Inheritance Principle").
    write_json(root / "sub-02" / "sub-02_task-tap_bold.json", {"EffectiveEchoSpacing": 0.0006})
    ds = index_dataset(root)
    f1 = ds.get("sub-01/func/sub-01_task-tap_run-1_echo-2_bold.nii.gz")
    f2 = ds.get("sub-02/func/sub-02_task-tap_run-1_echo-2_bold.nii.gz")
    m1, m2 = ds.metadata(f1), ds.metadata(f2)
    assert m1["EchoTime"] == pytest.approx(0.03)          # file level beats root
    assert m1["EffectiveEchoSpacing"] == 0.0005           # root
    assert m2["EffectiveEchoSpacing"] == 0.0006           # subject level beats root
    assert ds.origin(f2, "EffectiveEchoSpacing") == root / "sub-02" / "sub-02_task-tap_bold.json"
    # pybids reads the same metadata for every data file (reference library).
    bids = pytest.importorskip("bids")
    layout = bids.BIDSLayout(str(root), validate=False)
    for f in ds.files:
        theirs = layout.get_metadata(str(f.path))
        ours = ds.metadata(f)
        assert ours == theirs, f.relpath
        assert layout.get_file(str(f.path)).get_entities()["subject"] == f.entities["sub"]


def test_sessions_are_separate(tmp_path):
    ds = index_dataset(make_layout_dataset(tmp_path / "raw", 1, sessions=True))
    targets = find_targets(ds, "01")
    assert sorted({t.session for t in targets}) == ["a", "b"]
    # Session a: phasediff by IntendedFor; session b: a field map by a
    # B0FieldIdentifier ("gre0") that recurs per session.
    sources = find_field_sources(ds, "01")
    assert sorted((s.session, s.kind.value) for s in sources) == [("a", "phasediff"), ("b", "fieldmap")]
    for s in sources:
        assert {f.entities["ses"] for f in s.files.values()} == {s.session}
        assert all(r.startswith(f"sub-01/ses-{s.session}/") for r in s.intended_for)
    root = ds.root
    # Give session a the same identifier on its own field map: still separate.
    write_json(root / "sub-01/ses-a/fmap/sub-01_ses-a_phasediff.json",
               {"EchoTime1": 0.00492, "EchoTime2": 0.00738, "B0FieldIdentifier": "gre0"})
    write_json(root / "sub-01/ses-a/fmap/sub-01_ses-a_magnitude1.json", {"B0FieldIdentifier": "gre0"})
    write_json(root / "sub-01/ses-a/fmap/sub-01_ses-a_magnitude2.json", {"B0FieldIdentifier": "gre0"})
    ds = index_dataset(root)
    sources = find_field_sources(ds, "01")
    assert sorted((s.session, s.identifiers) for s in sources) == [("a", ("gre0",)), ("b", ("gre0",))]


# -- field sources -------------------------------------------------------------
@pytest.mark.parametrize("subject, kind, link", [
    ("01", FieldSourceKind.PHASEDIFF, "IntendedFor"),      # BIDS URI bids::sub-01/...
    ("02", FieldSourceKind.TWO_PHASES, "IntendedFor"),     # older subject-relative paths
    ("03", FieldSourceKind.FIELDMAP, "B0FieldSource"),
    ("04", FieldSourceKind.REVERSED_PE, "B0FieldSource"),
])
def test_each_bids_field_map_case_links_every_target(tmp_path, subject, kind, link):
    ds = index_dataset(make_layout_dataset(tmp_path / "raw", 4, headers=True),
                       participant_labels=[subject])
    plan = plan_subject(ds, subject)
    assert plan.skipped == []
    assert len(plan.items) == 3
    for item in plan.items:
        assert (item.source.kind, item.link) == (kind, link)
    roles = set(plan.items[0].source.files)
    expected = {FieldSourceKind.PHASEDIFF: {"phasediff", "magnitude1", "magnitude2"},
                FieldSourceKind.TWO_PHASES: {"phase1", "phase2", "magnitude1", "magnitude2"},
                FieldSourceKind.FIELDMAP: {"fieldmap", "magnitude"},
                FieldSourceKind.REVERSED_PE: {"epi0", "epi1"}}[kind]
    assert roles == expected


def test_priority_and_the_field_source_flag(tmp_path):
    root = make_layout_dataset(tmp_path / "raw", 4, headers=True)
    # Give sub-04 (reversed-PE, linked by B0FieldSource) also a direct field map
    # linked by IntendedFor and a phasediff linked by IntendedFor.
    fmap = root / "sub-04" / "fmap"
    bold = "bids::sub-04/func/sub-04_task-tap_run-2_bold.nii.gz"
    for name in ("sub-04_fieldmap", "sub-04_magnitude", "sub-04_phasediff", "sub-04_magnitude1"):
        write_nifti(fmap / f"{name}.nii.gz", np.ones((4, 6, 3)))
    write_json(fmap / "sub-04_fieldmap.json", {"Units": "Hz", "IntendedFor": bold})
    write_json(fmap / "sub-04_phasediff.json", {"EchoTime1": 0.004, "EchoTime2": 0.006,
                                                "IntendedFor": [bold]})
    ds = index_dataset(root, participant_labels=["04"])
    item = {i.target.name: i for i in plan_subject(ds, "04").items}["sub-04_task-tap_run-2_bold"]
    # Documented priority: the B0FieldSource link beats IntendedFor.
    assert item.source.kind is FieldSourceKind.REVERSED_PE and item.link == "B0FieldSource"
    assert sorted(a[1].kind.value for a in item.alternatives) == ["fieldmap", "phasediff"]
    # Among IntendedFor links, the direct field map beats the phasediff.
    plan = plan_subject(ds, "04", field_source="fieldmap")
    chosen = {i.target.name: i.source.kind for i in plan.items}
    assert chosen == {"sub-04_task-tap_run-2_bold": FieldSourceKind.FIELDMAP}
    # Targets with no source of the chosen kind are reported and skipped.
    assert {name for name, _ in plan.skipped} == {"sub-04_dwi", "sub-04_task-tap_run-1_bold"}
    assert all("no fieldmap field source" in why for _, why in plan.skipped)
    with pytest.raises(EpicorrInputError, match="--field-source"):
        plan_subject(ds, "04", field_source="nonsense")


def test_target_without_field_source_is_reported_not_fatal(tmp_path):
    root = make_layout_dataset(tmp_path / "raw", 1, headers=True)
    write_nifti(root / "sub-01" / "func" / "sub-01_task-other_bold.nii.gz", np.ones((4, 6, 3, 2)))
    write_json(root / "sub-01" / "func" / "sub-01_task-other_bold.json", EPI_META)
    plan = plan_subject(index_dataset(root), "01")
    assert [name for name, _ in plan.skipped] == ["sub-01_task-other_bold"]
    assert "no field source" in plan.skipped[0][1]
    assert len(plan.items) == 3


# -- bad input names the file and the key ------------------------------------
def test_broken_intended_for_names_sidecar_and_key(tmp_path):
    root = make_layout_dataset(tmp_path / "raw", 1, headers=True)
    side = root / "sub-01" / "fmap" / "sub-01_phasediff.json"
    meta = json.loads(side.read_text())
    meta["IntendedFor"] = ["bids::sub-01/func/sub-01_task-nope_bold.nii.gz"]
    write_json(side, meta)
    with pytest.raises(EpicorrInputError) as err:
        plan_subject(index_dataset(root), "01")
    text = str(err.value)
    assert str(side) in text and "IntendedFor" in text and "task-nope" in text


def test_equal_polarity_pair_names_file_and_key(tmp_path):
    root = make_layout_dataset(tmp_path / "raw", 4, headers=True)
    side = root / "sub-04" / "fmap" / "sub-04_dir-PA_epi.json"
    write_json(side, dict(json.loads(side.read_text()), PhaseEncodingDirection="j-"))
    with pytest.raises(EpicorrInputError) as err:
        plan_subject(index_dataset(root), "04")
    assert str(side) in str(err.value) and "PhaseEncodingDirection" in str(err.value)


def test_missing_sidecar_keys_name_file_and_key(tmp_path):
    root = make_layout_dataset(tmp_path / "raw", 1, headers=True)
    side = root / "sub-01" / "fmap" / "sub-01_phasediff.json"
    meta = json.loads(side.read_text())
    del meta["EchoTime2"]
    write_json(side, meta)
    with pytest.raises(EpicorrInputError, match=r"sub-01_phasediff\.json: EchoTime2"):
        plan_subject(index_dataset(root), "01")
    # Timing missing for a target: the error names the sidecar that should hold it.
    root2 = make_layout_dataset(tmp_path / "raw2", 1, headers=True)
    dwi_side = root2 / "sub-01" / "dwi" / "sub-01_dwi.json"
    write_json(dwi_side, {"PhaseEncodingDirection": "j"})
    with pytest.raises(EpicorrInputError, match=r"sub-01_dwi\.json: EffectiveEchoSpacing"):
        plan_subject(index_dataset(root2), "01")


def test_not_a_dataset_and_unknown_subject(tmp_path):
    with pytest.raises(EpicorrInputError, match="dataset_description.json"):
        index_dataset(tmp_path)
    root = make_layout_dataset(tmp_path / "raw", 1)
    with pytest.raises(EpicorrInputError, match="--participant-label"):
        index_dataset(root, participant_labels=["99"])


# -- derivatives naming --------------------------------------------------------
def test_derivative_names_are_the_fixed_ones(tmp_path):
    ds = index_dataset(make_layout_dataset(tmp_path / "raw", 1))
    targets = {t.name: t for t in find_targets(ds, "01")}
    out = tmp_path / "out"
    me = targets["sub-01_task-tap_run-1_bold"]
    names = target_outputs(out, me)
    rel = lambda p: os.path.relpath(p, out)  # noqa: E731
    assert rel(names["field"]) == "sub-01/func/sub-01_task-tap_run-1_desc-field_fieldmap.nii.gz"
    assert [rel(p) for p in names["unwarped"]] == [
        "sub-01/func/sub-01_task-tap_run-1_echo-1_desc-unwarped_bold.nii.gz",
        "sub-01/func/sub-01_task-tap_run-1_echo-2_desc-unwarped_bold.nii.gz",
        "sub-01/func/sub-01_task-tap_run-1_echo-1_desc-unwarped_sbref.nii.gz",
        "sub-01/func/sub-01_task-tap_run-1_echo-2_desc-unwarped_sbref.nii.gz"]
    assert rel(names["dropout"][0]) == "sub-01/func/sub-01_task-tap_run-1_echo-1_desc-dropout_mask.nii.gz"
    dwi = targets["sub-01_dwi"]
    assert rel(output_path(out, dwi, "unwarped")) == "sub-01/dwi/sub-01_desc-unwarped_dwi.nii.gz"
    assert rel(output_path(out, dwi, "displacement")) == "sub-01/dwi/sub-01_desc-displacement_map.nii.gz"
    # Every name parses back to its entities (BIDS file-name structure).
    for key, value in names.items():
        for p in value if isinstance(value, list) else [value]:
            parsed = parse_name(p)
            assert parsed is not None and parsed.entities["sub"] == "01", p
    desc = json.loads(write_dataset_description(out, source_dir=ds.root).read_text())
    # BIDS specification, derivatives dataset_description.json.
    assert desc["DatasetType"] == "derivative"
    assert desc["GeneratedBy"][0]["Name"] == "epicorr"
