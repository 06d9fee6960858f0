"""Write a finished target's results as BIDS derivatives (and its QC page data).

Files are copied from the workflow's working folders to the names of
:mod:`._derivatives`, each through a temporary file in the destination folder
and ``os.replace``; every image gets a JSON sidecar with ``Sources``,
``Units`` where it has one, and the parameters used.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Mapping

from ..errors import EpicorrInputError
from ..io import copy_file_atomic
from ._derivatives import bids_uri, output_path, sidecar_for
from ._layout import BidsDataset
from ._plan import PlanItem

__all__ = ["export_target", "atomic_copy"]

#: Sidecar keys of the raw series not carried to derivatives (they point at raw files).
_DROP_KEYS = {"IntendedFor", "B0FieldSource", "B0FieldIdentifier"}


def atomic_copy(src: str | os.PathLike, dst: str | os.PathLike) -> Path:
    """Copy ``src`` to ``dst`` through a temporary file in ``dst``'s folder (:func:`epicorr.io.copy_file_atomic`)."""
    dst = Path(dst)
    try:
        dst.parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise EpicorrInputError(f"cannot create the output folder ({err.strerror or err})",
                                file=dst.parent, hint="choose a writable output folder") from err
    return copy_file_atomic(src, dst)


def _json(path: Path) -> Path:
    name = path.name
    for ext in (".nii.gz", ".nii"):
        if name.endswith(ext):
            return path.with_name(name[: -len(ext)] + ".json")
    return path.with_suffix(".json")


def export_target(out_dir: str | os.PathLike, ds: BidsDataset, item: PlanItem,
                  results: Mapping[str, Any], *, options: Mapping[str, Any]) -> dict[str, Any]:
    """Write one target's derivatives.

    Parameters
    ----------
    out_dir : path
        The derivatives folder (``OUTPUT_DIR``).
    ds : BidsDataset
        The raw dataset.
    item : PlanItem
        The target and its field source.
    results : mapping
        The route's ``outputnode`` values (:func:`epicorr.workflows.collect_outputs`).
    options : mapping
        Run options recorded in every sidecar (interpolation, jacobian, ...).

    Returns
    -------
    dict
        Output kind -> written path (lists for per-file outputs).
    """
    from ..io import save_json_atomic

    target, source = item.target, item.source
    out: dict[str, Any] = {}
    field_sources = [bids_uri(f) for f in sorted(source.files.values(), key=lambda f: f.relpath)]
    ref_uri = bids_uri(target.reference)
    common = {"FieldSourceKind": source.kind.value, "FieldSourceLink": item.link,
              "FieldSourceName": source.name, **dict(options)}

    def write(kind: str, src: str, *, file=None, sources, parameters, extra=None) -> Path:
        dst = output_path(out_dir, target, kind, file=file)
        atomic_copy(src, dst)
        save_json_atomic(sidecar_for(kind, sources=sources, parameters=parameters, extra=extra),
                         _json(dst))
        return dst

    reg = {"Registration": results.get("registration_info"),
           "RegistrationQuality": results.get("registration_quality")}
    out["field"] = write("field", results["field"], sources=field_sources + [ref_uri],
                         parameters={**common, "Estimator": results.get("field_info"), **reg},
                         extra={"Description": "B0 field offset on the target grid, undistorted space"})
    field_uri = f"bids::{Path(out['field']).relative_to(out_dir).as_posix()}"
    out["uncertainty"] = write("uncertainty", results["sigma"], sources=field_sources + [ref_uri],
                               parameters=common,
                               extra={"Description": "standard deviation of the field map"})
    if results.get("brain_mask"):
        out["brain"] = write("brain", results["brain_mask"], sources=[bids_uri(target.first)],
                             parameters=common,
                             extra={"Description": "brain mask of the first corrected series inside "
                                                   "the field's measurement mask; the in-brain QC "
                                                   "figures and dropout volumes use it"})
    disp_info = dict(results.get("displacement_info") or {})
    out["displacement"] = write(
        "displacement", results["displacement"], sources=[field_uri, bids_uri(target.first)],
        parameters={**common, **disp_info},
        extra={"Description": "displacement along the phase-encode axis in undistorted space: "
                              "signal from voxel y appears at y + d(y); multiply by "
                              "VoxelSizePE_mm for millimetres",
               "PhaseEncodingDirection": results.get("pe_direction"),
               "VoxelSizePE_mm": disp_info.get("VoxelSizePE_mm")})
    disp_uri = f"bids::{Path(out['displacement']).relative_to(out_dir).as_posix()}"
    out["unwarped"] = []
    for f, src in zip(target.files, results["unwarped"]):
        meta = {k: v for k, v in ds.metadata(f).items() if k not in _DROP_KEYS}
        dst = write("unwarped", src, file=f, sources=[bids_uri(f), disp_uri],
                    parameters={**common, **disp_info}, extra=meta)
        out["unwarped"].append(dst)
        if f.suffix == "dwi":
            for ext, table in ((".bval", target.bval), (".bvec", target.bvec)):
                if table is not None:
                    atomic_copy(table, output_path(out_dir, target, "unwarped", file=f, extension=ext))
    out["dropout"], out["retained"] = [], []
    infos = list(results.get("dropout_info") or [{}] * len(target.echoes))
    for f, mask, kept, info in zip(target.echoes, results["dropout"], results["retained"], infos):
        params = {**common, **(info or {})}
        out["retained"].append(write("retained", kept, file=f, sources=[field_uri, bids_uri(f)],
                                     parameters=params,
                                     extra={"Description": "predicted fraction of signal kept "
                                                           "after intra-voxel dephasing"}))
        out["dropout"].append(write("dropout", mask, file=f, sources=[field_uri, bids_uri(f)],
                                    parameters=params,
                                    extra={"Description": "predicted dropout: retained signal "
                                                          f"below {params.get('Threshold', 0.5)} "
                                                          "of its no-field value"}))
    if results.get("qc_metrics"):
        out["qc_metrics"] = atomic_copy(results["qc_metrics"], Path(out_dir) / "qc" /
                                        f"sub-{target.subject}" / f"{target.name}_metrics.json")
    return out
