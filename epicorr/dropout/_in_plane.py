"""In-plane dephasing in EPI: echo shifts along phase encode and readout.

Phase-encode direction (Deichmann et al. 2002; Weiskopf et al. 2006)
--------------------------------------------------------------------
Line ``n`` of the EPI readout is acquired at ``t_n = TE + (n - n_c) Δt``
(``Δt`` the effective echo spacing, s; ``n_c`` the line at the k-space
centre) with PE wavenumber ``k_n = polarity (n - n_c) / (N dy)`` cycles/mm
(``N`` reconstructed PE lines, ``dy`` the voxel size along PE in mm).  A local
field gradient ``G`` (Hz/mm, along increasing PE index) adds the wavenumber
``G t`` at time ``t``.  The local echo (total wavenumber 0) therefore occurs
at

    ``TE_eff = TE / Q``,   ``Q = 1 + polarity * Δt * N * dy * G``.

``Δt N`` is the displacement in voxels per Hz (``voxels_per_hz`` of
:mod:`epicorr.geometry`) and ``dy G`` the field change in Hz per voxel, so
``Q`` is dimensionless and equals the Jacobian ``1 + dd/dy`` of the
displacement ``d = polarity * field * Δt N`` of :mod:`epicorr.displacement`:
``Q > 1`` is local stretching (echo earlier), ``Q < 1`` compression (echo
later); flipping the PE polarity turns one into the other.

The echo moves by ``s = (TE_eff - TE) / Δt`` lines from the k-space centre.
While it stays inside the acquired lines the k-space centre of the local
signal is still sampled and (for a region large compared with a voxel) the
voxel signal survives; the intensity change ``1/Q`` is geometric and undone
by Jacobian-modulated unwarping, so it is *not* counted as loss here.  When
the echo leaves the acquisition window (``s`` beyond the first or last line
by more than half a line), or never forms (``Q <= 0``), the signal is lost.
Optionally, with ``t2star`` given, the delay of a late echo costs
``exp(-(TE_eff - TE) / T2*)`` (clipped at 1: an early echo is not counted
as a gain).

Readout direction (Weiskopf et al. 2007)
----------------------------------------
A gradient ``G_ro`` (Hz/mm) along the readout adds the wavenumber
``G_ro TE_eff`` when the k-space centre line is read; each readout line
covers ``±1 / (2 dx)`` cycles/mm.  The local echo falls outside the readout
window, and the signal is lost, when ``|G_ro| dx TE_eff > 1/2``.  Readout
lines alternate in direction, so the condition does not depend on a sign.

References
----------
Deichmann R, Josephs O, Hutton C, Corfield DR, Turner R. Compensation of
susceptibility-induced BOLD sensitivity losses in echo-planar fMRI imaging.
NeuroImage 2002;15:120-135.

Weiskopf N, Hutton C, Josephs O, Deichmann R. Optimal EPI parameters for
reduction of susceptibility-induced BOLD sensitivity losses: a whole-brain
analysis at 3 T and 1.5 T. NeuroImage 2006;33:493-504.

Weiskopf N, Hutton C, Josephs O, Turner R, Deichmann R. Optimized EPI for
fMRI studies of the orbitofrontal cortex: compensation of
susceptibility-induced gradients in the readout direction. MAGMA
2007;20:39-49.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..errors import EpicorrInputError

__all__ = ["pe_echo_factor", "pe_echo_shift_lines", "pe_retained", "readout_retained"]


def _positive(value: Any, *, key: str) -> float:
    v = float(value)
    if not (math.isfinite(v) and v > 0):
        raise EpicorrInputError("must be a positive, finite number", key=key, value=value)
    return v


def pe_echo_factor(gradient_pe_hz_per_mm: Any, *, polarity: int, effective_echo_spacing: float,
                   n_pe: int, voxel_size_pe_mm: float) -> np.ndarray:
    """Echo-time factor ``Q = 1 + polarity Δt N dy G`` (dimensionless).

    Parameters
    ----------
    gradient_pe_hz_per_mm : array, Hz/mm
        Field gradient along increasing index of the PE array axis.
    polarity : int
        ``+1`` (``j``) or ``-1`` (``j-``), from :class:`epicorr.geometry.PEDirection`.
    effective_echo_spacing : float, s
        ``Δt``.
    n_pe : int
        Reconstructed PE lines ``N``.
    voxel_size_pe_mm : float, mm
        ``dy``, voxel size along the PE axis.

    Returns
    -------
    q : array of the input's shape
        The local echo occurs at ``TE / q``; ``q`` is the displacement Jacobian.
    """
    if polarity not in (1, -1):
        raise EpicorrInputError("polarity must be +1 or -1", key="PhaseEncodingDirection",
                                value=polarity)
    ees = _positive(effective_echo_spacing, key="EffectiveEchoSpacing")
    n = _positive(n_pe, key="n_pe")
    dy = _positive(voxel_size_pe_mm, key="voxel_size_pe_mm")
    g = np.asarray(gradient_pe_hz_per_mm, dtype=np.float64)
    return 1.0 + polarity * ees * n * dy * g


def pe_echo_shift_lines(q: Any, *, echo_time: float, effective_echo_spacing: float) -> np.ndarray:
    """Echo shift ``(TE/Q - TE) / Δt`` in PE lines (``+inf`` where ``Q <= 0``)."""
    te = _positive(echo_time, key="EchoTime")
    ees = _positive(effective_echo_spacing, key="EffectiveEchoSpacing")
    q = np.asarray(q, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        shift = np.where(q > 0, (te / np.where(q > 0, q, 1.0) - te) / ees, np.inf)
    return shift


def pe_retained(q: Any, *, echo_time: float, effective_echo_spacing: float, n_pe: int,
                lines_before_centre: int | None = None, t2star: float | None = None) -> np.ndarray:
    """Signal retained along PE given the echo factor ``Q``.

    Parameters
    ----------
    q : array
        From :func:`pe_echo_factor`.
    echo_time : float, s
        Nominal ``TE`` (time of the k-space centre line).
    effective_echo_spacing : float, s
        ``Δt``.
    n_pe : int
        Reconstructed PE lines ``N`` (the acquisition window spans ``N Δt``).
    lines_before_centre : int, optional
        Lines acquired before the k-space centre; default ``N // 2`` (full
        Fourier).  With partial Fourier pass the smaller number.
    t2star : float, s, optional
        If given, a delayed echo also loses ``exp(-(TE_eff - TE)/T2*)``.

    Returns
    -------
    retained : array of ``q``'s shape, in [0, 1]
        0 where the echo leaves the window or ``Q <= 0``; otherwise 1 (or the
        T2* factor).
    """
    n = int(n_pe)
    if n < 2:
        raise EpicorrInputError("need at least 2 phase-encode lines", key="n_pe", value=n_pe)
    before = n // 2 if lines_before_centre is None else int(lines_before_centre)
    if not 0 <= before < n:
        raise EpicorrInputError("must lie between 0 and n_pe - 1", key="lines_before_centre",
                                value=lines_before_centre)
    shift = pe_echo_shift_lines(q, echo_time=echo_time, effective_echo_spacing=effective_echo_spacing)
    inside = (shift >= -before - 0.5) & (shift <= (n - 1 - before) + 0.5)
    retained = inside.astype(np.float64)
    if t2star is not None:
        t2 = _positive(t2star, key="t2star")
        delay = np.where(inside, shift, 0.0) * float(effective_echo_spacing)
        retained = retained * np.minimum(1.0, np.exp(-np.maximum(delay, 0.0) / t2))
    return retained


def readout_retained(gradient_ro_hz_per_mm: Any, *, voxel_size_ro_mm: float,
                     effective_echo_time: Any) -> np.ndarray:
    """Readout-direction condition (Weiskopf et al. 2007): 1 if kept, 0 if lost.

    Parameters
    ----------
    gradient_ro_hz_per_mm : array, Hz/mm
        Field gradient along the readout array axis.
    voxel_size_ro_mm : float, mm
        ``dx``, voxel size along readout.
    effective_echo_time : float or array, s
        Time at which the k-space centre line is read for this voxel
        (``TE / Q``; use ``TE`` if unknown).  Non-finite or non-positive
        entries mean the PE echo never forms; they are returned as 0.

    Returns
    -------
    retained : array, 0 or 1
        0 where ``|G_ro| dx TE_eff > 1/2``.
    """
    dx = _positive(voxel_size_ro_mm, key="voxel_size_ro_mm")
    g = np.asarray(gradient_ro_hz_per_mm, dtype=np.float64)
    te = np.broadcast_to(np.asarray(effective_echo_time, dtype=np.float64), g.shape)
    ok = np.isfinite(te) & (te > 0)
    cycles = np.abs(g) * dx * np.where(ok, te, 0.0)
    return (ok & (cycles <= 0.5)).astype(np.float64)
