"""Thin Nipype SimpleInterface nodes, one per step, each calling one core function.

Each node loads its inputs with :mod:`epicorr.io`, calls one core function,
writes its outputs atomically into the node's working folder and fills its
outputs.  Metadata travels as ``Dict`` inputs holding the (inherited) BIDS
sidecar; ``metadata_file`` names the sidecar in error messages.

========================  ============================================================
node                      core function
========================  ============================================================
:class:`PhaseDiffField`   :func:`epicorr.phase.field_from_phasediff`
:class:`TwoPhaseField`    :func:`epicorr.phase.field_from_two_phases`
:class:`HzMapField`       :func:`epicorr.phase.field_from_fieldmap`
:class:`PairField`        :func:`epicorr.pair.estimate_field_from_pair`
:class:`FieldToTargetGrid`  :func:`epicorr.phase.field_to_target`
:class:`FieldToDisplacement`  :func:`epicorr.displacement.field_to_displacement`
:class:`UnwarpSeries`     :func:`epicorr.unwarp.unwarp`
:class:`PredictDropout`   :func:`epicorr.dropout.predict_retained_signal`
:class:`QCMetrics`        :func:`epicorr.qcmetrics.target_metrics`
:class:`EpiBrainMask`     :func:`epicorr.brainmask.epi_brain_mask`
:class:`SubjectReport`    :func:`epicorr.report` (one page per subject)
========================  ============================================================
"""

from .displacement import FieldToDisplacement, UnwarpSeries
from .dropout import PredictDropout
from .field import FieldToTargetGrid, HzMapField, PairField, PhaseDiffField, TwoPhaseField
from .qc import EpiBrainMask, QCMetrics

__all__ = [
    "PhaseDiffField", "TwoPhaseField", "HzMapField", "PairField", "FieldToTargetGrid",
    "FieldToDisplacement", "UnwarpSeries", "PredictDropout", "QCMetrics", "EpiBrainMask",
]
