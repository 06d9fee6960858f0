"""Node: QC metrics of one corrected target (written as JSON)."""

from __future__ import annotations

import dataclasses
import json

import numpy as np
from nipype.interfaces.base import (BaseInterfaceInputSpec, File, SimpleInterface, TraitedSpec,
                                    traits)

from ._base import out_path, save_like

__all__ = ["QCMetrics", "EpiBrainMask"]


class _QCMetricsInputSpec(BaseInterfaceInputSpec):
    field = File(exists=True, mandatory=True, desc="field in Hz on the target grid (3-D NIfTI)")
    displacement = File(exists=True, mandatory=True,
                        desc="PE displacement in voxels on the target grid (3-D NIfTI)")
    pe_direction = traits.Enum("i", "i-", "j", "j-", "k", "k-", mandatory=True,
                               desc="BIDS PhaseEncodingDirection of the target")
    brain_mask = File(exists=True, desc="brain mask on the target grid (3-D NIfTI, nonzero = brain); "
                                        "whole volume when not given")
    dropout_mask = File(exists=True, desc="predicted dropout mask on the target grid (3-D NIfTI)")
    pair_before = traits.List(File(exists=True), maxlen=2, minlen=2,
                              desc="reversed-PE data: the two opposite-polarity images before "
                                   "correction, on the target grid")
    pair_after = traits.List(File(exists=True), maxlen=2, minlen=2,
                             desc="reversed-PE data: the two images after correction")
    field_info = traits.Dict(desc="the field estimator's details; for a reversed-PE pair its "
                                  "agreement_before_brain / agreement_after_brain (correlation of "
                                  "the two polarities in the brain on the pair's grid; else "
                                  "agreement_before / agreement_after, in its mask) are reported "
                                  "when pair_after is not given")
    registration_quality = traits.Float(desc="similarity 0-1 of the moved field-map magnitude "
                                             "with the EPI reference")
    runtime_s = traits.Float(desc="processing time of the target so far, s")


class _QCMetricsOutputSpec(TraitedSpec):
    out_file = File(exists=True, desc="JSON list of metrics (key, label, value, unit, status, "
                                      "explanation, detail, rule)")
    worst = traits.Str(desc="worst status over the metrics: fine, look or problem")


class QCMetrics(SimpleInterface):
    """QC metrics of one target (:func:`epicorr.qcmetrics.target_metrics`)."""

    input_spec = _QCMetricsInputSpec
    output_spec = _QCMetricsOutputSpec

    def _run_interface(self, runtime):
        from nipype.interfaces.base import isdefined

        from ..geometry import parse_pe_direction
        from ..io import load_image, save_json_atomic
        from ..qcmetrics import target_metrics, worst_status

        def vol(path, name, dtype=np.float64):
            return np.asanyarray(load_image(path, allowed_ndim=(3,), name=name).dataobj, dtype=dtype)

        field_img = load_image(self.inputs.field, allowed_ndim=(3,), name="field map")
        kwargs = {}
        if isdefined(self.inputs.dropout_mask):
            kwargs["dropout_mask"] = vol(self.inputs.dropout_mask, "dropout mask") > 0
        if isdefined(self.inputs.pair_before):
            kwargs["pair_before"] = tuple(vol(p, "pair image") for p in self.inputs.pair_before)
        if isdefined(self.inputs.pair_after):
            kwargs["pair_after"] = tuple(vol(p, "pair image") for p in self.inputs.pair_after)
        if not isdefined(self.inputs.pair_after) and isdefined(self.inputs.field_info):
            info = self.inputs.field_info
            # In the brain when the estimator gives it, else in its (head) mask.
            where = "_brain" if info.get("agreement_after_brain") is not None else ""
            if info.get("agreement_after" + where) is not None:
                before = info.get("agreement_before" + where)
                kwargs["pair_agreement"] = (float("nan") if before is None else float(before),
                                            float(info["agreement_after" + where]))
        if isdefined(self.inputs.registration_quality):
            kwargs["registration_quality"] = float(self.inputs.registration_quality)
        if isdefined(self.inputs.runtime_s):
            kwargs["runtime_s"] = float(self.inputs.runtime_s)
        mask = vol(self.inputs.brain_mask, "brain mask") > 0 if isdefined(self.inputs.brain_mask) else None
        metrics = target_metrics(
            field_hz=np.asanyarray(field_img.dataobj, dtype=np.float64),
            displacement_vox=vol(self.inputs.displacement, "displacement"),
            brain_mask=mask, voxel_size_mm=[float(z) for z in field_img.header.get_zooms()[:3]],
            pe_axis=parse_pe_direction(self.inputs.pe_direction).axis, **kwargs)
        rows = [dataclasses.asdict(m) for m in metrics]
        for row in rows:
            v = row["value"]
            row["value"] = None if v is None or not np.isfinite(float(v)) else float(v)
        path = out_path(runtime, "qc_metrics.json")
        save_json_atomic(rows, path)
        self._results["out_file"] = path
        self._results["worst"] = worst_status([m.status for m in metrics])
        return runtime


class _EpiBrainMaskInputSpec(BaseInterfaceInputSpec):
    in_file = File(exists=True, mandatory=True,
                   desc="corrected EPI series or volume (3-D or 4-D NIfTI); its first volume is used")
    measurement_mask = File(exists=True, desc="where the field was measured, same grid (3-D NIfTI, "
                                              "nonzero = measured); the brain mask is kept inside it")
    erosion = traits.Int(2, usedefault=True, desc="voxels of erosion that cut the scalp off (>= 1)")


class _EpiBrainMaskOutputSpec(TraitedSpec):
    out_file = File(exists=True, desc="brain mask (3-D NIfTI, uint8 0/1) on the series' grid")
    n_voxels = traits.Int(desc="voxels in the mask")


class EpiBrainMask(SimpleInterface):
    """Brain mask of a corrected EPI for in-brain statistics (:func:`epicorr.brainmask.epi_brain_mask`).

    The same rule for every route, so dropout volumes and QC figures compare across routes.
    """

    input_spec = _EpiBrainMaskInputSpec
    output_spec = _EpiBrainMaskOutputSpec

    def _run_interface(self, runtime):
        from nipype.interfaces.base import isdefined

        from ..brainmask import epi_brain_mask
        from ..io import load_image

        img = load_image(self.inputs.in_file, allowed_ndim=(3, 4), name="corrected EPI series")
        data = img.dataobj[..., 0] if len(img.shape) == 4 else img.dataobj
        brain = epi_brain_mask(np.asanyarray(data, dtype=np.float64), erosion=int(self.inputs.erosion))
        if isdefined(self.inputs.measurement_mask):
            measured = np.asanyarray(load_image(self.inputs.measurement_mask, allowed_ndim=(3,),
                                                name="measurement mask").dataobj) > 0
            if measured.shape != brain.shape:
                from ..errors import EpicorrInputError
                raise EpicorrInputError("is not on the series' grid",
                                        file=self.inputs.measurement_mask, value=measured.shape,
                                        hint="resample it onto the target first")
            brain &= measured
        ref3 = img.slicer[..., 0] if len(img.shape) == 4 else img
        self._results["out_file"] = save_like(brain.astype(np.uint8), ref3, runtime,
                                              "brain_mask.nii.gz", dtype=np.uint8)
        self._results["n_voxels"] = int(brain.sum())
        return runtime
