"""The three gradient-echo field-map cases, from arrays to a field in Hz.

``phasediff`` (one phase-difference image, BIDS ``EchoTime1``/``EchoTime2``),
``phase1``/``phase2`` (two phase images, each with ``EchoTime``) and a direct
``fieldmap`` (BIDS ``Units``) all end as a :class:`FieldEstimate` on the
field map's own grid.  See the private modules for each step's method.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
import scipy.ndimage as ndi

from ..errors import EpicorrInputError
from ..options import FieldUnits, PhaseScaling, parse_option
from ._combine import complex_phase_difference, fieldmap_to_hz
from ._field import despike, extrapolate_harmonic, field_sigma_hz, phase_to_hz, smooth_field
from ._mask import head_mask
from ._scaling import phase_to_radians
from ._unwrap import unwrap_phase_3d

__all__ = ["FieldEstimate", "field_from_phasediff", "field_from_two_phases", "field_from_fieldmap",
           "MAX_ECHO_TIME_S"]

#: Longest plausible gradient-echo field-map echo time, s (common practice:
#: field-map echoes are a few ms; 0.2 s catches values written in ms).
MAX_ECHO_TIME_S = 0.2


@dataclass
class FieldEstimate:
    """A field map in Hz with its uncertainty, on the field map's grid.

    Attributes
    ----------
    field_hz : ndarray, shape (X, Y, Z), float64
        Off-resonance, Hz; measured inside ``mask``, harmonically extended
        outside it.
    sigma_hz : ndarray, shape (X, Y, Z), float64
        Per-voxel standard deviation of ``field_hz``, Hz.
    mask : ndarray of bool, shape (X, Y, Z)
        Voxels where the field is measured (reliable signal inside the head).
    magnitude : ndarray, shape (X, Y, Z), float64
        The magnitude used for the mask (first echo), for registration and QC.
    info : dict
        What was done: phase coding, mask threshold and noise level, unwrapping
        solver figures, spikes removed, smoothing kernel, echo times.
    """

    field_hz: np.ndarray
    sigma_hz: np.ndarray
    mask: np.ndarray
    magnitude: np.ndarray
    info: dict = field(default_factory=dict)

#: Floor of the despiking limit for direct field maps (no echo times known), Hz.
#: Next to air cavities a true field misses every linear prediction from its
#: neighbours by up to tens of Hz (on the simulator, 30 Hz replaced 46 good
#: brain voxels and raised the error from 1.0 to 1.45 Hz RMSE); a scanner
#: unwrapper's slip is a whole cycle, about 400 Hz at dTE 2.46 ms.
FIELDMAP_SPIKE_FLOOR_HZ = 100.0


def _file(file: Any, role: str) -> Any:
    if isinstance(file, Mapping):
        return file.get(role)
    return file


def _volume(data: Any, *, key: str, file: Any) -> np.ndarray:
    arr = np.asarray(data)
    if not np.issubdtype(arr.dtype, np.number):
        raise EpicorrInputError("image data must be numeric", file=file, key=key, value=str(arr.dtype))
    while arr.ndim > 3 and arr.shape[-1] == 1:
        arr = arr[..., 0]
    if arr.ndim != 3:
        raise EpicorrInputError("must be a 3-D volume", file=file, key=key, value=arr.shape,
                                hint="give one volume per image")
    return arr.astype(np.float64)


def _magnitudes(magnitude: Any, magnitude2: Any, *, shape: tuple, key: str, file: Any,
                phase_key: str) -> tuple[np.ndarray, np.ndarray | None]:
    arr = np.asarray(magnitude)
    m2 = None
    if arr.ndim == 4 and arr.shape[-1] == 2:  # both echoes in one file
        arr, m2 = arr[..., 0], arr[..., 1]
    m1 = _volume(arr, key=key, file=_file(file, key))
    if magnitude2 is not None:
        m2 = magnitude2
    if m2 is not None:
        m2 = _volume(m2, key="magnitude2", file=_file(file, "magnitude2"))
    for name, m in ((key, m1), ("magnitude2", m2)):
        if m is not None and m.shape != shape:
            raise EpicorrInputError(f"shape {m.shape} differs from the {phase_key} shape {shape}",
                                    file=_file(file, name), key=name, value=m.shape,
                                    hint="magnitude and phase must come from the same acquisition")
    return m1, m2


def _echo_time(value: Any, *, key: str, file: Any) -> float:
    if value is None:
        raise EpicorrInputError("missing", file=file, key=key,
                                hint="add the echo time in seconds to the sidecar")
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)):
        raise EpicorrInputError("must be a number of seconds", file=file, key=key, value=value,
                                hint="fix the sidecar")
    v = float(value)
    if not math.isfinite(v) or v <= 0:
        raise EpicorrInputError("must be a positive, finite number of seconds", file=file, key=key,
                                value=value, hint="fix the sidecar")
    if v > MAX_ECHO_TIME_S:
        raise EpicorrInputError(f"over {MAX_ECHO_TIME_S:g} s, not plausible for a field-map echo",
                                file=file, key=key, value=value,
                                hint="BIDS wants seconds (was it written in ms?)")
    return v


def _delta_te(te1: Any, te2: Any, *, keys: tuple[str, str], files: tuple[Any, Any]) -> float:
    t1 = _echo_time(te1, key=keys[0], file=files[0])
    t2 = _echo_time(te2, key=keys[1], file=files[1])
    if abs(t2 - t1) < 1e-6:
        raise EpicorrInputError(f"equals {keys[0]}={te1!r}; the echo times must differ", file=files[1],
                                key=keys[1], value=te2,
                                hint="check the sidecars: a phase difference needs two echo times")
    return t2 - t1


def _prepare_mask(m1: np.ndarray, *, key: str, file: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict]:
    head, reliable, minfo = head_mask(m1, key=key, file=file)
    smooth = ndi.gaussian_filter(np.abs(m1), 1.0, mode="nearest")
    # Voxel quality in [0, 1]: magnitude relative to three times the threshold, squared.
    quality = np.where(head, np.clip(smooth / (3.0 * minfo["threshold"]), 0.0, 1.0) ** 2, 0.0)
    return head, reliable, quality, minfo


def _finish(dphi: np.ndarray, m1: np.ndarray, m2: np.ndarray | None, *, delta_te: float, info: dict,
            zooms: Any, smoothing_fwhm_mm: float | None, mag_key: str, file: Any) -> FieldEstimate:
    seconds: dict[str, float] = {}
    clock = time.perf_counter()

    def lap(step: str) -> None:
        nonlocal clock
        now = time.perf_counter()
        seconds[step] = now - clock
        clock = now

    head, reliable, quality, minfo = _prepare_mask(m1, key=mag_key, file=_file(file, mag_key))
    info["mask"] = minfo
    lap("mask")
    unwrapped, uinfo = unwrap_phase_3d(dphi, quality=quality, mask=reliable)
    info["unwrap"] = uinfo
    lap("unwrap")
    noise = minfo["noise_sigma"] or 1e-12
    snr1 = np.abs(m1) / noise
    snr2 = snr1 if m2 is None else np.abs(m2) / noise
    sigma = field_sigma_hz(snr1, snr2, delta_te=delta_te, measured=reliable)
    f = phase_to_hz(unwrapped, delta_te=delta_te)
    lap("uncertainty")
    spike_details: dict = {}
    f, n_spikes = despike(f, reliable, delta_te=delta_te, sigma_hz=sigma, details=spike_details)
    info["spikes_replaced"] = n_spikes
    info["despike"] = spike_details
    lap("despike")
    f, einfo = extrapolate_harmonic(f, reliable)
    info["extrapolation"] = einfo
    lap("extrapolate")
    f = _maybe_smooth(f, smoothing_fwhm_mm, zooms, info)
    lap("smooth")
    info["sigma_method"] = ("sqrt(1/SNR1^2 + 1/SNR2^2) / (2 pi |dTE|)" if m2 is not None
                            else "sqrt(2)/SNR1 / (2 pi |dTE|) (second magnitude absent: equal SNR assumed)")
    info["head_voxels"] = int(head.sum())
    info["seconds"] = seconds
    return FieldEstimate(field_hz=f, sigma_hz=sigma, mask=reliable, magnitude=np.abs(m1), info=info)


def _maybe_smooth(f: np.ndarray, fwhm: float | None, zooms: Any, info: dict) -> np.ndarray:
    if fwhm is None or fwhm == 0:
        info["smoothing"] = "none"
        return f
    if isinstance(fwhm, bool) or not isinstance(fwhm, (int, float)) or not math.isfinite(fwhm) or fwhm < 0:
        raise EpicorrInputError("must be a non-negative number of mm", key="smoothing_fwhm_mm", value=fwhm)
    z = (1.0, 1.0, 1.0) if zooms is None else tuple(float(v) for v in tuple(zooms)[:3])
    info["smoothing"] = f"3-D Gaussian, FWHM {float(fwhm):g} mm"
    return smooth_field(f, fwhm_mm=float(fwhm), zooms=z)


def field_from_phasediff(phasediff: Any, magnitude: Any, *, echo_time1: Any, echo_time2: Any,
                         scaling: Any = PhaseScaling.AUTO, magnitude2: Any = None, zooms: Any = None,
                         smoothing_fwhm_mm: float | None = None, file: Any = None) -> FieldEstimate:
    """Field map from a BIDS ``phasediff`` image.

    Parameters
    ----------
    phasediff : array_like, shape (X, Y, Z)
        ``phase(TE2) - phase(TE1)``, radians or integer-coded (wrapped).
    magnitude : array_like, shape (X, Y, Z) or (X, Y, Z, 2)
        ``magnitude1`` (or both magnitudes stacked on the last axis).
    echo_time1, echo_time2 : float
        BIDS ``EchoTime1``, ``EchoTime2`` of the phasediff sidecar, s.
    scaling : PhaseScaling or str
        Phase coding; ``"auto"`` detects it and refuses ambiguous data.
    magnitude2 : array_like, shape (X, Y, Z), optional
        Second-echo magnitude (used for the uncertainty).
    zooms : sequence of 3 floats, optional
        Voxel sizes, mm (needed only for smoothing).
    smoothing_fwhm_mm : float, optional
        FWHM of an optional Gaussian smoothing, mm (none by default).
    file : str or mapping, optional
        File name for error messages, or a mapping from role (``"phasediff"``,
        ``"magnitude1"``, ``"magnitude2"``) to file name.

    Returns
    -------
    FieldEstimate
        On the phasediff grid; ``field_hz = dphi / (2 pi (TE2 - TE1))``.

    Raises
    ------
    EpicorrInputError
        Missing or equal echo times, shape mismatch, all-zero or ambiguous phase.
    """
    pfile = _file(file, "phasediff")
    dte = _delta_te(echo_time1, echo_time2, keys=("EchoTime1", "EchoTime2"), files=(pfile, pfile))
    phase = _volume(phasediff, key="phasediff", file=pfile)
    m1, m2 = _magnitudes(magnitude, magnitude2, shape=phase.shape, key="magnitude1", file=file,
                         phase_key="phasediff")
    dphi, sinfo = phase_to_radians(phase, scaling=scaling, key="phasediff", file=pfile)
    info = {"case": "phasediff", "phase_coding": sinfo, "echo_times_s": (float(echo_time1), float(echo_time2)),
            "delta_te_s": dte}
    return _finish(dphi, m1, m2, delta_te=dte, info=info, zooms=zooms, smoothing_fwhm_mm=smoothing_fwhm_mm,
                   mag_key="magnitude1", file=file)


def field_from_two_phases(phase1: Any, phase2: Any, magnitude1: Any, magnitude2: Any, *, echo_time1: Any,
                          echo_time2: Any, scaling: Any = PhaseScaling.AUTO, zooms: Any = None,
                          smoothing_fwhm_mm: float | None = None, file: Any = None) -> FieldEstimate:
    """Field map from BIDS ``phase1``/``phase2`` images.

    The phase difference is ``arg(z2 conj(z1))`` (complex domain), never the
    difference of the wrapped phases.

    Parameters
    ----------
    phase1, phase2 : array_like, shape (X, Y, Z)
        Wrapped phases of the two echoes, radians or integer-coded (each
        detected separately under ``"auto"``).
    magnitude1, magnitude2 : array_like, shape (X, Y, Z)
        Magnitudes of the two echoes.
    echo_time1, echo_time2 : float
        BIDS ``EchoTime`` of each phase sidecar, s.
    scaling, zooms, smoothing_fwhm_mm :
        As in :func:`field_from_phasediff`.
    file : str or mapping, optional
        File name, or a mapping from role (``"phase1"``, ``"phase2"``,
        ``"magnitude1"``, ``"magnitude2"``) to file name.

    Returns
    -------
    FieldEstimate
    """
    f1, f2 = _file(file, "phase1"), _file(file, "phase2")
    dte = _delta_te(echo_time1, echo_time2, keys=("EchoTime", "EchoTime"), files=(f1, f2))
    p1 = _volume(phase1, key="phase1", file=f1)
    p2 = _volume(phase2, key="phase2", file=f2)
    if p2.shape != p1.shape:
        raise EpicorrInputError(f"shape {p2.shape} differs from the phase1 shape {p1.shape}", file=f2,
                                key="phase2", value=p2.shape, hint="both echoes must share one grid")
    if magnitude2 is None:
        raise EpicorrInputError("missing: the two-phases case needs magnitude2", file=_file(file, "magnitude2"),
                                key="magnitude2", hint="add the second-echo magnitude image")
    m1, m2 = _magnitudes(magnitude1, magnitude2, shape=p1.shape, key="magnitude1", file=file,
                         phase_key="phase1")
    r1, s1 = phase_to_radians(p1, scaling=scaling, key="phase1", file=f1)
    r2, s2 = phase_to_radians(p2, scaling=scaling, key="phase2", file=f2)
    dphi = complex_phase_difference(r1, r2)
    info = {"case": "two-phases", "phase_coding": {"phase1": s1, "phase2": s2},
            "echo_times_s": (float(echo_time1), float(echo_time2)), "delta_te_s": dte}
    return _finish(dphi, m1, m2, delta_te=dte, info=info, zooms=zooms, smoothing_fwhm_mm=smoothing_fwhm_mm,
                   mag_key="magnitude1", file=file)


def field_from_fieldmap(fieldmap: Any, magnitude: Any, *, units: Any, zooms: Any = None,
                        smoothing_fwhm_mm: float | None = None, file: Any = None) -> FieldEstimate:
    """Field estimate from a direct BIDS ``fieldmap``.

    Parameters
    ----------
    fieldmap : array_like, shape (X, Y, Z)
        Field map in ``units`` (already unwrapped).
    magnitude : array_like, shape (X, Y, Z)
        The accompanying ``magnitude`` image.
    units : FieldUnits or str
        BIDS ``Units``: ``"Hz"``, ``"rad/s"`` or ``"T"`` (``T`` converted with
        42.577478 MHz/T).
    zooms, smoothing_fwhm_mm, file :
        As in :func:`field_from_phasediff` (roles ``"fieldmap"``, ``"magnitude"``).

    Returns
    -------
    FieldEstimate
        ``sigma_hz`` is estimated from the field itself (no echo times are
        known): the local root-mean-square of the residual from a 3x3x3
        median, Gaussian-averaged (sigma 1.5 voxels), inside the mask; outside
        it, the 99th percentile of the inside values.
    """
    ffile = _file(file, "fieldmap")
    data = _volume(fieldmap, key="fieldmap", file=ffile)
    m1, _ = _magnitudes(magnitude, None, shape=data.shape, key="magnitude", file=file, phase_key="fieldmap")
    hz = fieldmap_to_hz(data, units=units, file=ffile)
    finite = np.isfinite(hz)
    if not finite.any() or not np.any(hz[finite] != 0):
        raise EpicorrInputError("field map is empty (all zeros or not finite)", file=ffile, key="fieldmap",
                                hint="check that the right file was given")
    head, _, _, minfo = _prepare_mask(m1, key="magnitude", file=_file(file, "magnitude"))
    # A direct field map is already unwrapped: keep it over the whole head mask.
    reliable = head & finite
    info = {"case": "fieldmap", "units": parse_option(FieldUnits, units, name="Units").value, "mask": minfo}
    f, n_spikes = despike(np.where(finite, hz, 0.0), reliable, floor_hz=FIELDMAP_SPIKE_FLOOR_HZ)
    info["spikes_replaced"] = n_spikes
    f, info["extrapolation"] = extrapolate_harmonic(f, reliable)
    f = _maybe_smooth(f, smoothing_fwhm_mm, zooms, info)
    med = ndi.median_filter(f, size=3, mode="nearest")
    local = np.sqrt(ndi.gaussian_filter((f - med) ** 2, 1.5, mode="nearest"))
    cap = float(np.percentile(local[reliable], 99)) if reliable.any() else float(local.max())
    sigma = np.where(reliable, local, cap)
    info["sigma_method"] = "local RMS residual from a 3x3x3 median (no echo times for a direct field map)"
    info["head_voxels"] = int(head.sum())
    return FieldEstimate(field_hz=f, sigma_hz=sigma, mask=reliable, magnitude=np.abs(m1), info=info)
