"""Validation and multi-image handling for the reversed phase-encode route.

* one phase-encode axis for all images, both polarities present;
* 3-D images, or 4-D series (several volumes of one direction): the volumes
  are rigidly aligned to the first one (same distortion, so a rigid transform
  is the right model) and averaged;
* one readout scaling (voxels per Hz) per image;
* grids: identical, or reconcilable by resampling onto the first image's grid
  when the phase-encode axes point the same way in world space and the fields
  of view overlap; anything else is an error.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
from scipy import ndimage

from ..errors import EpicorrInputError
from ..geometry import MAX_TOTAL_READOUT_S, PEDirection, parse_pe_direction
from . import _rigid

__all__ = ["PairInputs", "prepare_inputs"]

#: Affines closer than this (mm, per matrix entry) are the same grid (common practice).
_AFFINE_ATOL = 1e-3
#: Smallest fraction of the first grid's voxels another grid must cover (common practice).
_MIN_OVERLAP = 0.5


@dataclass
class PairInputs:
    """Validated inputs: one 3-D volume per image on a common grid."""

    volumes: list
    pe: list
    voxels_per_hz: list
    affine: np.ndarray
    spacing: np.ndarray
    mask: np.ndarray | None
    files: list
    notes: dict = field(default_factory=dict)

    @property
    def pe_axis(self) -> int:
        return self.pe[0].axis


def _name(files, k):
    return None if files is None else files[k]


def _as_list(value, n, what, key):
    if isinstance(value, (list, tuple)):
        if len(value) != n:
            raise EpicorrInputError(f"{len(value)} {what} given for {n} images", key=key,
                                    value=list(value), hint=f"give one {what[:-1]} per image")
        return list(value)
    return [value] * n


def _check_affine(a, file, key="affine"):
    arr = np.asarray(a, dtype=float)
    if arr.shape != (4, 4) or not np.all(np.isfinite(arr)) or abs(np.linalg.det(arr[:3, :3])) < 1e-9:
        raise EpicorrInputError("not a usable 4x4 voxel-to-world affine", file=file, key=key,
                                hint="pass the image's NIfTI affine")
    return arr


def _check_volume(arr, file):
    data = np.asarray(arr)
    if data.ndim not in (3, 4) or min(data.shape) < 1:
        raise EpicorrInputError(f"image must be 3-D or 4-D, got shape {data.shape}", file=file,
                                hint="pass one EPI volume or a series of one direction")
    if not np.issubdtype(data.dtype, np.number) or np.iscomplexobj(data):
        raise EpicorrInputError(f"image data must be real numbers, got {data.dtype}", file=file,
                                hint="pass magnitude images")
    data = data.astype(np.float64)
    finite = np.isfinite(data)
    if not finite.any():
        raise EpicorrInputError("image is all NaN/inf", file=file,
                                hint="check the reconstruction or the conversion to NIfTI")
    n_bad = int(data.size - finite.sum())
    if n_bad:
        data = np.where(finite, data, 0.0)
    vols = data[..., None] if data.ndim == 3 else data
    for t in range(vols.shape[3]):
        v = vols[..., t]
        if not np.any(v != 0):
            raise EpicorrInputError(f"volume {t} is all zero", file=file,
                                    hint="drop empty volumes or check the conversion")
        if float(v.max() - v.min()) <= 0:
            raise EpicorrInputError(f"volume {t} is constant", file=file,
                                    hint="an EPI reference must show anatomy")
    return vols, n_bad


def _series_mean(vols, spacing, file):
    """Rigidly align the volumes of one series to its first one and average them."""
    if vols.shape[3] == 1:
        return vols[..., 0], []
    ref = vols[..., 0]
    acc = ref.copy()
    motion = []
    for t in range(1, vols.shape[3]):
        tx = _rigid.rigid_register(ref, vols[..., t], spacing=spacing, iterations=40)
        motion.append(_rigid.transform_magnitude(tx, ref.shape, spacing))
        acc += _rigid.rigid_resample(vols[..., t], tx, spacing=spacing)
    return acc / vols.shape[3], motion


def _world_pe(affine, axis):
    v = affine[:3, axis]
    return v / np.linalg.norm(v)


def _resample_onto(vol, src_affine, dst_affine, dst_shape, file):
    vox = np.linalg.inv(src_affine) @ dst_affine
    # Coverage: the fraction of destination voxels falling inside the source.
    grid = np.stack(np.meshgrid(*[np.linspace(0, s - 1, min(s, 12)) for s in dst_shape],
                                indexing="ij"), -1).reshape(-1, 3)
    src = grid @ vox[:3, :3].T + vox[:3, 3]
    inside = np.all((src >= -0.5) & (src <= np.array(vol.shape) - 0.5), axis=1).mean()
    if inside < _MIN_OVERLAP:
        raise EpicorrInputError(f"its grid covers only {inside:.0%} of the first image's field of view",
                                file=file, key="affine",
                                hint="the reversed-PE images must image the same slab")
    return ndimage.affine_transform(vol, vox[:3, :3], offset=vox[:3, 3], output_shape=dst_shape,
                                    order=1, mode="nearest")


def prepare_inputs(images: Sequence[Any], *, pe_directions, voxels_per_hz, affine,
                   mask=None, files=None) -> PairInputs:
    """Validate the images of a reversed phase-encode set and bring them to one grid.

    See :func:`epicorr.pair.estimate_field_from_pair` for the parameters.

    Raises
    ------
    EpicorrInputError
        Fewer than two images; one polarity missing; mixed PE axes; bad or
        missing readout scaling; all-NaN, all-zero or constant volumes;
        grids that cannot be reconciled; a mask of the wrong shape.
    """
    if isinstance(images, np.ndarray):
        raise EpicorrInputError("images must be a sequence of arrays (one per image)", key="images",
                                hint="pass [image_a, image_b, ...]")
    images = list(images)
    n = len(images)
    if files is not None:
        files = [str(f) for f in files]
        if len(files) != n:
            raise EpicorrInputError(f"{len(files)} file names given for {n} images", key="files")
    if n < 2:
        raise EpicorrInputError(f"{n} image(s) given; a reversed phase-encode set needs at least two",
                                key="images", hint="pass images of both phase-encode polarities")
    pes_raw = _as_list(pe_directions, n, "directions", "PhaseEncodingDirection")
    pes = [parse_pe_direction(p, file=_name(files, k)) for k, p in enumerate(pes_raw)]
    vphs = _as_list(voxels_per_hz, n, "readout scalings", "voxels_per_hz")
    for k, v in enumerate(vphs):
        if v is None:
            raise EpicorrInputError("readout scaling missing (neither TotalReadoutTime nor "
                                    "EffectiveEchoSpacing known)", file=_name(files, k),
                                    key="TotalReadoutTime",
                                    hint="add TotalReadoutTime or EffectiveEchoSpacing (s) to the sidecar")
        if isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer)) \
                or not np.isfinite(v) or v <= 0 or v > 2 * MAX_TOTAL_READOUT_S:
            raise EpicorrInputError("voxels per Hz must be a positive number of seconds "
                                    f"(echo spacing x PE lines), at most {2 * MAX_TOTAL_READOUT_S:g}",
                                    file=_name(files, k), key="voxels_per_hz", value=v,
                                    hint="derive it with epicorr.geometry.readout_timing")
    axes = {p.axis for p in pes}
    if len(axes) != 1:
        raise EpicorrInputError("the images have different phase-encode axes",
                                key="PhaseEncodingDirection", value=[p.bids for p in pes],
                                hint="a reversed set shares one axis with opposite polarities")
    pols = {p.polarity for p in pes}
    if pols != {1, -1}:
        raise EpicorrInputError("all images have the same phase-encode polarity "
                                f"({pes[0].bids}); the field needs both", key="PhaseEncodingDirection",
                                value=[p.bids for p in pes],
                                hint=f"add an image acquired with {pes[0].reversed().bids}")
    affines = affine if (isinstance(affine, (list, tuple)) and len(affine) == n
                         and np.asarray(affine[0]).shape == (4, 4)) else [affine] * n
    affines = [_check_affine(a, _name(files, k)) for k, a in enumerate(affines)]
    ref_aff = affines[0]
    spacing = np.linalg.norm(ref_aff[:3, :3], axis=0)

    volumes, notes = [], {"nonfinite_voxels": [], "series_motion_mm": [], "resampled": []}
    ref_shape = None
    for k, img in enumerate(images):
        vols, n_bad = _check_volume(img, _name(files, k))
        notes["nonfinite_voxels"].append(n_bad)
        if ref_shape is None:
            ref_shape = vols.shape[:3]
            if ref_shape[pes[0].axis] < 4:
                raise EpicorrInputError(f"only {ref_shape[pes[0].axis]} voxels along the phase-encode "
                                        "axis", file=_name(files, k), key="PhaseEncodingDirection",
                                        value=pes[0].bids, hint="check the axis against the image shape")
        vol, motion = _series_mean(vols, np.linalg.norm(affines[k][:3, :3], axis=0), _name(files, k))
        notes["series_motion_mm"].append(motion)
        same_grid = vols.shape[:3] == ref_shape and np.allclose(affines[k], ref_aff, atol=_AFFINE_ATOL)
        if not same_grid:
            cos = abs(float(_world_pe(affines[k], pes[k].axis) @ _world_pe(ref_aff, pes[0].axis)))
            if cos < 0.99:
                raise EpicorrInputError(
                    "its grid differs from the first image's and its phase-encode axis points "
                    f"another way in world space (cos {cos:.3f})", file=_name(files, k), key="affine",
                    hint="acquire or reslice the reversed-PE images on one grid")
            vol = _resample_onto(vol, affines[k], ref_aff, ref_shape, _name(files, k))
            notes["resampled"].append(k)
        volumes.append(vol)
    if mask is not None:
        mask = np.asarray(mask)
        if mask.shape != ref_shape:
            raise EpicorrInputError(f"mask shape {mask.shape} differs from the image shape {ref_shape}",
                                    key="mask", hint="pass a mask on the pair's grid")
        mask = mask.astype(bool)
        if not mask.any():
            raise EpicorrInputError("mask is empty", key="mask", hint="pass a brain mask or None")
    return PairInputs(volumes=volumes, pe=pes, voxels_per_hz=[float(v) for v in vphs],
                      affine=ref_aff, spacing=spacing, mask=mask, files=files or [None] * n,
                      notes=notes)
