"""Nodes: field (Hz) to displacement (voxels), and unwarping a series."""

from __future__ import annotations

import numpy as np
from nipype.interfaces.base import (BaseInterfaceInputSpec, File, SimpleInterface, TraitedSpec,
                                    traits)

from ..options import Interpolation
from ._base import EpiInputSpec, out_path, save_like

__all__ = ["FieldToDisplacement", "UnwarpSeries"]


class _FieldToDisplacementInputSpec(EpiInputSpec):
    field = File(exists=True, mandatory=True,
                 desc="field map in Hz on the target's grid (undistorted space), 3-D NIfTI")


class _FieldToDisplacementOutputSpec(TraitedSpec):
    displacement = File(exists=True, desc="displacement along the phase-encode axis in voxels "
                                          "(undistorted space), float32 NIfTI on the target grid")
    pe_direction = traits.Str(desc="BIDS PhaseEncodingDirection used (i, i-, j, j-, k, k-)")
    info = traits.Dict(desc="parameters used: PhaseEncodingDirection, EffectiveEchoSpacing, "
                            "N_PE, VoxelsPerHz, where each came from, voxel size along PE (mm)")


class FieldToDisplacement(SimpleInterface):
    """Field (Hz) to signed displacement (voxels): ``d = polarity * field * EES * N``.

    Calls :func:`epicorr.displacement.field_to_displacement` with the readout
    timing of :func:`epicorr.geometry.readout_timing`.
    """

    input_spec = _FieldToDisplacementInputSpec
    output_spec = _FieldToDisplacementOutputSpec

    def _run_interface(self, runtime):
        from ..displacement import field_to_displacement
        from ..errors import EpicorrInputError
        from ..geometry import parse_pe_direction, readout_timing
        from ..io import load_image

        meta = dict(self.inputs.metadata)
        where = self.inputs.metadata_file or None
        ref = load_image(self.inputs.reference, name="target EPI", check_data=False)
        field_img = load_image(self.inputs.field, allowed_ndim=(3,), name="field map")
        if tuple(field_img.shape[:3]) != tuple(ref.shape[:3]):
            raise EpicorrInputError("field map grid does not match the target", file=self.inputs.field,
                                    key="shape", value=tuple(field_img.shape),
                                    hint=f"bring it onto the target grid {tuple(ref.shape[:3])} first")
        pe = parse_pe_direction(meta.get("PhaseEncodingDirection"), file=where)
        timing = readout_timing(meta, n_pe_image=int(ref.shape[pe.axis]), file=where)
        try:
            disp = field_to_displacement(np.asanyarray(field_img.dataobj, dtype=np.float64), pe=pe,
                                         voxels_per_hz=timing.voxels_per_hz)
        except EpicorrInputError as err:
            raise err.with_file(self.inputs.field) from None
        self._results["displacement"] = save_like(disp, field_img, runtime, "displacement.nii.gz")
        self._results["pe_direction"] = pe.bids
        self._results["info"] = {
            "PhaseEncodingDirection": pe.bids,
            "EffectiveEchoSpacing": timing.effective_echo_spacing,
            "N_PE": timing.n_pe,
            "VoxelsPerHz": timing.voxels_per_hz,
            "TotalReadoutTime": timing.total_readout_time,
            "TimingSources": dict(timing.sources),
            "VoxelSizePE_mm": float(ref.header.get_zooms()[pe.axis]),
        }
        return runtime


class _UnwarpInputSpec(BaseInterfaceInputSpec):
    in_file = File(exists=True, mandatory=True, desc="distorted EPI series, 3-D or 4-D NIfTI")
    displacement = File(exists=True, mandatory=True,
                        desc="displacement in voxels along the PE axis on the series' grid (3-D)")
    pe_direction = traits.Enum("i", "i-", "j", "j-", "k", "k-", mandatory=True,
                               desc="BIDS PhaseEncodingDirection of the series")
    interpolation = traits.Enum(*[m.value for m in Interpolation], usedefault=True,
                                desc="1-D interpolation along PE: cubic B-spline (default) or linear")
    jacobian = traits.Bool(True, usedefault=True,
                           desc="apply the Jacobian intensity modulation 1 + dd/dy")
    out_name = traits.Str("unwarped.nii.gz", usedefault=True, desc="output file name")


class _UnwarpOutputSpec(TraitedSpec):
    out_file = File(exists=True, desc="corrected series, float32, same shape and header as the input")


class UnwarpSeries(SimpleInterface):
    """Unwarp every volume along PE (:func:`epicorr.unwarp.unwarp`)."""

    input_spec = _UnwarpInputSpec
    output_spec = _UnwarpOutputSpec

    def _run_interface(self, runtime):
        from ..errors import EpicorrInputError
        from ..geometry import parse_pe_direction
        from ..io import image_like, load_image, save_image_atomic
        from ..unwarp import unwarp

        img = load_image(self.inputs.in_file, name="EPI series")
        disp_img = load_image(self.inputs.displacement, allowed_ndim=(3,), name="displacement")
        if tuple(disp_img.shape) != tuple(img.shape[:3]):
            raise EpicorrInputError("displacement grid does not match the series",
                                    file=self.inputs.displacement, key="shape",
                                    value=tuple(disp_img.shape),
                                    hint=f"expected {tuple(img.shape[:3])}")
        pe = parse_pe_direction(self.inputs.pe_direction)
        data = unwarp(img.dataobj, np.asanyarray(disp_img.dataobj, dtype=np.float64),
                      pe_axis=pe.axis, interpolation=self.inputs.interpolation,
                      jacobian=bool(self.inputs.jacobian))
        path = out_path(runtime, self.inputs.out_name)
        save_image_atomic(image_like(data, img), path)
        self._results["out_file"] = path
        return runtime
