"""The nodes as an integrator uses them: wired with nipype's own utility nodes, run in parallel,
cached, and each route workflow end to end on tiny synthetic data.

Outside references: the pixel-shift relation d = polarity * field * EES * N
(Jezzard & Balaban 1995) checked on the node's output; nipype's own cache
semantics (a node re-runs only when its inputs' hash changes).
"""

from __future__ import annotations

import os

import nibabel as nib
import numpy as np
import pytest

from bids_synth import TINY_EES, _distorted, make_tiny_study, tiny_phantom, write_nifti

nipype = pytest.importorskip("nipype")
from nipype.interfaces.utility import IdentityInterface, Merge  # noqa: E402
from nipype.pipeline import engine as pe  # noqa: E402
from nipype.interfaces.base import File  # noqa: E402

import epicorr.nodes as nodes  # noqa: E402
from epicorr.errors import EpicorrInputError  # noqa: E402


def _corr(a, b, mask):
    return float(np.corrcoef(a[mask], b[mask])[0, 1])


@pytest.fixture
def tiny_files(tmp_path):
    image, field, mask = tiny_phantom()
    dist = _distorted(image, field, "j")
    mag = image + 0.01 * np.random.default_rng(3).standard_normal(image.shape)
    return {
        "image": image, "field": field, "mask": mask, "dist": dist,
        "fieldmap": str(write_nifti(tmp_path / "in" / "fieldmap.nii.gz", field)),
        "magnitude": str(write_nifti(tmp_path / "in" / "magnitude.nii.gz", mag)),
        "series": str(write_nifti(tmp_path / "in" / "bold.nii.gz",
                                  np.stack([dist, 1.02 * dist], axis=-1))),
        "meta": {"PhaseEncodingDirection": "j", "EffectiveEchoSpacing": TINY_EES, "EchoTime": 0.03},
    }


def _user_workflow(files, base_dir, interpolation="cubic"):
    """An integrator's own workflow: our nodes between nipype's IdentityInterface and Merge."""
    wf = pe.Workflow(name="my_study", base_dir=str(base_dir))
    src = pe.Node(IdentityInterface(fields=["fieldmap", "magnitude", "series"]), name="source")
    src.inputs.fieldmap, src.inputs.magnitude = files["fieldmap"], files["magnitude"]
    src.inputs.series = files["series"]
    est = pe.Node(nodes.HzMapField(metadata={"Units": "Hz"}), name="estimate")
    grid = pe.Node(nodes.FieldToTargetGrid(metadata=files["meta"], rounds=1), name="to_grid")
    disp = pe.Node(nodes.FieldToDisplacement(metadata=files["meta"]), name="displace")
    unw = pe.Node(nodes.UnwarpSeries(interpolation=interpolation), name="unwarp")
    merge = pe.Node(Merge(2), name="collect")
    wf.connect([
        (src, est, [("fieldmap", "fieldmap"), ("magnitude", "magnitude")]),
        (src, grid, [("series", "reference")]),
        (est, grid, [("field", "field"), ("sigma", "sigma"), ("mask", "mask"), ("magnitude", "magnitude")]),
        (src, disp, [("series", "reference")]),
        (grid, disp, [("field", "field")]),
        (src, unw, [("series", "in_file")]),
        (disp, unw, [("displacement", "displacement"), ("pe_direction", "pe_direction")]),
        (unw, merge, [("out_file", "in1")]),
        (disp, merge, [("displacement", "in2")]),
    ])
    return wf


def _result_mtimes(base):
    out = {}
    for root, _, names in os.walk(base):
        for n in names:
            if n.startswith("result_") and n.endswith(".pklz"):
                out[n[len("result_"):-len(".pklz")]] = os.stat(os.path.join(root, n)).st_mtime_ns
    return out


def test_user_workflow_multiproc_corrects_and_caches(tiny_files, tmp_path):
    wf = _user_workflow(tiny_files, tmp_path / "work")
    wf.config["execution"] = {"poll_sleep_duration": "0.1"}
    wf.run(plugin="MultiProc", plugin_args={"n_procs": 2})
    work = tmp_path / "work" / "my_study"
    unwarped = nib.load(str(work / "unwarp" / "unwarped.nii.gz"))
    series = nib.load(tiny_files["series"])
    # Same grid and header as the input series.
    assert unwarped.shape == series.shape
    assert np.allclose(unwarped.affine, series.affine)
    m = tiny_files["mask"]
    before = _corr(tiny_files["dist"], tiny_files["image"], m)
    after = _corr(np.asanyarray(unwarped.dataobj)[..., 0], tiny_files["image"], m)
    assert after > before + 0.02 and after > 0.97, (before, after)
    # Jezzard & Balaban: d = polarity * field * EES * N, N = image size along PE (j).
    field_t = np.asanyarray(nib.load(str(work / "to_grid" / "field_hz.nii.gz")).dataobj)
    disp = np.asanyarray(nib.load(str(work / "displace" / "displacement.nii.gz")).dataobj)
    assert np.allclose(disp, field_t * TINY_EES * series.shape[1], atol=1e-5)

    # Cache: an unchanged re-run does no work.
    first = _result_mtimes(work)
    assert {"estimate", "to_grid", "displace", "unwarp", "collect"} <= set(first)
    _user_workflow(tiny_files, tmp_path / "work").run(plugin="MultiProc", plugin_args={"n_procs": 2})
    assert _result_mtimes(work) == first
    # A changed option re-runs only the node it feeds and what depends on it.
    _user_workflow(tiny_files, tmp_path / "work", interpolation="linear").run(
        plugin="MultiProc", plugin_args={"n_procs": 2})
    third = _result_mtimes(work)
    changed = {k for k in first if third[k] != first[k]}
    assert changed == {"unwarp", "collect"}, changed


