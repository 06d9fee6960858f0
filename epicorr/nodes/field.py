"""Nodes: estimate a field (Hz) from each BIDS field-map case, and bring it onto a target grid.

Every estimator writes the same four images on the field map's own grid:
``field`` (Hz), ``sigma`` (its standard deviation, Hz), ``mask`` (where it was
measured) and ``magnitude`` (the image used to register it to the target),
plus ``info`` (what was done).  :class:`FieldToTargetGrid` takes those four.
"""

from __future__ import annotations

import numpy as np
from nipype.interfaces.base import (BaseInterfaceInputSpec, File, InputMultiObject,
                                    SimpleInterface, TraitedSpec, isdefined, traits)

from ..options import FieldUnits, PhaseScaling
from ._base import EpiInputSpec, jsonable, save_like

__all__ = ["PhaseDiffField", "TwoPhaseField", "HzMapField", "PairField", "FieldToTargetGrid"]


class _FieldOutputSpec(TraitedSpec):
    field = File(exists=True, desc="field in Hz on the field map's grid (undistorted space)")
    sigma = File(exists=True, desc="standard deviation of the field, Hz, same grid")
    mask = File(exists=True, desc="where the field was measured (uint8 0/1), same grid")
    magnitude = File(exists=True, desc="reference image for registration to the target, same grid")
    info = traits.Dict(desc="what the estimator did (coding, mask, unwrapping, spikes, echo times)")


def _smoothing(inputs):
    v = inputs.smoothing_fwhm_mm
    return float(v) if isdefined(v) and v > 0 else None


def _write_estimate(est, ref_img, runtime, results) -> None:
    results["field"] = save_like(est.field_hz, ref_img, runtime, "field_hz.nii.gz")
    results["sigma"] = save_like(est.sigma_hz, ref_img, runtime, "sigma_hz.nii.gz")
    results["mask"] = save_like(est.mask.astype(np.uint8), ref_img, runtime, "mask.nii.gz", dtype=np.uint8)
    mag = getattr(est, "magnitude", None)
    if mag is None:
        mag = est.corrected
    results["magnitude"] = save_like(mag, ref_img, runtime, "magnitude.nii.gz")
    results["info"] = jsonable(est.info)


def _volume(path, name, ndim=(3,)):
    from ..io import load_image

    img = load_image(path, allowed_ndim=ndim, name=name)
    return img, np.asanyarray(img.dataobj, dtype=np.float64)


class _CommonFieldInputSpec(BaseInterfaceInputSpec):
    smoothing_fwhm_mm = traits.Float(0.0, usedefault=True,
                                     desc="optional Gaussian smoothing FWHM of the field, mm (0 = none)")


class _PhaseDiffInputSpec(_CommonFieldInputSpec):
    phasediff = File(exists=True, mandatory=True, desc="BIDS phasediff image (wrapped, radians or integer coded)")
    magnitude1 = File(exists=True, mandatory=True, desc="BIDS magnitude1 image, same grid")
    magnitude2 = File(exists=True, desc="BIDS magnitude2 image, same grid (optional)")
    metadata = traits.Dict(mandatory=True, desc="phasediff sidecar (EchoTime1, EchoTime2 in s)")
    metadata_file = traits.Str("", usedefault=True, desc="phasediff sidecar path, for messages")
    scaling = traits.Enum(*[m.value for m in PhaseScaling], usedefault=True,
                          desc="phase coding: auto (detect), radians or integer")


