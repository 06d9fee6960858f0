"""Shared helpers of the nodes: output paths in the node's folder, atomic saves."""

from __future__ import annotations

import os
from typing import Any

import numpy as np
from nipype.interfaces.base import BaseInterfaceInputSpec, File, traits

__all__ = ["out_path", "save_like", "EpiInputSpec", "metadata_trait", "jsonable"]


def out_path(runtime: Any, name: str) -> str:
    """Absolute path of ``name`` in the node's working folder (``runtime.cwd``)."""
    return os.path.join(runtime.cwd, name)


def save_like(data: np.ndarray, reference_img: Any, runtime: Any, name: str, *,
              dtype: Any = np.float32) -> str:
    """Save ``data`` on ``reference_img``'s header, atomically, in the node folder."""
    from ..io import image_like, save_image_atomic

    path = out_path(runtime, name)
    save_image_atomic(image_like(np.asarray(data), reference_img, dtype=dtype), path)
    return path


def metadata_trait(what: str) -> traits.Dict:
    """A ``Dict`` trait holding a (merged, inherited) BIDS sidecar."""
    return traits.Dict(mandatory=True, desc=f"BIDS sidecar metadata of the {what} (inheritance "
                                            "already applied), e.g. PhaseEncodingDirection, "
                                            "EffectiveEchoSpacing or TotalReadoutTime, EchoTime")


class EpiInputSpec(BaseInterfaceInputSpec):
    """Inputs shared by nodes that need the target EPI's geometry and metadata."""

    reference = File(exists=True, mandatory=True,
                     desc="the target EPI series or a 3-D volume on its grid (NIfTI); defines "
                          "the grid and the phase-encode line count")
    metadata = metadata_trait("target EPI series")
    metadata_file = traits.Str("", usedefault=True,
                               desc="where the metadata came from (a sidecar path), named in "
                                    "error messages")


def jsonable(value: Any) -> Any:
    """``value`` with numpy scalars/arrays and tuples turned into JSON types."""
    if isinstance(value, dict):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return jsonable(value.tolist()) if value.size <= 64 else f"array{value.shape}"
    if isinstance(value, np.generic):
        return jsonable(value.item())
    if isinstance(value, float) and not np.isfinite(value):
        return None
    if value is None or isinstance(value, (str, int, float, bool)):
        return value
    return str(value)