def _trait_types(ctrait):
    """The trait type of a trait and of every trait nested in it (lists, multi-objects)."""
    out = [ctrait.trait_type]
    inner = ctrait.inner_traits
    for t in (inner() if callable(inner) else inner) or ():
        out += _trait_types(t)
    for t in getattr(ctrait.trait_type, "inner_traits", lambda: ())() or ():
        out += _trait_types(t)
    return out


def test_every_trait_is_described_and_file_inputs_must_exist():
    for name in nodes.__all__:
        iface = getattr(nodes, name)
        for spec in (iface.input_spec(), iface.output_spec()):
            for tname, trait in spec.traits().items():
                if tname.startswith("trait_") or tname in ("ignore_exception",):
                    continue
                assert trait.desc, f"{name}.{tname} has no desc"
        inputs = iface.input_spec()
        for tname in inputs.copyable_trait_names():
            trait = inputs.trait(tname)
            for t in _trait_types(trait):
                if isinstance(t, File):
                    assert t.exists, f"{name}.{tname}: file input without exists=True"


def test_node_errors_name_the_key(tiny_files, tmp_path):
    node = nodes.FieldToDisplacement(field=tiny_files["fieldmap"], reference=tiny_files["series"],
                                     metadata={"PhaseEncodingDirection": "j"},
                                     metadata_file="sub-01_bold.json")
    with pytest.raises(EpicorrInputError, match=r"sub-01_bold\.json: EffectiveEchoSpacing"):
        node.run(cwd=str(tmp_path))


@pytest.mark.parametrize("subject, kind", [("01", "phasediff"), ("02", "two-phases"),
                                           ("03", "fieldmap"), ("04", "reversed-pe")])
def test_each_route_workflow_improves_the_series(tmp_path, subject, kind):
    from epicorr.bids import index_dataset, plan_subject
    from epicorr.workflows import build_subject_workflow, collect_outputs

    root = make_tiny_study(tmp_path / "raw")
    ds = index_dataset(root, participant_labels=[subject])
    plan = plan_subject(ds, subject)
    wf, outs = build_subject_workflow(ds, plan)
    wf.base_dir = str(tmp_path / "work")
    wf.config["execution"] = {"poll_sleep_duration": "0.1"}
    wf.run(plugin="Linear")
    image, field, mask = tiny_phantom()
    shown = 0
    for item in plan.items:
        assert item.source.kind.value == kind
        res = collect_outputs(wf, outs[item.target.name])
        est = np.asanyarray(nib.load(res["field"]).dataobj)
        rmse = float(np.sqrt(np.mean((est - field)[mask] ** 2)))
        # The tiny phantom's field peaks near 85 Hz; every route must get its shape.
        assert rmse < 12.0, (kind, rmse)
        out = np.asanyarray(nib.load(res["unwarped"][0]).dataobj)
        raw = np.asanyarray(nib.load(str(item.target.files[0].path)).dataobj)
        first = (lambda a: a[..., 0] if a.ndim == 4 else a)
        assert _corr(first(out), image, mask) > _corr(first(raw), image, mask)
        assert len(res["unwarped"]) == len(item.target.files)
        assert len(res["dropout"]) == len(item.target.echoes)
        if "pair_before_native" in res:
            shown += 1
            # Per-polarity means on the pair's grid for the QC page: they agree better unwarped.
            grid = np.asanyarray(nib.load(res["mask_native"]).dataobj) > 0
            brain = np.asanyarray(nib.load(res["pair_brain_native"]).dataobj) > 0
            assert brain.any() and not np.any(brain & ~grid)  # the brain lies inside the head
            before, after = ([np.asanyarray(nib.load(f).dataobj) for f in res[k]]
                             for k in ("pair_before_native", "pair_after_native"))
            assert len(before) == len(after) == 2 and before[0].shape == grid.shape
            assert _corr(*after, grid) > _corr(*before, grid) + 0.05
    # The reversed-PE route gives them once per field source (with its first target).
    assert shown == (1 if kind == "reversed-pe" else 0)
