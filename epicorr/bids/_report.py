"""QC pages of a BIDS run: fill the report model from the exported derivatives."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Mapping

import numpy as np

__all__ = ["write_subject_report", "write_batch_index", "KIND_LABELS"]

KIND_LABELS = {"phasediff": "phase difference (dual-echo gradient echo)",
               "two-phases": "two phase images (dual-echo gradient echo)",
               "fieldmap": "direct field map", "reversed-pe": "reversed phase-encode pair"}


def _vol(path, index: int = 0) -> np.ndarray:
    import nibabel as nib

    img = nib.load(str(path))
    data = img.dataobj
    arr = np.asanyarray(data[..., index] if len(img.shape) == 4 else data, dtype=np.float64)
    return arr


def _pair_views(pair: Mapping[str, Any] | None) -> dict:
    """TargetReport fields for the reversed-PE figure, drawn on the pair's own grid."""
    import nibabel as nib

    if not pair:
        return {}
    codes = list((pair.get("field_info") or {}).get("pe") or [])
    plus = next((c for c in codes if not c.endswith("-")), "PE +")
    minus = next((c for c in codes if c.endswith("-")), "PE -")
    out = dict(pair_before=tuple(_vol(f) for f in pair["pair_before_native"]),
               pair_after=tuple(_vol(f) for f in pair["pair_after_native"]),
               pair_affine=nib.load(str(pair["pair_before_native"][0])).affine,
               pair_labels=(f"{plus} (mean)", f"{minus} (mean)"))
    if pair.get("pair_brain_native"):
        out["pair_mask"] = _vol(pair["pair_brain_native"]) > 0
    elif pair.get("mask_native"):
        out["pair_mask"] = _vol(pair["mask_native"]) > 0
        out["pair_mask_label"] = "the field-estimation mask"
    if codes and codes[0][:1] in ("i", "j", "k"):
        out["pair_pe_axis"] = "ijk".index(codes[0][0])
    return out


def _target_report(item, results: Mapping[str, Any], written: Mapping[str, Any],
                   pair: Mapping[str, Any] | None = None):
    import nibabel as nib

    from ..geometry import parse_pe_direction
    from ..qcmetrics import Metric
    from ..report import AcquisitionParam, TargetReport

    target = item.target
    ref_idx = list(target.files).index(target.reference)
    after = _vol(written["unwarped"][ref_idx])
    ref_img = nib.load(str(results["reference"]))
    metrics = [Metric(**row) for row in json.loads(Path(results["qc_metrics"]).read_text())]
    for m in metrics:
        if m.value is None:
            m.value = float("nan")
    disp = results.get("displacement_info") or {}
    sources = disp.get("TimingSources") or {}
    pe = parse_pe_direction(results["pe_direction"])
    acq = [AcquisitionParam("Phase-encode direction", f"{pe.bids} (axis {'ijk'[pe.axis]}, polarity "
                            f"{pe.polarity:+d})", "sidecar PhaseEncodingDirection"),
           AcquisitionParam("Effective echo spacing", f"{1e3 * disp.get('EffectiveEchoSpacing', 0):.3f} ms",
                            sources.get("effective_echo_spacing", "")),
           AcquisitionParam("Phase-encode lines", str(disp.get("N_PE")), sources.get("n_pe", "")),
           AcquisitionParam("Total readout time", f"{1e3 * disp.get('TotalReadoutTime', 0):.2f} ms",
                            "derived: EffectiveEchoSpacing x (N - 1)")]
    info = (results.get("dropout_info") or [{}])[0] or {}
    if info.get("EchoTime") is not None:
        src = (info.get("ProtocolSources") or {}).get("echo_time", "")
        acq.append(AcquisitionParam("Echo time", f"{1e3 * info['EchoTime']:.1f} ms", src))
    field_info = results.get("field_info") or {}
    te = field_info.get("echo_times_s")
    if te:
        acq.append(AcquisitionParam("Field-map echo times", " / ".join(f"{1e3 * t:.2f}" for t in te)
                                    + " ms", "sidecar"))
    return TargetReport(
        name=target.name, method=KIND_LABELS[item.source.kind.value] + f" ({item.source.name})",
        pe=pe, voxel_size_mm=[float(z) for z in ref_img.header.get_zooms()[:3]],
        reference_before=np.asanyarray(ref_img.dataobj, dtype=np.float64), reference_after=after,
        field_hz=_vol(written["field"]), displacement_vox=_vol(written["displacement"]),
        metrics=metrics, brain_mask=_vol(written.get("brain") or results["mask"]) > 0,
        affine=ref_img.affine,
        dropout_mask=_vol(written["dropout"][0]) > 0, retained_signal=_vol(written["retained"][0]),
        uncertainty=_vol(written["uncertainty"]), acquisition=acq,
        notes=[f"field source linked by {item.link}"], **_pair_views(pair))


def write_subject_report(out_dir, subject: str, exported: Mapping[str, tuple], *,
                         skipped=(), command_line: str = "") -> Path:
    """Write ``OUTPUT_DIR/qc/sub-<L>.html`` from the exported targets."""
    from ..report import SubjectReport, write_subject_page

    # The reversed-PE route gives its per-polarity images once per field source (with
    # the source's first target); every target of that source shows them.
    pairs = {id(item.source): results for item, results, _ in exported.values()
             if results.get("pair_before_native") and results.get("pair_after_native")}
    targets = [_target_report(item, results, written, pairs.get(id(item.source)))
               for item, results, written in exported.values()]
    report = SubjectReport(subject=subject, targets=targets, command_line=command_line,
                           failed_targets=[(name, f"skipped: {why}") for name, why in skipped])
    return write_subject_page(Path(out_dir) / "qc" / f"sub-{subject}.html", report)


def write_batch_index(out_dir, outcomes, *, command_line: str = "") -> Path:
    """Write ``OUTPUT_DIR/qc/index.html``: a row per corrected target, failed subjects listed."""
    from ..qcmetrics import Metric
    from ..report import IndexFailure, IndexRow, write_index

    rows, failures = [], []
    for o in outcomes:
        if not o.ok:
            failures.append(IndexFailure(subject=f"sub-{o.subject}", message=o.message,
                                         href=f"../logs/sub-{o.subject}.log"))
            continue
        for n, name in enumerate(o.targets):
            metrics_file = Path(out_dir) / "qc" / f"sub-{o.subject}" / f"{name}_metrics.json"
            metrics = []
            if metrics_file.is_file():
                metrics = [Metric(**row) for row in json.loads(metrics_file.read_text())]
                for m in metrics:
                    if m.value is None:
                        m.value = float("nan")
            rows.append(IndexRow(subject=f"sub-{o.subject}", target=name, metrics=metrics,
                                 href=f"sub-{o.subject}.html#target-{n}"))
        for name, why in o.skipped:
            failures.append(IndexFailure(subject=f"sub-{o.subject}", target=name,
                                         message=f"skipped: {why}", href=f"sub-{o.subject}.html"))
    return write_index(Path(out_dir) / "qc" / "index.html", rows, failures, command_line=command_line)
