"""Phase image coding: radians or scanner integers.

Phase images reach us in one of two codings:

* **radians**: floating-point values within ``[-pi, pi]`` (or ``[0, 2 pi]``);
* **integer coding**: whole numbers on a 12-bit scale where the full range of
  the scale spans ``2 pi``.  Signed data use ``-4096..4095`` (8192 levels,
  ``phi = v * pi / 4096``); unsigned data ``0..4095`` (4096 levels,
  ``phi = v * 2 pi / 4096``).  Both are common practice on clinical scanners.

Detection looks at the data range (finite voxels only):

* range within ``[-pi, 2 pi]`` (with a small tolerance) and not all whole
  numbers -> radians;
* all whole numbers within ``[-4096, 8191]`` spanning more than
  :data:`MIN_INTEGER_SPAN` levels -> integer coding;
* anything else (e.g. a range of 0..40, or non-integers up to 4000, or whole
  numbers spanning only a few levels) is **ambiguous** and refused: the user
  must name the coding (:class:`epicorr.options.PhaseScaling`).

Offsets of the coding do not matter: only the phase modulo ``2 pi`` is used.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..errors import EpicorrInputError
from ..options import PhaseScaling, parse_option

__all__ = ["phase_to_radians", "MIN_INTEGER_SPAN"]

#: Smallest spread (max - min) of whole-number data accepted as integer coding
#: without an explicit override (common practice: a real phase image of a head
#: spans nearly the full 2 pi, i.e. thousands of levels).
MIN_INTEGER_SPAN = 256
_TOL = 1e-3  # radians of slack on the radian range (float32 rounding)


def _finite_values(data: np.ndarray, *, key: str, file: Any) -> np.ndarray:
    finite = data[np.isfinite(data)]
    if finite.size == 0:
        raise EpicorrInputError("phase image has no finite values", file=file, key=key,
                                hint="check that the right file was given")
    if not np.any(finite != 0):
        raise EpicorrInputError("phase image is all zeros", file=file, key=key,
                                hint="the phase was probably not saved; re-export the phase series")
    return finite


def phase_to_radians(data: Any, *, scaling: Any = PhaseScaling.AUTO, key: str = "phase",
                     file: Any = None) -> tuple[np.ndarray, dict]:
    """Convert a phase image to radians.

    Parameters
    ----------
    data : array_like, shape (X, Y, Z)
        Phase image, radians or integer-coded.  Non-finite voxels become 0.
    scaling : PhaseScaling or str
        ``"auto"`` (detect from the range), ``"radians"`` or ``"integer"``.
    key, file : str, optional
        Names used in error messages (e.g. ``"phasediff"`` and the file).

    Returns
    -------
    radians : ndarray, shape (X, Y, Z), float64
        Phase wrapped into ``(-pi, pi]``.
    info : dict
        ``{"scaling": "radians" | "integer", "levels": 8192 | 4096 | None,
        "detected": bool, "range": (min, max)}``.

    Raises
    ------
    EpicorrInputError
        All zeros, no finite values, ambiguous range (under ``auto``), or data
        that contradict the explicit coding.
    """
    scaling = parse_option(PhaseScaling, scaling, name="phase scaling", file=file)
    arr = np.asarray(data, dtype=np.float64)
    finite = _finite_values(arr, key=key, file=file)
    lo, hi = float(finite.min()), float(finite.max())
    whole = bool(np.all(finite == np.round(finite)))
    span = hi - lo
    fits_radians = lo >= -math.pi - _TOL and hi <= 2 * math.pi + _TOL
    fits_integer = whole and lo >= -4096 and hi <= 8191

    detected = scaling is PhaseScaling.AUTO
    if detected:
        if fits_radians and not (whole and span >= 1):
            scaling = PhaseScaling.RADIANS
        elif fits_integer and span >= MIN_INTEGER_SPAN:
            scaling = PhaseScaling.INTEGER
        else:
            raise EpicorrInputError(
                f"cannot tell the phase coding from the data range {lo:g}..{hi:g} "
                f"({'whole numbers' if whole else 'not whole numbers'})", file=file, key=key,
                value=(lo, hi),
                hint="expected radians within [-pi, 2 pi] or integers such as -4096..4095; "
                     "give the coding explicitly (phase scaling 'radians' or 'integer')")
    if scaling is PhaseScaling.RADIANS:
        if not fits_radians:
            raise EpicorrInputError(f"values {lo:g}..{hi:g} are not radians within [-pi, 2 pi]",
                                    file=file, key=key, value=(lo, hi),
                                    hint="use phase scaling 'integer' or 'auto'")
        levels = None
        rad = arr
    else:
        if not fits_integer:
            raise EpicorrInputError(f"values {lo:g}..{hi:g} are not a 12-bit integer phase coding",
                                    file=file, key=key, value=(lo, hi),
                                    hint="use phase scaling 'radians' or 'auto'")
        levels = 8192 if (lo < 0 or hi > 4096) else 4096
        rad = arr * (2 * math.pi / levels)
    rad = np.where(np.isfinite(rad), rad, 0.0)
    wrapped = np.angle(np.exp(1j * rad))
    info = {"scaling": scaling.value, "levels": levels, "detected": detected, "range": (lo, hi)}
    return wrapped, info