class PhaseDiffField(SimpleInterface):
    """Field from ``phasediff`` + magnitudes (:func:`epicorr.phase.field_from_phasediff`)."""

    input_spec = _PhaseDiffInputSpec
    output_spec = _FieldOutputSpec

    def _run_interface(self, runtime):
        from ..phase import field_from_phasediff

        pimg, phase = _volume(self.inputs.phasediff, "phasediff")
        _, mag1 = _volume(self.inputs.magnitude1, "magnitude1")
        mag2 = _volume(self.inputs.magnitude2, "magnitude2")[1] if isdefined(self.inputs.magnitude2) else None
        meta = self.inputs.metadata
        files = {"phasediff": self.inputs.metadata_file or self.inputs.phasediff,
                 "magnitude1": self.inputs.magnitude1}
        if mag2 is not None:
            files["magnitude2"] = self.inputs.magnitude2
        est = field_from_phasediff(phase, mag1, echo_time1=meta.get("EchoTime1"),
                                   echo_time2=meta.get("EchoTime2"), scaling=self.inputs.scaling,
                                   magnitude2=mag2, zooms=pimg.header.get_zooms()[:3],
                                   smoothing_fwhm_mm=_smoothing(self.inputs), file=files)
        _write_estimate(est, pimg, runtime, self._results)
        return runtime


class _TwoPhaseInputSpec(_CommonFieldInputSpec):
    phase1 = File(exists=True, mandatory=True, desc="BIDS phase1 image (first echo, wrapped)")
    phase2 = File(exists=True, mandatory=True, desc="BIDS phase2 image (second echo, wrapped)")
    magnitude1 = File(exists=True, mandatory=True, desc="BIDS magnitude1 image")
    magnitude2 = File(exists=True, mandatory=True, desc="BIDS magnitude2 image")
    metadata1 = traits.Dict(mandatory=True, desc="phase1 sidecar (EchoTime, s)")
    metadata2 = traits.Dict(mandatory=True, desc="phase2 sidecar (EchoTime, s)")
    metadata_files = traits.List(traits.Str, desc="the two phase sidecar paths, for messages")
    scaling = traits.Enum(*[m.value for m in PhaseScaling], usedefault=True,
                          desc="phase coding: auto (detect), radians or integer")


class TwoPhaseField(SimpleInterface):
    """Field from ``phase1``/``phase2`` + magnitudes (:func:`epicorr.phase.field_from_two_phases`)."""

    input_spec = _TwoPhaseInputSpec
    output_spec = _FieldOutputSpec

    def _run_interface(self, runtime):
        from ..phase import field_from_two_phases

        img1, p1 = _volume(self.inputs.phase1, "phase1")
        _, p2 = _volume(self.inputs.phase2, "phase2")
        _, m1 = _volume(self.inputs.magnitude1, "magnitude1")
        _, m2 = _volume(self.inputs.magnitude2, "magnitude2")
        names = list(self.inputs.metadata_files) if isdefined(self.inputs.metadata_files) else []
        names += [self.inputs.phase1, self.inputs.phase2][len(names):]
        files = {"phase1": names[0], "phase2": names[1], "magnitude1": self.inputs.magnitude1,
                 "magnitude2": self.inputs.magnitude2}
        est = field_from_two_phases(p1, p2, m1, m2, echo_time1=self.inputs.metadata1.get("EchoTime"),
                                    echo_time2=self.inputs.metadata2.get("EchoTime"),
                                    scaling=self.inputs.scaling, zooms=img1.header.get_zooms()[:3],
                                    smoothing_fwhm_mm=_smoothing(self.inputs), file=files)
        _write_estimate(est, img1, runtime, self._results)
        return runtime


class _HzMapInputSpec(_CommonFieldInputSpec):
    fieldmap = File(exists=True, mandatory=True, desc="BIDS fieldmap image (Hz, rad/s or T)")
    magnitude = File(exists=True, mandatory=True, desc="BIDS magnitude image, same grid")
    metadata = traits.Dict(mandatory=True, desc="fieldmap sidecar (Units)")
    metadata_file = traits.Str("", usedefault=True, desc="fieldmap sidecar path, for messages")


