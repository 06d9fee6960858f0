"""Names and descriptions of the BIDS derivatives epicorr writes.

Under ``OUTPUT_DIR/sub-<L>/[ses-<S>/]<datatype>/``, with ``<ent>`` the target's
name without its suffix (``echo-<n>`` dropped for outputs the echoes share):

=================  ===============================================  =========  ==========
output             file name                                        per echo   units
=================  ===============================================  =========  ==========
``unwarped``       ``<ent>_desc-unwarped_<suffix>.nii.gz``          yes        as input
``field``          ``<ent>_desc-field_fieldmap.nii.gz``             no         Hz
``displacement``   ``<ent>_desc-displacement_map.nii.gz``           no         voxel
``uncertainty``    ``<ent>_desc-fielduncertainty_map.nii.gz``       no         Hz
``dropout``        ``<ent>_desc-dropout_mask.nii.gz``               yes        (0/1)
``retained``       ``<ent>_desc-retainedsignal_map.nii.gz``         yes        fraction
``brain``          ``<ent>_desc-brain_mask.nii.gz``                 no         (0/1)
=================  ===============================================  =========  ==========

Each has a JSON sidecar beside it (``Sources``, ``Units`` and the parameters
used).  ``dataset_description.json`` follows BIDS specification,
"Derivatives: dataset_description.json" (``DatasetType: derivative``,
``GeneratedBy``).
"""

from __future__ import annotations

import json
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

from .._version import __version__
from ._entities import build_name
from ._layout import BidsFile
from ._targets import Target

__all__ = ["OUTPUTS", "OutputSpec", "output_path", "target_outputs", "write_dataset_description",
           "bids_uri", "DERIVATIVE_NAME", "sidecar_for"]

DERIVATIVE_NAME = "epicorr"


@dataclass(frozen=True)
class OutputSpec:
    """How one kind of output is named."""

    desc: str
    suffix: str | None  #: ``None``: the target's own suffix
    per_echo: bool
    units: str | None


OUTPUTS: dict[str, OutputSpec] = {
    "unwarped": OutputSpec("unwarped", None, True, None),
    "field": OutputSpec("field", "fieldmap", False, "Hz"),
    "displacement": OutputSpec("displacement", "map", False, "voxel"),
    "uncertainty": OutputSpec("fielduncertainty", "map", False, "Hz"),
    "dropout": OutputSpec("dropout", "mask", True, None),
    "retained": OutputSpec("retainedsignal", "map", True, "fraction"),
    "brain": OutputSpec("brain", "mask", False, None),
}


def _folder(out_dir: Path, f: BidsFile) -> Path:
    return Path(out_dir) / f.folder


def output_path(out_dir: str | os.PathLike, target: Target, kind: str, *,
                file: BidsFile | None = None, extension: str = ".nii.gz") -> Path:
    """Path of one output.

    Parameters
    ----------
    kind : str
        A key of :data:`OUTPUTS`.
    file : BidsFile, optional
        For per-echo outputs, which of the target's files (default: the first echo).
    """
    spec = OUTPUTS[kind]
    src = file if file is not None else target.first
    if spec.per_echo:
        ents = dict(src.entities)
        suffix = spec.suffix or src.suffix
    else:
        ents = target.group_entities
        suffix = spec.suffix or target.suffix
    ents["desc"] = spec.desc
    return _folder(Path(out_dir), src) / build_name(ents, suffix, extension)


def target_outputs(out_dir: str | os.PathLike, target: Target) -> dict[str, Any]:
    """Every output path of a target.

    Returns
    -------
    dict
        ``unwarped``: list (one per file of :attr:`Target.files`);
        ``dropout``, ``retained``: lists (one per echo of the primary series);
        ``field``, ``displacement``, ``uncertainty``: single paths.
    """
    out = {k: output_path(out_dir, target, k) for k, s in OUTPUTS.items() if not s.per_echo}
    out["unwarped"] = [output_path(out_dir, target, "unwarped", file=f) for f in target.files]
    for k in ("dropout", "retained"):
        out[k] = [output_path(out_dir, target, k, file=f) for f in target.echoes]
    return out


def bids_uri(f: BidsFile | str) -> str:
    """``bids:raw:<relpath>`` for a source file (BIDS URI into the raw dataset link)."""
    rel = f.relpath if isinstance(f, BidsFile) else str(f)
    return f"bids:raw:{rel}"


def write_dataset_description(out_dir: str | os.PathLike, *, source_dir: str | os.PathLike,
                              command: list[str] | None = None) -> Path:
    """Write ``OUTPUT_DIR/dataset_description.json`` (atomically); returns its path."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    src_name = "raw"
    try:
        with open(Path(source_dir) / "dataset_description.json", encoding="utf-8") as fh:
            src_name = str(json.load(fh).get("Name") or "raw")
    except (OSError, ValueError):
        pass
    desc = {
        "Name": f"epicorr distortion correction of {src_name}",
        "BIDSVersion": "1.9.0",
        "DatasetType": "derivative",
        "GeneratedBy": [{
            "Name": DERIVATIVE_NAME,
            "Version": __version__,
            "Description": "Susceptibility-distortion correction of EPI series "
                           "(research software, not a medical device).",
            "CodeURL": "https://example.org/epicorr",
        }],
        "SourceDatasets": [{"URL": Path(source_dir).resolve().as_uri()}],
        "DatasetLinks": {"raw": Path(source_dir).resolve().as_uri()},
    }
    if command:
        desc["GeneratedBy"][0]["CommandLine"] = " ".join(command)
    path = out_dir / "dataset_description.json"
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    tmp.write_text(json.dumps(desc, indent=2) + "\n", encoding="utf-8")
    os.replace(tmp, path)
    return path


def python_version() -> str:  # pragma: no cover - trivial
    return sys.version.split()[0]


def sidecar_for(kind: str, *, sources: list[str], parameters: Mapping[str, Any] | None = None,
                extra: Mapping[str, Any] | None = None) -> dict:
    """The JSON sidecar content of an output: ``Sources``, ``Units`` and parameters."""
    spec = OUTPUTS[kind]
    side: dict[str, Any] = {"Sources": list(sources)}
    if spec.units is not None:
        side["Units"] = spec.units
    if extra:
        side.update(extra)
    side["Parameters"] = dict(parameters or {})
    side["SoftwareVersion"] = f"epicorr {__version__}"
    return side
