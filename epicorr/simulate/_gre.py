"""Dual-echo gradient-echo field-map acquisition (undistorted).

A 3-D gradient echo at two echo times gives, at each voxel,

    S(TE) = M0 exp(-TE / T2*) exp(i [phi0 + 2 pi f TE])

with ``f`` the off-resonance field (Hz) and ``phi0`` a smooth, echo-independent
phase (transmit/receive phase), so the phase difference is
``2 pi f (TE2 - TE1)``.  Complex Gaussian noise is added; the magnitude is
``|S|`` and the phase ``angle(S)`` wrapped to ``[-pi, pi)``, so the phase is
random where there is no signal (air, bone).  Phase is returned in radians or
in the common integer coding (``-4096 .. 4095`` spanning ``2 pi``).  The
gradient-echo readout is short and 3-D encoded, so the images are taken as
undistorted.  The 2.46 ms echo difference at 3 T (4.92 / 7.38 ms) is common
practice: water and fat are in phase at both echoes.

References
----------
Jezzard P, Balaban RS. Correction for geometric distortion in echo planar
images from B0 field variations. Magn Reson Med 1995;34:65-73.

BIDS specification, "Fieldmap data": case 1 (phase difference) and case 2
(two phase images).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.ndimage as ndi

from ..errors import EpicorrInputError
from ..options import PhaseScaling, parse_option

__all__ = ["DualEcho", "simulate_dual_echo", "resample_to_grid", "phase_to_integer"]


@dataclass(frozen=True, eq=False)
class DualEcho:
    """A simulated dual-echo field-map acquisition.

    Attributes
    ----------
    magnitudes : tuple of (I, J, K) float arrays
        Magnitude at each echo time.
    phases : tuple of (I, J, K) arrays
        Wrapped phase at each echo: float radians in ``[-pi, pi)``, or int16 in
        ``-4096 .. 4095`` (``phase_coding="integer"``).
    echo_times : tuple of float
        Seconds.
    affine : (4, 4) ndarray
        Voxel -> world (RAS+ mm) of this grid.
    field_hz : (I, J, K) ndarray
        The true field on this grid, Hz (ground truth).
    brain_mask : (I, J, K) bool ndarray
        The head's brain mask on this grid.
    """

    magnitudes: tuple
    phases: tuple
    echo_times: tuple
    affine: np.ndarray
    field_hz: np.ndarray
    brain_mask: np.ndarray

    def __iter__(self):  # ``mags, phases = simulate_dual_echo(...)``
        return iter((self.magnitudes, self.phases))


def resample_to_grid(data, *, affine, target_shape, target_affine, order=3) -> np.ndarray:
    """Resample a volume onto another grid through the world coordinates (spline, edges clamped).

    Parameters
    ----------
    data : (I, J, K) array
    affine : (4, 4) array
        Voxel -> world of ``data``.
    target_shape : 3 ints
    target_affine : (4, 4) array
    order : int
        Spline order (scipy.ndimage.map_coordinates).

    Returns
    -------
    ndarray of ``target_shape``
    """
    m = np.linalg.inv(np.asarray(affine, float)) @ np.asarray(target_affine, float)
    idx = np.indices(tuple(target_shape), dtype=float).reshape(3, -1)
    src = m[:3, :3] @ idx + m[:3, 3:4]
    out = ndi.map_coordinates(np.asarray(data, float), src, order=order, mode="nearest")
    return out.reshape(tuple(target_shape))


def phase_to_integer(phase_rad) -> np.ndarray:
    """Radians in ``[-pi, pi)`` -> int16 ``-4096 .. 4095`` (``4096 / pi`` per radian; common practice)."""
    code = np.round(np.asarray(phase_rad, float) * 4096 / np.pi)
    code = np.where(code >= 4096, code - 8192, code)
    return np.clip(code, -4096, 4095).astype(np.int16)


def _smooth_phase(shape, affine, rng) -> np.ndarray:
    idx = np.indices(shape, dtype=float).reshape(3, -1)
    xyz = (np.asarray(affine, float)[:3, :3] @ idx + np.asarray(affine, float)[:3, 3:4]) / 100.0
    c = rng.uniform(-1, 1, size=7)
    x, y, z = xyz
    phi = c[0] * np.pi + c[1] * x + c[2] * y + c[3] * z + 0.5 * (c[4] * x * y + c[5] * y * z + c[6] * x * x)
    return phi.reshape(shape)


def simulate_dual_echo(head, field_hz, *, echo_times=(4.92e-3, 7.38e-3), target_shape=None,
                       target_affine=None, snr=60.0, seed=0, phase_coding="radians",
                       phase_offset=True) -> DualEcho:
    """Simulate magnitude and wrapped phase of a dual-echo gradient echo.

    Parameters
    ----------
    head : Head
        The synthetic head (its grid is the one ``field_hz`` lives on).
    field_hz : (I, J, K) array
        True field on the head's grid, Hz.
    echo_times : sequence of float
        Seconds (two or more).
    target_shape, target_affine : optional
        Grid of the field-map acquisition (default: the head's grid).  The head is
        re-evaluated on it; the field is resampled (cubic spline).
    snr : float or None
        Mean first-echo magnitude over the brain / per-channel noise sigma (None: no noise).
    seed : int
        Seed of the noise and of the smooth phase offset.
    phase_coding : {"radians", "integer"} or PhaseScaling
    phase_offset : bool
        Add a smooth echo-independent phase ``phi0``.

    Returns
    -------
    DualEcho
        Phase convention: ``phase(TE) = phi0 + 2 pi f TE``, wrapped.
    """
    coding = parse_option(PhaseScaling, phase_coding, name="phase_coding")
    if coding is PhaseScaling.AUTO:
        raise EpicorrInputError("choose 'radians' or 'integer' for simulated data", key="phase_coding",
                                value=phase_coding)
    tes = tuple(float(t) for t in echo_times)
    if len(tes) < 1 or min(tes) <= 0:
        raise EpicorrInputError("echo times must be positive seconds", key="echo_times", value=echo_times)
    if target_affine is None:
        target_affine, target_shape = head.affine, head.shape
    target_affine = np.asarray(target_affine, float)
    target_shape = tuple(int(n) for n in target_shape)
    same = target_shape == head.shape and np.allclose(target_affine, head.affine)
    grid = head if same else head.resampled(shape=target_shape, affine=target_affine)
    field = np.asarray(field_hz, float) if same else resample_to_grid(
        field_hz, affine=head.affine, target_shape=target_shape, target_affine=target_affine)
    rng = np.random.default_rng(seed)
    phi0 = _smooth_phase(target_shape, target_affine, rng) if phase_offset else 0.0
    signals = [grid.gre_magnitude * np.exp(-te / grid.t2star_s) * np.exp(1j * (phi0 + 2 * np.pi * field * te))
               for te in tes]
    if snr is not None:
        level = float(np.mean(np.abs(signals[0])[grid.brain_mask]))
        sigma = level / float(snr)
        signals = [s + sigma * (rng.standard_normal(s.shape) + 1j * rng.standard_normal(s.shape))
                   for s in signals]
    mags = tuple(np.abs(s) for s in signals)
    phases = []
    for s in signals:
        ph = np.angle(s)
        ph = np.where(ph >= np.pi, ph - 2 * np.pi, ph)
        phases.append(phase_to_integer(ph) if coding is PhaseScaling.INTEGER else ph)
    return DualEcho(magnitudes=mags, phases=tuple(phases), echo_times=tes, affine=target_affine,
                    field_hz=field, brain_mask=grid.brain_mask)
