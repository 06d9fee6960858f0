"""Node: predict the retained signal and the dropout mask of one echo."""

from __future__ import annotations

import numpy as np
from nipype.interfaces.base import File, SimpleInterface, TraitedSpec, isdefined, traits

from ..options import SliceProfile
from ._base import EpiInputSpec, jsonable, save_like

__all__ = ["PredictDropout"]


class _DropoutInputSpec(EpiInputSpec):
    field = File(exists=True, mandatory=True, desc="field in Hz on the target grid (undistorted)")
    brain_mask = File(exists=True, desc="trusted-field mask on the target grid (nonzero = inside)")
    threshold = traits.Range(0.0, 1.0, 0.5, usedefault=True,
                             desc="dropout where the retained fraction is below this (0.5: a "
                                  "project choice, no published threshold)")
    profile = traits.Enum(*[m.value for m in SliceProfile], usedefault=True,
                          desc="slice-excitation profile of the through-plane model")
    out_prefix = traits.Str("", usedefault=True, desc="prefix of the output file names (e.g. echo-1_)")


class _DropoutOutputSpec(TraitedSpec):
    retained = File(exists=True, desc="predicted retained signal fraction 0..1 (float32)")
    mask = File(exists=True, desc="dropout mask (uint8 0/1): retained fraction below the threshold")
    info = traits.Dict(desc="protocol used (EchoTime, SliceThickness, their sources and fallbacks), "
                            "model details")


def _bids_suffix(path) -> str | None:
    """``bold`` for ``sub-01_task-a_bold.nii.gz``; None when the name has no ``_``."""
    name = str(path).rsplit("/", 1)[-1].split(".", 1)[0]
    return name.rsplit("_", 1)[1] if "_" in name else None


class PredictDropout(SimpleInterface):
    """Retained signal after intra-voxel dephasing (:func:`epicorr.dropout.predict_retained_signal`)."""

    input_spec = _DropoutInputSpec
    output_spec = _DropoutOutputSpec

    def _run_interface(self, runtime):
        from ..dropout import predict_retained_signal, protocol_from_metadata
        from ..geometry import parse_pe_direction, readout_timing
        from ..io import load_image

        meta = dict(self.inputs.metadata)
        where = self.inputs.metadata_file or self.inputs.reference
        ref = load_image(self.inputs.reference, name="target EPI", check_data=False)
        fimg = load_image(self.inputs.field, allowed_ndim=(3,), name="field map")
        pe = parse_pe_direction(meta.get("PhaseEncodingDirection"), file=where)
        timing = readout_timing(meta, n_pe_image=int(ref.shape[pe.axis]), file=where)
        slice_axis = 2
        sed = meta.get("SliceEncodingDirection")
        if isinstance(sed, str) and sed[:1] in "ijk" and sed:
            slice_axis = "ijk".index(sed[0])
        zooms = [float(z) for z in fimg.header.get_zooms()[:3]]
        protocol = protocol_from_metadata(meta, zooms=zooms, slice_axis=slice_axis, file=where,
                                          suffix=_bids_suffix(self.inputs.reference))
        mask = None
        if isdefined(self.inputs.brain_mask):
            mimg = load_image(self.inputs.brain_mask, allowed_ndim=(3,), name="brain mask")
            mask = np.asanyarray(mimg.dataobj) > 0
        pred = predict_retained_signal(
            np.asanyarray(fimg.dataobj, dtype=np.float64), affine=fimg.affine, pe=pe,
            effective_echo_spacing=timing.effective_echo_spacing, n_pe=timing.n_pe,
            echo_time=protocol.echo_time, slice_axis=slice_axis,
            slice_thickness_mm=protocol.slice_thickness_mm, profile=self.inputs.profile,
            brain_mask=mask, threshold=float(self.inputs.threshold), echo_kind=protocol.echo_kind,
            sources=protocol.sources)
        pre = self.inputs.out_prefix
        self._results["retained"] = save_like(np.nan_to_num(pred.retained, nan=0.0), fimg, runtime,
                                              f"{pre}retained.nii.gz")
        self._results["mask"] = save_like(pred.mask.astype(np.uint8), fimg, runtime,
                                          f"{pre}dropout_mask.nii.gz", dtype=np.uint8)
        info = dict(pred.info)
        info.update({"EchoTime": protocol.echo_time, "SliceThickness": protocol.slice_thickness_mm,
                     "EchoKind": protocol.echo_kind.value,
                     "ProtocolSources": dict(protocol.sources), "Fallbacks": list(protocol.fallbacks),
                     "Threshold": float(self.inputs.threshold), "SliceProfile": self.inputs.profile,
                     "SliceAxis": "ijk"[slice_axis]})
        self._results["info"] = jsonable(info)
        return runtime
