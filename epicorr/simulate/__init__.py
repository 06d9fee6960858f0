"""Physics simulator: synthetic head, Fourier dipole field, k-space EPI and dual-echo GRE (pure functions).

Independent of the correction code: images are formed from k-space, so the
simulator checks the pixel-shift model rather than repeating it.

Typical use::

    from epicorr.simulate import synthetic_head, dipole_field_hz, shim, simulate_epi
    head = synthetic_head(shape=(64, 64, 48), voxel_size_mm=3.0, seed=0)
    field = shim(dipole_field_hz(head.chi_ppm, affine=head.affine), mask=head.brain_mask,
                 affine=head.affine)
    epi = simulate_epi(head, field, pe="j-", effective_echo_spacing=5e-4, echo_time=0.03)
"""

from ._dipole import dipole_field_hz, dipole_kernel, shim, signal_side_field
from ._epi import line_times, simulate_epi, true_retained_signal
from ._gre import DualEcho, phase_to_integer, resample_to_grid, simulate_dual_echo
from ._head import LABELS, Head, default_affine, rigid_matrix, synthetic_head
from ._motion import motion_matrix, rigid_motion

__all__ = [
    "Head",
    "LABELS",
    "synthetic_head",
    "default_affine",
    "rigid_matrix",
    "dipole_kernel",
    "dipole_field_hz",
    "shim",
    "signal_side_field",
    "simulate_epi",
    "true_retained_signal",
    "line_times",
    "DualEcho",
    "simulate_dual_echo",
    "resample_to_grid",
    "phase_to_integer",
    "motion_matrix",
    "rigid_motion",
]