class HzMapField(SimpleInterface):
    """Field from a direct ``fieldmap`` (:func:`epicorr.phase.field_from_fieldmap`)."""

    input_spec = _HzMapInputSpec
    output_spec = _FieldOutputSpec

    def _run_interface(self, runtime):
        from ..errors import EpicorrInputError
        from ..options import parse_option
        from ..phase import field_from_fieldmap

        img, data = _volume(self.inputs.fieldmap, "fieldmap")
        _, mag = _volume(self.inputs.magnitude, "magnitude")
        side = self.inputs.metadata_file or self.inputs.fieldmap
        units = self.inputs.metadata.get("Units")
        if units is None:
            raise EpicorrInputError("required key missing from the sidecar", file=side, key="Units",
                                    hint="add Units: Hz, rad/s or T")
        units = parse_option(FieldUnits, units, name="Units", file=side)
        est = field_from_fieldmap(data, mag, units=units, zooms=img.header.get_zooms()[:3],
                                  smoothing_fwhm_mm=_smoothing(self.inputs),
                                  file={"fieldmap": side, "magnitude": self.inputs.magnitude})
        _write_estimate(est, img, runtime, self._results)
        return runtime


class _PairInputSpec(BaseInterfaceInputSpec):
    in_files = InputMultiObject(File(exists=True), mandatory=True,
                                desc="BIDS epi images (3-D or 4-D) with opposite phase-encode polarity")
    metadata = traits.List(traits.Dict, mandatory=True,
                           desc="sidecar of each image (PhaseEncodingDirection, EffectiveEchoSpacing "
                                "or TotalReadoutTime)")
    metadata_files = traits.List(traits.Str, desc="sidecar path of each image, for messages")
    regularization = traits.Float(desc="smoothness weight factor (default: the estimator's own)")
    edge_scale = traits.Float(desc="edge-preserving smoothness scale, voxels of displacement per PE "
                                   "voxel (default: off, quadratic smoothness)")
    harmonic = traits.Float(desc="harmonic refinement inside the brain, dimensionless weight "
                                 "(default: off; 300 is a reasonable start)")


class _PairOutputSpec(_FieldOutputSpec):
    pair_before = traits.List(File(exists=True), desc="mean of the + images and mean of the - images "
                                                      "as acquired, on the pair's grid (for QC)")
    pair_after = traits.List(File(exists=True), desc="the same two means unwarped with the field, "
                                                     "on the pair's grid (for QC)")
    brain_mask = File(exists=True, desc="brain of the corrected reference inside the measurement mask "
                                        "(uint8 0/1), on the pair's grid: where the agreement is quoted")


class PairField(SimpleInterface):
    """Field from a reversed-PE pair (:func:`epicorr.pair.estimate_field_from_pair`)."""

    input_spec = _PairInputSpec
    output_spec = _PairOutputSpec

    def _run_interface(self, runtime):
        from ..errors import EpicorrInputError
        from ..geometry import parse_pe_direction, readout_timing
        from ..io import load_image
        from ..pair import estimate_field_from_pair

        files = list(self.inputs.in_files)
        metas = list(self.inputs.metadata)
        names = list(self.inputs.metadata_files) if isdefined(self.inputs.metadata_files) else []
        names += files[len(names):]
        if len(metas) != len(files):
            raise EpicorrInputError("one sidecar per image is needed", key="metadata", value=len(metas),
                                    hint=f"give {len(files)} metadata entries")
        imgs, data, pes, vph = [], [], [], []
        for path, meta, name in zip(files, metas, names):
            img = load_image(path, name="epi image")
            pe = parse_pe_direction(meta.get("PhaseEncodingDirection"), file=name)
            timing = readout_timing(meta, n_pe_image=int(img.shape[pe.axis]), file=name)
            imgs.append(img)
            data.append(np.asanyarray(img.dataobj, dtype=np.float64))
            pes.append(pe)
            vph.append(timing.voxels_per_hz)
        kwargs = {}
        if isdefined(self.inputs.regularization):
            kwargs["regularization"] = float(self.inputs.regularization)
        if isdefined(self.inputs.edge_scale):
            kwargs["edge_scale"] = float(self.inputs.edge_scale)
        if isdefined(self.inputs.harmonic):
            kwargs["harmonic"] = float(self.inputs.harmonic)
        est = estimate_field_from_pair(data, pe_directions=pes, voxels_per_hz=vph,
                                       affine=[i.affine for i in imgs], files=names, **kwargs)
        grid = imgs[0].slicer[..., 0] if len(imgs[0].shape) == 4 else imgs[0]
        _write_estimate(est, grid, runtime, self._results)
        self._results["brain_mask"] = save_like(est.brain_mask.astype(np.uint8), grid, runtime,
                                                "brain_mask.nii.gz", dtype=np.uint8)
        for key, stack in (("pair_before", est.polarity_before), ("pair_after", est.polarity_after)):
            self._results[key] = [save_like(stack[n], grid, runtime, f"{key}_{sign}.nii.gz")
                                  for n, sign in enumerate(("plus", "minus"))]
        return runtime


