"""Combining phase images and converting direct field maps.

Two phases (BIDS ``phase1``/``phase2``)
---------------------------------------
The phase difference between the echoes is formed in the complex domain,
``dphi = arg(z2 * conj(z1))`` with ``z_n = m_n exp(i phi_n)``, which is
already wrapped into ``(-pi, pi]``; subtracting two wrapped phases instead
would add spurious ``2 pi`` jumps wherever either echo wraps (Bernstein,
King & Zhou 2004, ch. 13).

Direct field maps (BIDS ``fieldmap`` with ``Units``)
----------------------------------------------------
``Hz`` is kept; ``rad/s`` is divided by ``2 pi``; ``T`` is multiplied by the
proton gyromagnetic ratio over ``2 pi``, ``42.577478 MHz/T`` (CODATA 2018).

References
----------
Bernstein MA, King KF, Zhou XJ. Handbook of MRI Pulse Sequences. Elsevier
2004 (phase-difference mapping, complex-domain combination).

BIDS specification, "Fieldmap data" (``Units`` of a ``fieldmap``).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..constants import GAMMA_BAR_HZ_PER_T
from ..errors import EpicorrInputError
from ..options import FieldUnits, parse_option

__all__ = ["complex_phase_difference", "fieldmap_to_hz"]


def complex_phase_difference(phase1: Any, phase2: Any, *, magnitude1: Any = None,
                             magnitude2: Any = None) -> np.ndarray:
    """Phase of echo 2 relative to echo 1, via the conjugate product.

    Parameters
    ----------
    phase1, phase2 : array_like, shape (X, Y, Z)
        Wrapped phases in radians.
    magnitude1, magnitude2 : array_like, optional
        Magnitudes; they do not change the angle of a single voxel's product
        and are accepted for symmetry (zero magnitude gives angle 0).

    Returns
    -------
    ndarray, shape (X, Y, Z), float64
        ``arg(exp(i phase2) * conj(exp(i phase1)))`` in ``(-pi, pi]``.
    """
    p1 = np.asarray(phase1, dtype=np.float64)
    p2 = np.asarray(phase2, dtype=np.float64)
    z = np.exp(1j * p2) * np.conj(np.exp(1j * p1))
    if magnitude1 is not None and magnitude2 is not None:
        z = z * (np.asarray(magnitude1, dtype=np.float64) * np.asarray(magnitude2, dtype=np.float64))
    return np.angle(z)


def fieldmap_to_hz(fieldmap: Any, *, units: Any, file: Any = None) -> np.ndarray:
    """Convert a direct field map to Hz.

    Parameters
    ----------
    fieldmap : array_like, shape (X, Y, Z)
        Field map in ``units``.
    units : FieldUnits or str
        BIDS ``Units``: ``"Hz"``, ``"rad/s"`` or ``"T"``.
    file : optional
        The sidecar, for error messages.

    Returns
    -------
    ndarray, shape (X, Y, Z), float64
        Off-resonance in Hz.

    Raises
    ------
    EpicorrInputError
        Unknown ``Units`` (naming the key and the value).
    """
    if units is None:
        raise EpicorrInputError("missing: a fieldmap sidecar needs Units", file=file, key="Units",
                                hint="add \"Units\": \"Hz\", \"rad/s\" or \"T\"")
    unit = parse_option(FieldUnits, units, name="Units", file=file)
    data = np.asarray(fieldmap, dtype=np.float64)
    if unit is FieldUnits.HZ:
        return data.copy()
    if unit is FieldUnits.RAD_PER_S:
        return data / (2 * math.pi)
    return data * GAMMA_BAR_HZ_PER_T
