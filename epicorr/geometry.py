"""Acquisition geometry: phase-encode direction and readout scaling.

Conventions (used everywhere in the package)
--------------------------------------------
* Voxel axes are the array axes of the NIfTI data, called ``i, j, k`` (0, 1, 2).
  World coordinates are RAS+ millimetres given by the image affine.
* BIDS ``PhaseEncodingDirection`` (``i``, ``i-``, ``j``, ``j-``, ``k``, ``k-``)
  names an *array* axis, whatever the affine's orientation (BIDS
  specification, "Phase encoding direction").  ``PEDirection(axis=1,
  polarity=+1)`` is ``j``; ``polarity=-1`` is ``j-``.
* Sign convention: a positive field offset (Hz) moves signal towards
  increasing index along the PE axis when the polarity is ``+1``, and towards
  decreasing index when it is ``-1``.  In undistorted space the displacement
  in voxels is ``d = polarity * field_hz * voxels_per_hz``.

Readout scaling (Jezzard & Balaban 1995)
----------------------------------------
In EPI, successive phase-encode lines are acquired ``EffectiveEchoSpacing``
(``Δt``, seconds) apart.  A spin off resonance by ``Δf`` Hz accrues an extra
phase ``2π Δf n Δt`` on line ``n``; the phase-encode gradient imposes
``2π n y / N`` on a spin at voxel position ``y`` of an ``N``-line matrix.  The
two are indistinguishable, so the spin is reconstructed at
``y + Δf Δt N``: the pixel bandwidth along PE is ``1 / (Δt N)`` Hz per voxel
and the displacement is ``d = Δf * Δt * N`` voxels.  ``N`` is
``ReconMatrixPE`` when given (it includes partial Fourier and parallel
imaging effects already folded into ``EffectiveEchoSpacing``), otherwise the
image size along the PE axis.  When only ``TotalReadoutTime`` is known, the
BIDS relation ``TotalReadoutTime = EffectiveEchoSpacing * (ReconMatrixPE - 1)``
gives ``Δt``.

References
----------
Jezzard P, Balaban RS. Correction for geometric distortion in echo planar
images from B0 field variations. Magn Reson Med 1995;34:65-73.

BIDS specification, "Magnetic Resonance Imaging" / "Timing parameters":
``EffectiveEchoSpacing``, ``TotalReadoutTime``, ``PhaseEncodingDirection``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

from .errors import EpicorrInputError

__all__ = [
    "PEDirection",
    "parse_pe_direction",
    "ReadoutTiming",
    "readout_timing",
    "MAX_TOTAL_READOUT_S",
    "MAX_ECHO_SPACING_S",
    "MIN_ECHO_SPACING_S",
]

#: Longest plausible total readout time, s (common practice: EPI readouts are
#: tens of ms; anything over 0.5 s is a unit error or a corrupt sidecar).
MAX_TOTAL_READOUT_S = 0.5
#: Longest plausible effective echo spacing, s (common practice: 0.1-2 ms
#: at 1.5-7 T; 10 ms is a generous ceiling, catches values given in ms).
MAX_ECHO_SPACING_S = 0.01
#: Shortest plausible effective echo spacing, s (common practice: with
#: in-plane acceleration R<=8 and 0.2 ms raw spacing, about 25 µs; 1 µs floor).
MIN_ECHO_SPACING_S = 1e-6

_AXES = {"i": 0, "j": 1, "k": 2}
#: Largest ReconMatrixPE accepted: MAX_TOTAL_READOUT_S / MIN_ECHO_SPACING_S
#: already bounds N near 5e5, so anything above 1e6 is a corrupt sidecar.
_MAX_RECON_MATRIX_PE = 1_000_000


@dataclass(frozen=True)
class PEDirection:
    """Phase-encode direction on the voxel array.

    Attributes
    ----------
    axis : int
        Array axis (0 = i, 1 = j, 2 = k).
    polarity : int
        ``+1`` for ``i``/``j``/``k``, ``-1`` for ``i-``/``j-``/``k-``.
    """

    axis: int
    polarity: int

    def __post_init__(self) -> None:
        if self.axis not in (0, 1, 2) or self.polarity not in (1, -1):
            raise EpicorrInputError("invalid phase-encode direction",
                                    key="PhaseEncodingDirection",
                                    value=(self.axis, self.polarity),
                                    hint="axis must be 0, 1 or 2 and polarity +1 or -1")

    @property
    def bids(self) -> str:
        """The BIDS code, e.g. ``"j-"``."""
        return "ijk"[self.axis] + ("" if self.polarity > 0 else "-")

    def reversed(self) -> "PEDirection":
        """The same axis with the opposite polarity."""
        return PEDirection(self.axis, -self.polarity)

    def __str__(self) -> str:  # pragma: no cover - trivial
        return self.bids


def parse_pe_direction(value: Any, *, file: Any = None,
                       key: str = "PhaseEncodingDirection") -> PEDirection:
    """Parse a BIDS ``PhaseEncodingDirection`` value.

    Parameters
    ----------
    value : str
        One of ``i``, ``i-``, ``j``, ``j-``, ``k``, ``k-`` (BIDS specification).
    file, key : optional
        Where the value came from, for the error message.

    Returns
    -------
    PEDirection
        The voxel-array axis and polarity.  The affine plays no part: BIDS
        defines the code on the data array.

    Raises
    ------
    EpicorrInputError
        For anything else (including the world-axis letters ``x``/``y`` or
        the legacy ``y-``), naming the key and the value.
    """
    if isinstance(value, PEDirection):
        return value
    if isinstance(value, str):
        text = value.strip()
        if text and text[0] in _AXES and text[1:] in ("", "-"):
            return PEDirection(_AXES[text[0]], -1 if text.endswith("-") else 1)
    raise EpicorrInputError("not a BIDS phase-encoding direction", file=file, key=key,
                            value=value, hint="use one of 'i', 'i-', 'j', 'j-', 'k', 'k-'")


def _positive_finite(value: Any, *, key: str, file: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise EpicorrInputError("must be a number in seconds", file=file, key=key, value=value,
                                hint="fix the sidecar")
    try:
        v = float(value)
    except OverflowError:  # a JSON integer beyond float range
        v = math.inf
    if not math.isfinite(v) or v <= 0:
        raise EpicorrInputError("must be a positive, finite number of seconds", file=file,
                                key=key, value=value, hint="fix the sidecar")
    return v


@dataclass(frozen=True)
class ReadoutTiming:
    """Phase-encode timing of an EPI readout.

    Attributes
    ----------
    effective_echo_spacing : float
        Seconds between successive reconstructed PE lines (``Δt``).
    n_pe : int
        Number of reconstructed PE lines ``N``.
    sources : dict
        Where each value came from, e.g. ``{"effective_echo_spacing":
        "sidecar EffectiveEchoSpacing", "n_pe": "image shape along j"}``.
    """

    effective_echo_spacing: float
    n_pe: int
    sources: dict = field(default_factory=dict, compare=False)

    @property
    def voxels_per_hz(self) -> float:
        """Displacement along PE per Hz of off-resonance, voxels/Hz (= ``Δt N``)."""
        return self.effective_echo_spacing * self.n_pe

    @property
    def total_readout_time(self) -> float:
        """BIDS ``TotalReadoutTime`` = ``Δt (N - 1)``, seconds."""
        return self.effective_echo_spacing * (self.n_pe - 1)

    @property
    def pixel_bandwidth_pe(self) -> float:
        """Bandwidth per voxel along PE, Hz (``1 / (Δt N)``)."""
        return 1.0 / self.voxels_per_hz


def readout_timing(metadata: Mapping[str, Any], *, n_pe_image: int, file: Any = None) -> ReadoutTiming:
    """Derive the PE readout timing from BIDS metadata.

    Parameters
    ----------
    metadata : mapping
        A BIDS sidecar.  Uses ``EffectiveEchoSpacing`` (s) when present, else
        ``TotalReadoutTime`` (s) through ``Δt = TotalReadoutTime / (N - 1)``
        (BIDS specification); ``ReconMatrixPE`` for ``N`` when present.
    n_pe_image : int
        Image size along the PE axis, used for ``N`` when ``ReconMatrixPE`` is absent.
    file : optional
        The sidecar's path, for error messages.

    Returns
    -------
    ReadoutTiming

    Raises
    ------
    EpicorrInputError
        When both timing keys are absent, or a value is zero, negative,
        non-finite, or absurd (``TotalReadoutTime`` over 0.5 s or an echo
        spacing over 10 ms, which usually means milliseconds were written).
        When both keys are given and disagree by more than 1 %, also an error.
    """
    sources: dict[str, str] = {}
    n_key = "ReconMatrixPE"
    if n_key in metadata and metadata[n_key] is not None:
        raw = metadata[n_key]
        if isinstance(raw, bool) or not isinstance(raw, (int, float)) \
                or not (isinstance(raw, int) or math.isfinite(raw)) \
                or raw != int(raw) or not 2 <= int(raw) <= _MAX_RECON_MATRIX_PE:
            raise EpicorrInputError(f"must be a whole number from 2 to {_MAX_RECON_MATRIX_PE}",
                                    file=file, key=n_key,
                                    value=raw, hint="fix the sidecar or remove the key")
        n_pe = int(raw)
        sources["n_pe"] = f"sidecar {n_key}"
    else:
        if int(n_pe_image) < 2:
            raise EpicorrInputError("image has fewer than 2 voxels along the phase-encode axis",
                                    file=file, key="PhaseEncodingDirection", value=n_pe_image,
                                    hint="check PhaseEncodingDirection against the image shape")
        n_pe = int(n_pe_image)
        sources["n_pe"] = "image size along the phase-encode axis"

    ees = trt = None
    if metadata.get("EffectiveEchoSpacing") is not None:
        ees = _positive_finite(metadata["EffectiveEchoSpacing"], key="EffectiveEchoSpacing", file=file)
        if ees > MAX_ECHO_SPACING_S:
            raise EpicorrInputError(f"over {MAX_ECHO_SPACING_S * 1e3:g} ms, which is not plausible for EPI",
                                    file=file, key="EffectiveEchoSpacing", value=metadata["EffectiveEchoSpacing"],
                                    hint="BIDS wants seconds (was it written in ms?)")
        if ees < MIN_ECHO_SPACING_S:
            raise EpicorrInputError("under 1 µs, which is not plausible for EPI", file=file,
                                    key="EffectiveEchoSpacing", value=metadata["EffectiveEchoSpacing"],
                                    hint="BIDS wants seconds")
    if metadata.get("TotalReadoutTime") is not None:
        trt = _positive_finite(metadata["TotalReadoutTime"], key="TotalReadoutTime", file=file)
        if trt > MAX_TOTAL_READOUT_S:
            raise EpicorrInputError(f"over {MAX_TOTAL_READOUT_S:g} s, which is not plausible for EPI",
                                    file=file, key="TotalReadoutTime", value=metadata["TotalReadoutTime"],
                                    hint="BIDS wants seconds (was it written in ms?)")
    if ees is None and trt is None:
        raise EpicorrInputError("missing: neither EffectiveEchoSpacing nor TotalReadoutTime is given",
                                file=file, key="EffectiveEchoSpacing",
                                hint="add one of them (in seconds) to the sidecar")
    if ees is not None:
        sources["effective_echo_spacing"] = "sidecar EffectiveEchoSpacing"
        if trt is not None:
            implied = ees * (n_pe - 1)
            if abs(implied - trt) > 0.01 * trt:
                raise EpicorrInputError(
                    f"contradicts EffectiveEchoSpacing={ees!r} with N={n_pe} "
                    f"(which implies {implied:.6g} s)", file=file, key="TotalReadoutTime",
                    value=metadata["TotalReadoutTime"], hint="fix or remove one of the two keys")
    else:
        ees = trt / (n_pe - 1)
        sources["effective_echo_spacing"] = "sidecar TotalReadoutTime / (N - 1)"
        if ees > MAX_ECHO_SPACING_S:
            raise EpicorrInputError("implies an echo spacing over 10 ms", file=file,
                                    key="TotalReadoutTime", value=metadata["TotalReadoutTime"],
                                    hint="BIDS wants seconds")
        if ees < MIN_ECHO_SPACING_S:
            raise EpicorrInputError(f"implies an echo spacing under 1 µs with N={n_pe}", file=file,
                                    key="TotalReadoutTime", value=metadata["TotalReadoutTime"],
                                    hint="check ReconMatrixPE and the units (seconds)")
    if ees * (n_pe - 1) > MAX_TOTAL_READOUT_S:
        from_sidecar = sources["n_pe"].startswith("sidecar")
        raise EpicorrInputError(f"implies a total readout over {MAX_TOTAL_READOUT_S:g} s "
                                f"(EffectiveEchoSpacing={ees!r}, N={n_pe})", file=file,
                                key=n_key if from_sidecar else "EffectiveEchoSpacing",
                                value=n_pe if from_sidecar else ees,
                                hint="check ReconMatrixPE and the units (seconds)")
    return ReadoutTiming(effective_echo_spacing=ees, n_pe=n_pe, sources=sources)
