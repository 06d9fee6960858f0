"""Dropout-model protocol values from a BIDS sidecar.

``EchoTime`` (s) is a BIDS key.  ``SliceThickness`` (mm) is not defined by
the BIDS specification but is commonly carried over from the DICOM header
(DICOM attribute (0018,0050) "Slice Thickness", mm); it is the excited
thickness, which may be smaller than the slice spacing when there is a gap.

Choices (documented behaviour)
------------------------------
* ``EchoTime`` absent: an :class:`~epicorr.errors.EpicorrInputError`
  naming the file and the key.  There is **no fallback**: every dephasing
  term scales with TE and no default would be honest.
* Echo kind: from ``ScanningSequence`` (a BIDS key carrying the DICOM
  attribute (0018,0020): ``"SE"`` spin echo, ``"GR"`` gradient recalled,
  ``"EP"`` echo planar; a list or a ``\\``-separated string).  ``GR`` gives a
  gradient echo, ``SE`` without ``GR`` a spin echo.  Absent or neither: by the
  BIDS suffix (common practice): ``dwi`` and spin-echo field-map ``epi``
  references are spin echoes, ``bold`` and ``sbref`` gradient echoes; the
  choice is recorded in ``sources["echo_kind"]`` (the suffix rule is the
  norm for BIDS data, so it is not listed among the ``fallbacks``).
* ``SliceThickness`` absent: fall back to the voxel size along the slice
  axis and flag it (``sources["slice_thickness_mm"]`` says so and
  ``"SliceThickness"`` is listed in ``fallbacks``).  Callers should copy the
  flag into the output sidecar.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np

from ..errors import EpicorrInputError
from ..options import EchoKind
from ._predict import MAX_ECHO_TIME_S

__all__ = ["DropoutProtocol", "protocol_from_metadata", "echo_kind_from_metadata", "MAX_SLICE_THICKNESS_MM",
           "SPIN_ECHO_SUFFIXES"]

#: Thickest plausible EPI slice, mm (common practice: 1-5 mm; over 20 mm is
#: a unit error or a corrupt sidecar).
MAX_SLICE_THICKNESS_MM = 20.0


@dataclass(frozen=True)
class DropoutProtocol:
    """Echo time and slice thickness for :func:`predict_retained_signal`.

    Attributes
    ----------
    echo_time : float, s
    slice_thickness_mm : float, mm
    sources : dict
        ``{"echo_time": ..., "slice_thickness_mm": ...}``: where each came from.
    fallbacks : tuple of str
        Sidecar keys that were absent and replaced (``("SliceThickness",)`` or ``()``).
    echo_kind : EchoKind
        Spin or gradient echo (see the module notes).
    """

    echo_time: float
    slice_thickness_mm: float
    sources: dict = field(default_factory=dict, compare=False)
    fallbacks: tuple = ()
    echo_kind: EchoKind = EchoKind.GRADIENT_ECHO


def _number(metadata: Mapping[str, Any], key: str, *, file: Any, unit: str, upper: float,
            hint: str) -> float:
    raw = metadata[key]
    if isinstance(raw, (list, tuple)):
        raise EpicorrInputError(f"is a list; one value in {unit} is needed", file=file, key=key,
                                value=raw, hint=hint)
    if isinstance(raw, bool) or not isinstance(raw, (int, float)):
        raise EpicorrInputError(f"must be a number in {unit}", file=file, key=key, value=raw,
                                hint=hint)
    v = float(raw)
    if not (math.isfinite(v) and v > 0):
        raise EpicorrInputError(f"must be a positive, finite number of {unit}", file=file, key=key,
                                value=raw, hint=hint)
    if v > upper:
        raise EpicorrInputError(f"over {upper:g} {unit}, which is not plausible for EPI", file=file,
                                key=key, value=raw, hint=hint)
    return v


#: Spin-echo suffixes when the sidecar does not say (common practice: diffusion
#: EPI and the reversed-PE ``epi`` references are spin echoes).
SPIN_ECHO_SUFFIXES = frozenset({"dwi", "epi"})


def echo_kind_from_metadata(metadata: Mapping[str, Any], *, suffix: str | None = None) -> tuple[EchoKind, str]:
    """Spin or gradient echo, and where that came from (see the module notes)."""
    seq = metadata.get("ScanningSequence")
    tokens: set[str] = set()
    if isinstance(seq, str):
        tokens = {t.strip().upper() for t in seq.replace("\\", " ").replace(",", " ").split()}
    elif isinstance(seq, (list, tuple)):
        tokens = {str(t).strip().upper() for t in seq}
    if "GR" in tokens:
        return EchoKind.GRADIENT_ECHO, "sidecar ScanningSequence (GR)"
    if "SE" in tokens:
        return EchoKind.SPIN_ECHO, "sidecar ScanningSequence (SE)"
    if suffix in SPIN_ECHO_SUFFIXES:
        return EchoKind.SPIN_ECHO, f"BIDS suffix '{suffix}' (fallback: ScanningSequence absent or unclear)"
    return EchoKind.GRADIENT_ECHO, (f"BIDS suffix '{suffix}'" if suffix else "default") + \
        " (fallback: ScanningSequence absent or unclear)"


def protocol_from_metadata(metadata: Mapping[str, Any], *, zooms: Any, slice_axis: int,
                           file: Any = None, suffix: str | None = None) -> DropoutProtocol:
    """Read ``EchoTime`` and ``SliceThickness`` from a sidecar.

    Parameters
    ----------
    metadata : mapping
        The EPI's BIDS sidecar.
    zooms : sequence of 3 floats, mm
        Voxel sizes of the target grid (for the ``SliceThickness`` fallback).
    slice_axis : int
        Array axis of the slices.
    file : optional
        The sidecar's path, for error messages.
    suffix : str, optional
        BIDS suffix of the image (``"bold"``, ``"dwi"``, ...), for the
        echo-kind fallback.

    Returns
    -------
    DropoutProtocol

    Raises
    ------
    EpicorrInputError
        ``EchoTime`` absent (no fallback), or either value not a positive
        number, a list, or implausibly large (TE over 0.5 s or a thickness over
        20 mm, usually a unit error).
    """
    if slice_axis not in (0, 1, 2) or isinstance(slice_axis, bool):
        raise EpicorrInputError("slice axis must be 0, 1 or 2", file=file, key="slice_axis",
                                value=slice_axis)
    sources: dict[str, str] = {}
    if metadata.get("EchoTime") is None:
        raise EpicorrInputError("missing: the dropout prediction needs the echo time", file=file,
                                key="EchoTime",
                                hint="add EchoTime (seconds) to the sidecar, or skip the dropout "
                                     "prediction for this image")
    te = _number(metadata, "EchoTime", file=file, unit="s", upper=MAX_ECHO_TIME_S,
                 hint="BIDS wants seconds (was it written in ms?)")
    sources["echo_time"] = "sidecar EchoTime"
    fallbacks: tuple = ()
    if metadata.get("SliceThickness") is not None:
        dz = _number(metadata, "SliceThickness", file=file, unit="mm", upper=MAX_SLICE_THICKNESS_MM,
                     hint="give the excited slice thickness in mm")
        sources["slice_thickness_mm"] = "sidecar SliceThickness"
    else:
        z = np.asarray(zooms, dtype=np.float64).ravel()
        if z.size != 3 or not np.all(np.isfinite(z)) or z[slice_axis] <= 0:
            raise EpicorrInputError("voxel sizes must be three positive numbers", key="zooms",
                                    value=list(np.asarray(zooms).ravel()))
        dz = float(z[slice_axis])
        sources["slice_thickness_mm"] = ("voxel size along the slice axis "
                                         "(fallback: SliceThickness absent from the sidecar)")
        fallbacks = ("SliceThickness",)
    kind, kind_source = echo_kind_from_metadata(metadata, suffix=suffix)
    sources["echo_kind"] = kind_source
    return DropoutProtocol(echo_time=te, slice_thickness_mm=dz, sources=sources, fallbacks=fallbacks,
                           echo_kind=kind)
