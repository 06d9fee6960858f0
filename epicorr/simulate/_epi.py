"""2-D multi-slice echo-planar imaging formed in k-space.

For every slice and every readout column, each phase-encode (PE) line's
signal is the sum of the object over a grid ``pe_oversample`` times finer than
the image along PE and over ``n_subslices`` positions through the slice
thickness (rectangular slice profile), each sample carrying the Fourier
encoding phase of its position and the off-resonance phase accrued by the time
that line is acquired:

    s(ky) = sum_j a_j exp(-2 pi i [ky y_j / N + f_j t(ky)])

with ``ky = -N/2 .. N/2-1`` and ``t(ky)`` the line's time: the centre line is
acquired at the echo time and successive lines ``EffectiveEchoSpacing`` apart,
in increasing ``ky`` for PE polarity ``+1`` and decreasing ``ky`` for ``-1``.
For a gradient echo ``t`` counts from excitation (``TE + polarity * ky * EES``),
so static phase accrued over TE dephases the sub-slices and sub-voxels
(through-plane dropout); for a spin echo the static phase is refocused at TE and
only ``polarity * ky * EES`` remains.  The image is the inverse DFT over ``ky``.
Geometric shift, pile-up and dropout all come out of this one sum: nothing in
here uses the pixel-shift formula.

With in-plane acceleration ``R``, lines ``ky = 0 (mod R)`` are acquired
``R * EES`` apart and ideal parallel-imaging reconstruction fills the others
with the data at the time interpolated between their neighbours (BIDS: the
effective echo spacing already includes the acceleration).

The object is modelled as the periodic linear interpolation of its samples
along PE; the k-space transfer function of that model is divided out, so a
zero field reproduces the object exactly.  No intravoxel dephasing along the
readout axis and no T2* decay during the readout are modelled.

References
----------
Jezzard P, Balaban RS. Correction for geometric distortion in echo planar
images from B0 field variations. Magn Reson Med 1995;34:65-73.

Bernstein MA, King KF, Zhou XJ. Handbook of MRI Pulse Sequences. Elsevier
2004; chapter 16 (echo planar imaging).
"""

from __future__ import annotations

import numpy as np

from ..errors import EpicorrInputError
from ..geometry import PEDirection, parse_pe_direction
from ..options import EchoKind, parse_option
from ._interp import cubic_matrix, linear_matrix

__all__ = ["simulate_epi", "true_retained_signal", "line_times"]


def _voxel_sizes(affine) -> np.ndarray:
    return np.sqrt(np.sum(np.asarray(affine, float)[:3, :3] ** 2, axis=0))


def _cis(cycles):
    """``exp(-2 pi i cycles)`` through real cos/sin (faster than a complex exp)."""
    ang = 2 * np.pi * cycles
    return np.cos(ang) - 1j * np.sin(ang)


def line_times(n_pe: int, *, pe: PEDirection, effective_echo_spacing: float, acceleration: int = 1) -> np.ndarray:
    """Acquisition time of each PE line relative to the echo time, s.

    Parameters
    ----------
    n_pe : int
        Number of reconstructed PE lines ``N``; line ``n`` has ``ky = n - N // 2``.
    pe : PEDirection
        Polarity ``+1`` traverses ``ky`` upwards, ``-1`` downwards.
    effective_echo_spacing : float
        Effective spacing, s (raw spacing / acceleration).
    acceleration : int
        In-plane acceleration ``R``: acquired lines are ``ky = 0 (mod R)``.

    Returns
    -------
    (N,) ndarray
        ``t(ky) - TE``; the centre line (``ky = 0``) is at 0.
    """
    ky = np.arange(n_pe) - n_pe // 2
    r = int(acceleration)
    if r < 1:
        raise EpicorrInputError("must be a whole number >= 1", key="acceleration", value=acceleration)
    acquired = ky[ky % r == 0]
    order = acquired if pe.polarity > 0 else acquired[::-1]
    raw = r * float(effective_echo_spacing)
    t_acq = (np.arange(order.size) - int(np.nonzero(order == 0)[0][0])) * raw
    t_by_ky = dict(zip(order.tolist(), t_acq.tolist()))
    known_ky = np.array(sorted(t_by_ky))
    known_t = np.array([t_by_ky[k] for k in known_ky])
    # missing lines: ideal parallel-imaging fill at the interpolated (or extrapolated) time
    slope = (known_t[-1] - known_t[0]) / max(known_ky[-1] - known_ky[0], 1)
    t = np.interp(ky, known_ky, known_t)
    t = np.where(ky < known_ky[0], known_t[0] + (ky - known_ky[0]) * slope, t)
    t = np.where(ky > known_ky[-1], known_t[-1] + (ky - known_ky[-1]) * slope, t)
    return t


def _subslice_offsets(n_sub: int, thickness_vox: float) -> np.ndarray:
    return ((np.arange(n_sub) + 0.5) / n_sub - 0.5) * thickness_vox