class _ToTargetInputSpec(EpiInputSpec):
    field = File(exists=True, mandatory=True, desc="field in Hz on the field map's grid")
    sigma = File(exists=True, mandatory=True, desc="field standard deviation, Hz, same grid")
    mask = File(exists=True, mandatory=True, desc="field-map measurement mask, same grid")
    magnitude = File(exists=True, mandatory=True,
                     desc="field-map magnitude (or corrected pair image) used for registration")
    rounds = traits.Int(2, usedefault=True,
                        desc="registration rounds: 1 = to the distorted reference; more = unwarp "
                             "the reference with the current field and register again")


class _ToTargetOutputSpec(TraitedSpec):
    field = File(exists=True, desc="field in Hz on the target grid (undistorted space)")
    sigma = File(exists=True, desc="field standard deviation in Hz on the target grid")
    mask = File(exists=True, desc="measurement mask on the target grid (uint8 0/1)")
    reference = File(exists=True, desc="the 3-D target reference volume used (first volume)")
    registration_quality = traits.Float(desc="correlation 0-1 of the moved magnitude with the "
                                             "(unwarped) target reference in the head")
    info = traits.Dict(desc="registration rounds, transform (RAS+, target to field map), timings")


class FieldToTargetGrid(SimpleInterface):
    """Register the field map to the target and resample it (:func:`epicorr.phase.field_to_target`)."""

    input_spec = _ToTargetInputSpec
    output_spec = _ToTargetOutputSpec

    def _run_interface(self, runtime):
        from ..geometry import parse_pe_direction, readout_timing
        from ..io import load_image
        from ..phase import FieldEstimate, field_to_target

        ref_img = load_image(self.inputs.reference, name="target EPI")
        ref3 = ref_img.slicer[..., 0] if len(ref_img.shape) == 4 else ref_img
        ref = np.asanyarray(ref3.dataobj, dtype=np.float64)
        fimg, field = _volume(self.inputs.field, "field map")
        est = FieldEstimate(field_hz=field, sigma_hz=_volume(self.inputs.sigma, "field sigma")[1],
                            mask=_volume(self.inputs.mask, "field mask")[1] > 0,
                            magnitude=_volume(self.inputs.magnitude, "field magnitude")[1])
        meta = self.inputs.metadata
        where = self.inputs.metadata_file or self.inputs.reference
        pe = parse_pe_direction(meta.get("PhaseEncodingDirection"), file=where)
        timing = readout_timing(meta, n_pe_image=int(ref.shape[pe.axis]), file=where)
        out = field_to_target(est, source_affine=fimg.affine, reference=ref,
                              reference_affine=ref3.affine, pe=pe,
                              voxels_per_hz=timing.voxels_per_hz, rounds=int(self.inputs.rounds))
        self._results["field"] = save_like(out.field_hz, ref3, runtime, "field_hz.nii.gz")
        self._results["sigma"] = save_like(out.sigma_hz, ref3, runtime, "sigma_hz.nii.gz")
        self._results["mask"] = save_like(out.mask.astype(np.uint8), ref3, runtime, "mask.nii.gz",
                                          dtype=np.uint8)
        self._results["reference"] = save_like(ref, ref3, runtime, "reference.nii.gz")
        quality = float("nan")
        if out.registration is not None:
            quality = float(out.registration.correlation)
        self._results["registration_quality"] = quality
        info = dict(out.info)
        info["transform_ras_target_to_fieldmap"] = np.asarray(out.transform).tolist()
        self._results["info"] = jsonable(info)
        return runtime
