"""One workflow builder per field-map route, each ending in the common tail.

Contract of every route workflow
--------------------------------
``inputnode``: the route's own fields (:data:`ROUTE_INPUTS`) plus the tail's
(:data:`~epicorr.workflows.TAIL_INPUTS`); ``outputnode``: the tail's outputs
(:data:`~epicorr.workflows.TAIL_OUTPUTS`) plus ``field_native`` (the field on
the field map's own grid), ``sigma_native``, ``mask_native``, ``magnitude_native`` and
``field_info`` (what the estimator did).  The reversed-PE route also gives
``pair_before_native`` and ``pair_after_native``: the mean + and mean - images
as acquired and unwarped, on the pair's grid (for the QC page), and
``pair_brain_native``, the brain mask there in which their agreement is quoted.
"""

from __future__ import annotations

from nipype.interfaces.utility import IdentityInterface
from nipype.pipeline import engine as pe

from epicorr.nodes import HzMapField, PairField, PhaseDiffField, TwoPhaseField
from epicorr.options import FieldSourceKind, parse_option

from ._tail import TAIL_INPUTS, TAIL_OUTPUTS, build_tail_workflow

__all__ = ["ROUTE_INPUTS", "build_phasediff_workflow", "build_two_phase_workflow",
           "build_hz_map_workflow", "build_reversed_pe_workflow", "build_route_workflow"]

#: Route-specific inputnode fields, by route.
ROUTE_INPUTS: dict[FieldSourceKind, dict[str, str]] = {
    FieldSourceKind.PHASEDIFF: {
        "phasediff": "BIDS phasediff image", "magnitude1": "BIDS magnitude1 image",
        "magnitude2": "BIDS magnitude2 image (optional)",
        "fieldmap_metadata": "phasediff sidecar (dict with EchoTime1, EchoTime2)",
        "fieldmap_metadata_file": "phasediff sidecar path"},
    FieldSourceKind.TWO_PHASES: {
        "phase1": "BIDS phase1 image", "phase2": "BIDS phase2 image",
        "magnitude1": "BIDS magnitude1 image", "magnitude2": "BIDS magnitude2 image",
        "phase1_metadata": "phase1 sidecar (dict with EchoTime)",
        "phase2_metadata": "phase2 sidecar (dict with EchoTime)",
        "fieldmap_metadata_files": "the two phase sidecar paths"},
    FieldSourceKind.FIELDMAP: {
        "fieldmap": "BIDS fieldmap image", "magnitude": "BIDS magnitude image",
        "fieldmap_metadata": "fieldmap sidecar (dict with Units)",
        "fieldmap_metadata_file": "fieldmap sidecar path"},
    FieldSourceKind.REVERSED_PE: {
        "epi_files": "BIDS epi images with opposite PE polarity",
        "epi_metadata": "list of their sidecars (dicts)",
        "epi_metadata_files": "list of their sidecar paths"},
}

_NATIVE = {"field": "field_native", "sigma": "sigma_native", "mask": "mask_native",
           "magnitude": "magnitude_native", "info": "field_info"}


#: Extra estimator outputs of the reversed-PE route (estimator field -> outputnode field).
_PAIR_NATIVE = {"pair_before": "pair_before_native", "pair_after": "pair_after_native",
                "brain_mask": "pair_brain_native"}