def simulate_epi(obj, field_hz, *, pe, effective_echo_spacing, echo_time, affine=None, slice_axis=2,
                 slice_thickness_mm=None, pe_oversample=4, n_subslices=5, acceleration=1,
                 kind="spin-echo", snr=None, mask=None, seed=0, return_complex=False) -> np.ndarray:
    """Simulate a 2-D multi-slice EPI volume from an object and a field map.

    Parameters
    ----------
    obj : Head or (I, J, K) array
        The undistorted object; for a :class:`Head`, ``head.epi_contrast`` (and its
        affine and brain mask).  Real or complex.
    field_hz : (I, J, K) array
        Off-resonance field, Hz, on the object's grid.
    pe : PEDirection or str
        Phase-encode axis and polarity (BIDS code such as ``"j-"`` accepted).
    effective_echo_spacing : float
        Seconds between reconstructed PE lines.
    echo_time : float
        TE, s (time of the ``ky = 0`` line).
    affine : (4, 4) array, optional
        Voxel -> world of the grid (taken from a Head; identity = 1 mm voxels otherwise).
    slice_axis : int
        Array axis of the slice direction (must differ from the PE axis).
    slice_thickness_mm : float, optional
        Rectangular slice profile width; default the voxel size along ``slice_axis``.
    pe_oversample : int
        Sub-samples per voxel along PE.
    n_subslices : int
        Samples through the slice thickness (midpoint rule).
    acceleration : int
        In-plane acceleration (see module notes).
    kind : {"spin-echo", "gradient-echo"} or EchoKind
    snr : float, optional
        When given, complex Gaussian noise is added with per-channel sigma =
        mean magnitude over the mask / ``snr`` (mask: the Head's brain mask, ``mask``,
        or voxels above 10 % of the maximum).
    mask : (I, J, K) bool array, optional
    seed : int
        Noise seed.
    return_complex : bool
        Return the complex image instead of its magnitude.

    Returns
    -------
    (I, J, K) ndarray
        The distorted image on the object's grid (magnitude, or complex).
    """
    pe = parse_pe_direction(pe)
    kind = parse_option(EchoKind, kind, name="kind")
    if hasattr(obj, "epi_contrast"):
        rho = np.asarray(obj.epi_contrast)
        affine = obj.affine if affine is None else affine
        mask = obj.brain_mask if mask is None else mask
    else:
        rho = np.asarray(obj)
    affine = np.eye(4) if affine is None else np.asarray(affine, float)
    f = np.asarray(field_hz, float)
    if f.shape != rho.shape or rho.ndim != 3:
        raise EpicorrInputError("object and field must be 3-D arrays of the same shape",
                                key="field_hz", value=(rho.shape, f.shape))
    if slice_axis == pe.axis or slice_axis not in (0, 1, 2):
        raise EpicorrInputError("slice axis must be 0, 1 or 2 and differ from the PE axis",
                                key="slice_axis", value=slice_axis)
    ro_axis = 3 - slice_axis - pe.axis
    vox = _voxel_sizes(affine)
    thk = vox[slice_axis] if slice_thickness_mm is None else float(slice_thickness_mm)
    thk_vox = thk / vox[slice_axis]

    # arrange as (slice, readout, pe)
    order = (slice_axis, ro_axis, pe.axis)
    rho_t = np.transpose(rho, order)
    f_t = np.transpose(f, order)
    ns, nr, n = rho_t.shape
    p = max(int(pe_oversample), 1)
    q = max(int(n_subslices), 1)

    y_fine = (np.arange(n * p) + 0.5) / p - 0.5
    u_obj = linear_matrix(n, y_fine, periodic=True)            # (Np, N)
    u_fld = cubic_matrix(n, y_fine)                             # (Np, N)
    z_fine = (np.arange(ns)[:, None] + _subslice_offsets(q, thk_vox)[None, :]).ravel()
    s_fld = cubic_matrix(ns, z_fine).reshape(ns, q, ns)         # (ns, Q, ns)

    ky = np.arange(n) - n // 2
    tau = line_times(n, pe=pe, effective_echo_spacing=effective_echo_spacing, acceleration=acceleration)
    t = tau + (float(echo_time) if kind is EchoKind.GRADIENT_ECHO else 0.0)
    enc = (ky[:, None] * y_fine[None, :] / n).astype(np.float64)   # (N, Np) cycles
    # transfer function of the object model (impulse at y = 0), divided out below
    h = np.exp(-2j * np.pi * enc) @ u_obj[:, 0] / p
    recon = np.exp(2j * np.pi * ky[None, :] * np.arange(n)[:, None] / n) / n  # (N_y, N_ky)

    rho_fine = np.einsum("mn,srn->srm", u_obj, rho_t)          # (ns, nr, Np)
    # The line times are linear in ky (t = t0 + slope * ky), so each sample's
    # encoding exp(-2 pi i [ky y/N + f t]) is b * z**ky with z = exp(-2 pi i [y/N + f slope]).
    # s(ky) = sum_j b_j z_j**ky is evaluated exactly by splitting ky = ky0 + V u + v:
    # z**ky = z**ky0 * z**v * (z**V)**u, a matrix product over the samples j.
    slope = float(t[-1] - t[0]) / float(ky[-1] - ky[0]) if n > 1 else 0.0
    t0 = float(t[n // 2])
    if not np.allclose(t, t0 + slope * ky, rtol=0, atol=1e-12):
        raise EpicorrInputError("line times must be linear in ky", key="acceleration", value=acceleration)
    nv = int(np.ceil(np.sqrt(n)))
    nu = int(np.ceil(n / nv))
    out = np.empty((ns, nr, n), dtype=complex)
    for k in range(ns):
        # samples with no object contribute nothing: keep the readout columns and the
        # fine PE positions where the object is non-zero in this slice
        rows = np.nonzero(np.any(rho_fine[k] != 0, axis=1))[0]
        if rows.size == 0:
            out[k] = 0
            continue
        cols = np.nonzero(np.any(rho_fine[k][rows] != 0, axis=0))[0]        # fine PE indices
        nrk = rows.size
        # field at the sub-slices of slice k, fine along PE: (nrk, Q, m) -> (nrk, J)
        fz = np.einsum("qz,zrn->rqn", s_fld[k], f_t[:, rows])
        ff = np.einsum("mn,rqn->rqm", u_fld[cols], fz).reshape(nrk, -1)
        a = np.repeat(rho_fine[k][rows][:, None, cols], q, axis=1).reshape(nrk, -1) / (p * q)
        cyc = np.tile(y_fine[cols] / n, q)[None, :] + slope * ff        # cycles per unit ky
        jn = cyc.shape[1]
        z = _cis(cyc).astype(np.complex64)                             # (nrk, J)
        start = a * _cis(t0 * ff) if t0 else a.astype(complex)
        pv = np.empty((nrk, nv, jn), dtype=np.complex64)
        pv[:, 0] = start * _cis(ky[0] * cyc)                           # b z**ky0
        for v in range(1, nv):
            np.multiply(pv[:, v - 1], z, out=pv[:, v])
        zv = _cis(nv * cyc).astype(np.complex64)                       # z**V
        pu = np.empty((nrk, nu, jn), dtype=np.complex64)
        pu[:, 0] = 1
        for u in range(1, nu):
            np.multiply(pu[:, u - 1], zv, out=pu[:, u])
        pu = np.swapaxes(pu, 1, 2)
        sig = np.matmul(pv, pu)                                       # (nrk, V, U): ky0 + V u + v
        sig = np.swapaxes(sig, 1, 2).reshape(nrk, nu * nv)[:, :n]
        out[k] = 0
        out[k, rows] = (sig / h[None, :]) @ recon.T
    img = np.transpose(out, np.argsort(order))
    if snr is not None:
        if mask is None:
            mag = np.abs(img)
            mask = mag > 0.1 * mag.max()
        level = float(np.mean(np.abs(img)[np.asarray(mask, bool)]))
        sigma = level / float(snr)
        rng = np.random.default_rng(seed)
        img = img + sigma * (rng.standard_normal(img.shape) + 1j * rng.standard_normal(img.shape))
    return img if return_complex else np.abs(img)


def true_retained_signal(field_hz, *, echo_time, affine, slice_axis=2, slice_thickness_mm=None,
                         n_subslices=41) -> np.ndarray:
    """Fraction of signal a gradient echo keeps after through-plane dephasing, by numerical integration.

    ``|mean_q exp(-2 pi i f(z_q) TE)|`` over ``n_subslices`` positions through a
    rectangular slice, with the field interpolated through the slice (cubic
    convolution).  No geometric (in-plane) effects.

    Parameters
    ----------
    field_hz : (I, J, K) array
        Field, Hz.
    echo_time : float
        TE, s.
    affine : (4, 4) array
        Voxel -> world, for the voxel size along ``slice_axis``.
    slice_axis : int
    slice_thickness_mm : float, optional
        Default: the voxel size along ``slice_axis``.
    n_subslices : int

    Returns
    -------
    (I, J, K) ndarray
        Retained fraction in [0, 1].
    """
    f = np.asarray(field_hz, float)
    vox = _voxel_sizes(affine)[slice_axis]
    thk = vox if slice_thickness_mm is None else float(slice_thickness_mm)
    ft = np.moveaxis(f, slice_axis, 0)
    ns = ft.shape[0]
    z = (np.arange(ns)[:, None] + _subslice_offsets(int(n_subslices), thk / vox)[None, :]).ravel()
    m = cubic_matrix(ns, z).reshape(ns, int(n_subslices), ns)
    fz = np.einsum("sqz,z...->sq...", m, ft)
    kept = np.abs(np.mean(np.exp(-2j * np.pi * fz * float(echo_time)), axis=1))
    return np.moveaxis(kept, 0, slice_axis)
