"""Residual signal dropout: predicted retained signal from the field and the EPI protocol.

Unwarping moves signal back; it cannot restore signal that dephased inside a
voxel.  This package predicts that loss from the field map (Hz, on the
target grid in undistorted space) and the EPI protocol:

* :func:`predict_retained_signal` - retained fraction 0..1, its through-plane
  and in-plane parts, the dropout mask and an air-tissue interface map;
* :func:`summarize_dropout` - dropout volume (mL, fraction of brain), worst
  clusters, what-if figures (flipped PE, half slice, TE - 10 ms);
* :func:`protocol_from_metadata` - ``EchoTime`` / ``SliceThickness`` from a
  sidecar, with the fallback flagged;
* the model pieces: :func:`through_plane_retained`, :func:`pe_echo_factor`,
  :func:`pe_retained`, :func:`readout_retained`,
  :func:`field_gradient_hz_per_mm`, :func:`dropout_mask`,
  :func:`interface_distance_map`.

Research tool, not a medical device: check the prediction against the
images themselves.
"""

from ._gradient import field_gradient_hz_per_mm, voxel_sizes_mm
from ._in_plane import pe_echo_factor, pe_echo_shift_lines, pe_retained, readout_retained
from ._predict import (DEFAULT_DROPOUT_THRESHOLD, DropoutPrediction, dropout_mask,
                       half_loss_gradient_hz_per_mm, interface_distance_map,
                       predict_retained_signal)
from ._protocol import DropoutProtocol, echo_kind_from_metadata, protocol_from_metadata
from ._summary import DropoutCluster, DropoutSummary, summarize_dropout
from ._through_plane import through_plane_retained

__all__ = [
    "DEFAULT_DROPOUT_THRESHOLD",
    "DropoutPrediction",
    "DropoutProtocol",
    "DropoutCluster",
    "DropoutSummary",
    "predict_retained_signal",
    "dropout_mask",
    "interface_distance_map",
    "half_loss_gradient_hz_per_mm",
    "summarize_dropout",
    "protocol_from_metadata",
    "echo_kind_from_metadata",
    "through_plane_retained",
    "pe_echo_factor",
    "pe_echo_shift_lines",
    "pe_retained",
    "readout_retained",
    "field_gradient_hz_per_mm",
    "voxel_sizes_mm",
]
