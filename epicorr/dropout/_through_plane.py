"""Through-plane dephasing: signal retained across the excited slice.

Model
-----
A field that varies linearly across the slice, ``f(z) = f0 + Gz z``
(``Gz`` in Hz/mm, ``z`` in mm from the slice centre), gives the spins at
``z`` the phase ``2π Gz z TE`` at the echo time ``TE`` (s).  The voxel signal
is the slice-profile-weighted sum of those phases,

    ``S / S0 = | ∫ p(z) exp(i 2π Gz z TE) dz | / ∫ p(z) dz``,

the Fourier transform of the slice profile ``p`` at ``Gz TE`` cycles/mm.

* Rectangular profile of thickness ``dz`` (mm):
  ``S / S0 = |sinc(Gz dz TE)|`` with ``sinc(x) = sin(π x) / (π x)``; the
  signal vanishes first when the phase spread across the slice is one full
  cycle, ``Gz dz TE = 1``.
* Gaussian profile whose full width at half maximum is ``dz``
  (``p(z) = exp(-4 ln2 z² / dz²)``): the exponential form of Deichmann et
  al. (2002), ``S / S0 = exp(-(π Gz dz TE)² / (4 ln 2))``, which is
  ``exp(-(γ Gs Δz TE)² / (16 ln 2))`` when written with the gradient ``Gs``
  in T/m and ``γ`` in rad/s/T (the two forms are the same; derived here, and
  the 16 ln 2 form is from memory of the paper).

The slice axis is a voxel array axis (``i``, ``j`` or ``k``); ``Gz`` is the
field derivative along increasing index of that axis, per mm travelled
along the axis (see :mod:`epicorr.dropout._gradient`).  The sign of ``Gz``
does not matter here.

References
----------
Deichmann R, Josephs O, Hutton C, Corfield DR, Turner R. Compensation of
susceptibility-induced BOLD sensitivity losses in echo-planar fMRI imaging.
NeuroImage 2002;15:120-135.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..errors import EpicorrInputError
from ..options import SliceProfile, parse_option

__all__ = ["through_plane_retained"]


def through_plane_retained(gradient_hz_per_mm: Any, *, slice_thickness_mm: float,
                           echo_time: float,
                           profile: SliceProfile | str = SliceProfile.RECTANGULAR) -> np.ndarray:
    """Fraction of the signal retained after dephasing across the slice.

    Parameters
    ----------
    gradient_hz_per_mm : array, Hz/mm
        Field gradient along the slice direction (any shape).
    slice_thickness_mm : float, mm
        Excited slice thickness ``dz`` (the FWHM for a Gaussian profile).
    echo_time : float, s
        Echo time ``TE``.
    profile : SliceProfile or str
        ``"rectangular"`` (|sinc|) or ``"gaussian"`` (Deichmann et al. 2002).

    Returns
    -------
    retained : array of the input's shape, in [0, 1]
    """
    prof = parse_option(SliceProfile, profile, name="profile")
    dz = float(slice_thickness_mm)
    te = float(echo_time)
    if not (math.isfinite(dz) and dz > 0):
        raise EpicorrInputError("slice thickness must be a positive number of mm",
                                key="SliceThickness", value=slice_thickness_mm)
    if not (math.isfinite(te) and te > 0):
        raise EpicorrInputError("echo time must be a positive number of seconds",
                                key="EchoTime", value=echo_time)
    cycles = np.asarray(gradient_hz_per_mm, dtype=np.float64) * dz * te
    if prof is SliceProfile.RECTANGULAR:
        return np.abs(np.sinc(cycles))  # numpy's sinc is sin(pi x)/(pi x)
    return np.exp(-(math.pi * cycles) ** 2 / (4.0 * math.log(2.0)))
