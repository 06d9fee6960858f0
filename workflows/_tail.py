"""The common tail of every route: to target grid, displacement, unwarp, dropout, QC."""

from __future__ import annotations

from nipype.interfaces.utility import IdentityInterface, Select
from nipype.pipeline import engine as pe

from epicorr.nodes import (EpiBrainMask, FieldToDisplacement, FieldToTargetGrid, PredictDropout,
                           QCMetrics, UnwarpSeries)
from epicorr.options import Interpolation, parse_option

__all__ = ["TAIL_INPUTS", "TAIL_OUTPUTS", "build_tail_workflow"]

#: Inputs of the tail (and of every route workflow).
TAIL_INPUTS: dict[str, str] = {
    "field": "field in Hz on the field map's grid (undistorted)",
    "sigma": "its standard deviation, Hz, same grid",
    "mask": "where it was measured (0/1), same grid",
    "magnitude": "image on the field map's grid registered to the target",
    "field_info": "the field estimator's details (dict; a reversed-PE pair's agreement before and "
                  "after is reported by QC)",
    "reference": "the target's reference series or volume (sbref, or the first echo); first "
                 "volume used; defines the grid",
    "metadata": "the target's BIDS sidecar (dict; inheritance applied)",
    "metadata_file": "the target's sidecar path (for error messages)",
    "in_files": "list of series on the target grid to unwarp (echoes, sbref)",
    "echo_metadata": "list of sidecars, one per echo of the target (dropout uses each EchoTime)",
}

#: Outputs of the tail (and of every route workflow).
TAIL_OUTPUTS: dict[str, str] = {
    "field": "field in Hz on the target grid",
    "sigma": "field standard deviation, Hz, on the target grid",
    "mask": "measurement mask on the target grid",
    "brain_mask": "brain mask of the first corrected series, inside the measurement mask (the "
                  "in-brain statistics of dropout and QC use it)",
    "reference": "3-D target reference volume used for registration",
    "registration_quality": "correlation of the moved magnitude with the target reference",
    "registration_info": "registration rounds, transform and timings (dict)",
    "displacement": "displacement along PE in voxels on the target grid",
    "displacement_info": "readout parameters used (dict)",
    "pe_direction": "BIDS PhaseEncodingDirection of the target",
    "unwarped": "list of corrected series, one per in_files entry",
    "retained": "list of retained-signal maps, one per echo",
    "dropout": "list of dropout masks, one per echo",
    "dropout_info": "list of dropout model details, one per echo (dict)",
    "qc_metrics": "JSON file of QC metrics",
    "qc_worst": "worst QC status (fine, look, problem)",
}


def build_tail_workflow(name: str = "tail", *, interpolation: Interpolation | str = "cubic",
                        jacobian: bool = True, dropout_threshold: float = 0.5,
                        registration_rounds: int = 2) -> pe.Workflow:
    """Build the tail shared by every route.

    Contract: ``inputnode`` has the fields of :data:`TAIL_INPUTS`,
    ``outputnode`` those of :data:`TAIL_OUTPUTS`.

    Parameters
    ----------
    interpolation : {"cubic", "linear"}
        Along-PE interpolation of the unwarp step.
    jacobian : bool
        Jacobian intensity modulation.
    dropout_threshold : float
        Retained fraction under which a voxel is marked as dropout.
    registration_rounds : int
        Rounds of register / unwarp-reference / re-register.
    """
    interpolation = parse_option(Interpolation, interpolation, name="interpolation")
    wf = pe.Workflow(name=name)
    inputnode = pe.Node(IdentityInterface(fields=list(TAIL_INPUTS)), name="inputnode")
    outputnode = pe.Node(IdentityInterface(fields=list(TAIL_OUTPUTS)), name="outputnode")

    to_grid = pe.Node(FieldToTargetGrid(rounds=int(registration_rounds)), name="to_target_grid")
    to_disp = pe.Node(FieldToDisplacement(), name="displacement")
    unwarp = pe.MapNode(UnwarpSeries(interpolation=interpolation.value, jacobian=bool(jacobian)),
                        iterfield=["in_file"], name="unwarp")
    dropout = pe.MapNode(PredictDropout(threshold=float(dropout_threshold)),
                         iterfield=["metadata"], name="dropout")
    first_mask = pe.Node(Select(index=[0]), name="first_dropout_mask")
    first_series = pe.Node(Select(index=[0]), name="first_corrected_series")
    brain = pe.Node(EpiBrainMask(), name="brain_mask")
    qc = pe.Node(QCMetrics(), name="qc_metrics")

    common = [("reference", "reference"), ("metadata", "metadata"), ("metadata_file", "metadata_file")]
    wf.connect([
        (inputnode, to_grid, [("field", "field"), ("sigma", "sigma"), ("mask", "mask"),
                              ("magnitude", "magnitude")] + common),
        (inputnode, to_disp, common),
        (to_grid, to_disp, [("field", "field")]),
        (inputnode, unwarp, [("in_files", "in_file")]),
        (to_disp, unwarp, [("displacement", "displacement"), ("pe_direction", "pe_direction")]),
        (inputnode, dropout, [("reference", "reference"), ("echo_metadata", "metadata"),
                              ("metadata_file", "metadata_file")]),
        (unwarp, first_series, [("out_file", "inlist")]),
        (first_series, brain, [("out", "in_file")]),
        (to_grid, brain, [("mask", "measurement_mask")]),
        (to_grid, dropout, [("field", "field")]),
        (brain, dropout, [("out_file", "brain_mask")]),
        (dropout, first_mask, [("mask", "inlist")]),
        (brain, qc, [("out_file", "brain_mask")]),
        (inputnode, qc, [("field_info", "field_info")]),
        (brain, outputnode, [("out_file", "brain_mask")]),
        (to_grid, qc, [("field", "field"),
                       ("registration_quality", "registration_quality")]),
        (to_disp, qc, [("displacement", "displacement"), ("pe_direction", "pe_direction")]),
        (first_mask, qc, [("out", "dropout_mask")]),
        (to_grid, outputnode, [("field", "field"), ("sigma", "sigma"), ("mask", "mask"),
                               ("reference", "reference"),
                               ("registration_quality", "registration_quality"),
                               ("info", "registration_info")]),
        (to_disp, outputnode, [("displacement", "displacement"), ("info", "displacement_info"),
                               ("pe_direction", "pe_direction")]),
        (unwarp, outputnode, [("out_file", "unwarped")]),
        (dropout, outputnode, [("retained", "retained"), ("mask", "dropout"),
                               ("info", "dropout_info")]),
        (qc, outputnode, [("out_file", "qc_metrics"), ("worst", "qc_worst")]),
    ])
    return wf