def _assemble(name: str, kind: FieldSourceKind, estimator: pe.Node, wiring: list,
              tail_options: dict, extra: dict | None = None) -> pe.Workflow:
    wf = pe.Workflow(name=name)
    fields = list(ROUTE_INPUTS[kind]) + list(TAIL_INPUTS)
    native = {**_NATIVE, **(extra or {})}
    inputnode = pe.Node(IdentityInterface(fields=fields), name="inputnode")
    outputnode = pe.Node(IdentityInterface(fields=list(TAIL_OUTPUTS) + list(native.values())),
                         name="outputnode")
    tail = build_tail_workflow(**tail_options)
    wf.connect([(inputnode, estimator, wiring)])
    wf.connect([
        (estimator, tail, [(k, f"inputnode.{k}") for k in ("field", "sigma", "mask", "magnitude")]
         + [("info", "inputnode.field_info")]),
        (inputnode, tail, [(k, f"inputnode.{k}") for k in TAIL_INPUTS
                           if k not in ("field", "sigma", "mask", "magnitude", "field_info")]),
        (tail, outputnode, [(f"outputnode.{k}", k) for k in TAIL_OUTPUTS]),
        (estimator, outputnode, list(native.items())),
    ])
    return wf


def build_phasediff_workflow(name: str = "phasediff_route", **tail_options) -> pe.Workflow:
    """Route 1: ``phasediff`` + magnitudes (BIDS case 1), then the tail.

    ``tail_options`` go to :func:`~epicorr.workflows.build_tail_workflow`.
    """
    est = pe.Node(PhaseDiffField(), name="field_from_phasediff")
    wiring = [("phasediff", "phasediff"), ("magnitude1", "magnitude1"), ("magnitude2", "magnitude2"),
              ("fieldmap_metadata", "metadata"), ("fieldmap_metadata_file", "metadata_file")]
    return _assemble(name, FieldSourceKind.PHASEDIFF, est, wiring, tail_options)


def build_two_phase_workflow(name: str = "two_phase_route", **tail_options) -> pe.Workflow:
    """Route 2: ``phase1``/``phase2`` + magnitudes (BIDS case 2), then the tail."""
    est = pe.Node(TwoPhaseField(), name="field_from_two_phases")
    wiring = [("phase1", "phase1"), ("phase2", "phase2"), ("magnitude1", "magnitude1"),
              ("magnitude2", "magnitude2"), ("phase1_metadata", "metadata1"),
              ("phase2_metadata", "metadata2"), ("fieldmap_metadata_files", "metadata_files")]
    return _assemble(name, FieldSourceKind.TWO_PHASES, est, wiring, tail_options)


def build_hz_map_workflow(name: str = "hz_map_route", **tail_options) -> pe.Workflow:
    """Route 3: a direct ``fieldmap`` (Hz, rad/s or T) + ``magnitude`` (BIDS case 3), then the tail."""
    est = pe.Node(HzMapField(), name="field_from_hz_map")
    wiring = [("fieldmap", "fieldmap"), ("magnitude", "magnitude"),
              ("fieldmap_metadata", "metadata"), ("fieldmap_metadata_file", "metadata_file")]
    return _assemble(name, FieldSourceKind.FIELDMAP, est, wiring, tail_options)


def build_reversed_pe_workflow(name: str = "reversed_pe_route", **tail_options) -> pe.Workflow:
    """Route 4: ``epi`` images with reversed PE polarity (BIDS case 4), then the tail."""
    est = pe.Node(PairField(), name="field_from_pair")
    wiring = [("epi_files", "in_files"), ("epi_metadata", "metadata"),
              ("epi_metadata_files", "metadata_files")]
    return _assemble(name, FieldSourceKind.REVERSED_PE, est, wiring, tail_options, extra=_PAIR_NATIVE)


_BUILDERS = {
    FieldSourceKind.PHASEDIFF: build_phasediff_workflow,
    FieldSourceKind.TWO_PHASES: build_two_phase_workflow,
    FieldSourceKind.FIELDMAP: build_hz_map_workflow,
    FieldSourceKind.REVERSED_PE: build_reversed_pe_workflow,
}


def build_route_workflow(kind: FieldSourceKind | str, name: str | None = None,
                         **tail_options) -> pe.Workflow:
    """The route workflow for a field-source kind (``phasediff``, ``two-phases``, ...)."""
    kind = parse_option(FieldSourceKind, kind, name="field source")
    builder = _BUILDERS[kind]
    return builder(name=name, **tail_options) if name else builder(**tail_options)
