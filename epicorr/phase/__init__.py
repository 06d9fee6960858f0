"""Field maps from gradient-echo phase data: phase difference, two phases, direct field maps.

Public API
----------
* :func:`field_from_phasediff`, :func:`field_from_two_phases`,
  :func:`field_from_fieldmap` -> :class:`FieldEstimate` (field in Hz, its
  standard deviation, mask, magnitude, info) on the field map's own grid.
* Building blocks: :func:`phase_to_radians` (coding detection),
  :func:`complex_phase_difference`, :func:`fieldmap_to_hz`, :func:`head_mask`,
  :func:`unwrap_phase_3d`, :func:`despike`, :func:`extrapolate_harmonic`,
  :func:`field_sigma_hz`.
* :func:`field_to_target` brings an estimate onto an EPI grid (rigid
  registration of the magnitude to the EPI reference, see
  :mod:`epicorr.registration`).

All arrays are indexed ``[i, j, k]`` (NIfTI voxel axes); world coordinates are
RAS+ mm from the affines.
"""

from ._combine import complex_phase_difference, fieldmap_to_hz
from ._field import despike, extrapolate_harmonic, field_sigma_hz, phase_to_hz, smooth_field
from ._mask import head_mask, noise_sigma, otsu_threshold
from ._route import FieldEstimate, field_from_fieldmap, field_from_phasediff, field_from_two_phases
from ._scaling import phase_to_radians
from ._target import TargetField, field_to_target
from ._unwrap import unwrap_phase_3d, wrap

__all__ = [
    "FieldEstimate",
    "field_from_phasediff",
    "field_from_two_phases",
    "field_from_fieldmap",
    "TargetField",
    "field_to_target",
    "phase_to_radians",
    "complex_phase_difference",
    "fieldmap_to_hz",
    "head_mask",
    "noise_sigma",
    "otsu_threshold",
    "unwrap_phase_3d",
    "wrap",
    "phase_to_hz",
    "despike",
    "extrapolate_harmonic",
    "smooth_field",
    "field_sigma_hz",
]
