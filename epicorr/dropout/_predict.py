"""Combined prediction of the retained signal, the dropout mask and the interface map.

The retained fraction of each voxel is the product of the through-plane term
(:mod:`._through_plane`, Deichmann et al. 2002), the phase-encode echo-shift
term and the readout condition (:mod:`._in_plane`, Deichmann et al. 2002;
Weiskopf et al. 2006, 2007).  Each is evaluated from the field gradient at
the voxel centre, in Hz/mm along the voxel axes (:mod:`._gradient`).

Conventions
-----------
* ``field_hz`` (Hz) lives on the **target grid in undistorted space** (the
  grid of the unwarped EPI), voxel axes ``i, j, k`` = array axes 0, 1, 2;
  world coordinates are RAS+ mm from ``affine``.  The prediction is for the
  voxel's true position, i.e. it lines up with the unwarped images.
* The slice axis and the PE axis are array axes; the readout axis is the
  remaining one.  The excitation is assumed to be a 2-D slice along
  ``slice_axis``.
* Gradients are taken along increasing array index, per mm along that voxel
  axis (column norms of the affine); oblique affines are fine, but the axes
  are assumed orthogonal.

References
----------
Deichmann R, Josephs O, Hutton C, Corfield DR, Turner R. Compensation of
susceptibility-induced BOLD sensitivity losses in echo-planar fMRI imaging.
NeuroImage 2002;15:120-135.

Weiskopf N, Hutton C, Josephs O, Deichmann R. Optimal EPI parameters for
reduction of susceptibility-induced BOLD sensitivity losses: a whole-brain
analysis at 3 T and 1.5 T. NeuroImage 2006;33:493-504.

Weiskopf N, Hutton C, Josephs O, Turner R, Deichmann R. Optimized EPI for
fMRI studies of the orbitofrontal cortex. MAGMA 2007;20:39-49.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Mapping

import numpy as np
from scipy import ndimage

from ..errors import EpicorrInputError
from ..geometry import PEDirection, parse_pe_direction
from ..options import EchoKind, SliceProfile, parse_option
from ._gradient import field_gradient_hz_per_mm, voxel_sizes_mm
from ._in_plane import pe_echo_factor, pe_retained, readout_retained
from ._through_plane import through_plane_retained

__all__ = [
    "DEFAULT_DROPOUT_THRESHOLD",
    "DropoutPrediction",
    "predict_retained_signal",
    "dropout_mask",
    "interface_distance_map",
    "half_loss_gradient_hz_per_mm",
]

#: Retained fraction below which a voxel counts as dropout.  A project choice
#: (half the signal lost); the literature gives no standard threshold.
DEFAULT_DROPOUT_THRESHOLD = 0.5

#: ``x`` with ``sinc(x) = 0.5`` (numerical root of sin(pi x)/(pi x) = 1/2).
_SINC_HALF = 0.6033545644

#: Longest plausible echo time for EPI, s (common practice: 10-100 ms; over
#: 0.5 s usually means milliseconds were written).
MAX_ECHO_TIME_S = 0.5


@dataclass(frozen=True, eq=False)
class DropoutPrediction:
    """Predicted signal dropout on the target grid.

    Attributes
    ----------
    retained : (I, J, K) float array
        Predicted retained fraction of the signal, 0..1 (NaN where the field is
        not finite).  ``through_plane * in_plane``.
    through_plane : (I, J, K) float array
        Through-plane term (slice profile), 0..1.
    in_plane : (I, J, K) float array
        Phase-encode echo-shift term times the readout condition, 0..1.
    mask : (I, J, K) bool array
        Dropout: ``retained < threshold`` (inside ``brain_mask`` when given).
    echo_factor : (I, J, K) float array
        ``Q``; the local echo occurs at ``echo_time / Q``.
    interface_mm : (I, J, K) float array or None
        Distance (mm) of each brain voxel to the nearest air-tissue interface
        region (see :func:`interface_distance_map`); NaN outside the brain;
        only computed when ``brain_mask`` is given.
    info : dict
        What was used and where it came from: ``slice_thickness_mm``,
        ``slice_thickness_source``, ``echo_time``, ``profile``, ``pe``,
        ``slice_axis``, ``readout_axis``, ``threshold``, ``voxel_sizes_mm``,
        ``sources`` (as passed), counts of voxels lost to each mechanism.
    protocol : dict
        The keyword arguments of :func:`predict_retained_signal` (used by
        :func:`summarize_dropout` for the what-if figures).
    """

    retained: np.ndarray
    through_plane: np.ndarray
    in_plane: np.ndarray
    mask: np.ndarray
    echo_factor: np.ndarray
    interface_mm: np.ndarray | None
    info: dict = field(default_factory=dict)
    protocol: dict = field(default_factory=dict, repr=False)


def half_loss_gradient_hz_per_mm(*, slice_thickness_mm: float, echo_time: float) -> float:
    """Through-plane gradient (Hz/mm) that halves the signal of a rectangular slice.

    ``|sinc(G dz TE)| = 0.5`` at ``G dz TE = 0.6034``; a convenient default
    for "high gradient" in :func:`interface_distance_map`.
    """
    return _SINC_HALF / (float(slice_thickness_mm) * float(echo_time))


def dropout_mask(retained: Any, *, threshold: float = DEFAULT_DROPOUT_THRESHOLD,
                 brain_mask: Any = None) -> np.ndarray:
    """Voxels predicted to lose signal for good.

    Parameters
    ----------
    retained : array, 0..1
        Predicted retained fraction (NaN counts as not dropout).
    threshold : float
        A voxel is dropout when ``retained < threshold``.  The 0.5 default
        (half the signal lost) is a project choice: no published threshold
        exists.
    brain_mask : bool array, optional
        Restrict the mask to these voxels.

    Returns
    -------
    mask : bool array of ``retained``'s shape
    """
    thr = float(threshold)
    if not (math.isfinite(thr) and 0 < thr <= 1):
        raise EpicorrInputError("dropout threshold must lie in (0, 1]", key="threshold",
                                value=threshold, hint="e.g. 0.5 for half the signal lost")
    r = np.asarray(retained, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        mask = np.isfinite(r) & (r < thr)
    if brain_mask is not None:
        b = np.asarray(brain_mask, dtype=bool)
        if b.shape != r.shape:
            raise EpicorrInputError("brain mask shape differs from the retained-signal map",
                                    key="brain_mask", value=b.shape,
                                    hint=f"resample the mask to {r.shape}")
        mask &= b
    return mask


def interface_distance_map(field_hz: Any, *, affine: Any, brain_mask: Any,
                           gradient_threshold_hz_per_mm: float,
                           low_signal_mask: Any = None) -> np.ndarray:
    """Distance of each brain voxel to the nearest low-signal, high-gradient region.

    The interface region is every voxel that lies within one voxel (3x3x3
    neighbourhood) of a *low-signal* voxel and of a *high-gradient* voxel:
    low signal is ``low_signal_mask`` (default: outside ``brain_mask``, i.e.
    air, bone, sinuses); high gradient is a brain voxel whose field-gradient
    magnitude ``|grad f|`` (Hz/mm, from the brain voxels only) is at least
    ``gradient_threshold_hz_per_mm``.

    Parameters
    ----------
    field_hz : (I, J, K) array, Hz
    affine : (4, 4) array
        Voxel-to-world affine (voxel sizes from its column norms).
    brain_mask : (I, J, K) bool array
    gradient_threshold_hz_per_mm : float, Hz/mm
        See :func:`half_loss_gradient_hz_per_mm` for a protocol-based value.
    low_signal_mask : (I, J, K) bool array, optional

    Returns
    -------
    distance_mm : (I, J, K) float array
        Euclidean distance in mm (0 inside the region); NaN outside the brain;
        ``inf`` in the brain when there is no interface region at all.
    """
    f = np.asarray(field_hz, dtype=np.float64)
    zooms = voxel_sizes_mm(affine)
    brain = np.asarray(brain_mask, dtype=bool)
    if brain.shape != f.shape:
        raise EpicorrInputError("brain mask shape differs from the field map", key="brain_mask",
                                value=brain.shape, hint=f"resample the mask to {f.shape}")
    low = ~brain if low_signal_mask is None else np.asarray(low_signal_mask, dtype=bool)
    if low.shape != f.shape:
        raise EpicorrInputError("low-signal mask shape differs from the field map",
                                key="low_signal_mask", value=low.shape)
    support = brain & np.isfinite(f)
    gmag = np.sqrt(sum(field_gradient_hz_per_mm(f, zooms=zooms, axis=a, support=support) ** 2
                       for a in range(3)))
    high = support & (gmag >= float(gradient_threshold_hz_per_mm))
    cube = np.ones((3, 3, 3), dtype=bool)
    region = ndimage.binary_dilation(low, cube) & ndimage.binary_dilation(high, cube)
    out = np.full(f.shape, np.nan)
    if not region.any():
        out[brain] = np.inf
        return out
    dist = ndimage.distance_transform_edt(~region, sampling=zooms)
    out[brain] = dist[brain]
    return out


def _echo_time(value: Any) -> float:
    te = float(value)
    if not (math.isfinite(te) and 0 < te <= MAX_ECHO_TIME_S):
        raise EpicorrInputError(f"echo time must be positive and at most {MAX_ECHO_TIME_S:g} s",
                                key="EchoTime", value=value, hint="give it in seconds (BIDS)")
    return te


def predict_retained_signal(field_hz: Any, *, affine: Any, pe: PEDirection | str,
                            effective_echo_spacing: float, n_pe: int, echo_time: float,
                            slice_axis: int = 2, slice_thickness_mm: float | None = None,
                            profile: SliceProfile | str = SliceProfile.RECTANGULAR,
                            brain_mask: Any = None,
                            threshold: float = DEFAULT_DROPOUT_THRESHOLD,
                            lines_before_centre: int | None = None,
                            t2star: float | None = None, readout_condition: bool = True,
                            pe_echo_condition: bool = True,
                            echo_kind: EchoKind | str = EchoKind.GRADIENT_ECHO,
                            sources: Mapping[str, str] | None = None) -> DropoutPrediction:
    """Predict the fraction of EPI signal that survives intra-voxel dephasing.

    Parameters
    ----------
    field_hz : (I, J, K) array, Hz
        Off-resonance field on the target grid (undistorted space).  Non-finite
        voxels give NaN retained signal and are left out of the gradients.
    affine : (4, 4) array
        Voxel-to-world (RAS+ mm) affine of that grid.
    pe : PEDirection or str
        Phase-encode direction (BIDS code such as ``"j-"`` accepted).
    effective_echo_spacing : float, s
        ``Δt`` (:class:`epicorr.geometry.ReadoutTiming`).
    n_pe : int
        Reconstructed PE lines ``N``.
    echo_time : float, s
        ``TE``.
    slice_axis : int
        Array axis of the slice direction (default 2 = ``k``).
    slice_thickness_mm : float, mm, optional
        Excited slice thickness (BIDS-style sidecar ``SliceThickness``).
        Default: the voxel size along ``slice_axis`` (recorded in ``info``).
    profile : SliceProfile or str
        Slice profile of the through-plane model.
    brain_mask : (I, J, K) bool array, optional
        Trusted field voxels; restricts the gradients, the dropout mask and
        enables the interface map.
    threshold : float
        Dropout threshold on the retained fraction (0.5: project choice).
    lines_before_centre : int, optional
        PE lines acquired before the k-space centre (default ``N // 2``).
    t2star : float, s, optional
        Include the T2* cost of a delayed echo.
    readout_condition : bool
        Apply the readout-direction condition (Weiskopf et al. 2007).
    pe_echo_condition : bool
        Apply the phase-encode echo-shift loss (Deichmann et al. 2002).  Its
        all-or-nothing window criterion assumes the PE gradient is uniform over
        a region much larger than a voxel; for gradients confined to a few
        voxels it predicts more loss than a k-space simulation shows (see
        ``benchmarks/bench_dropout.py``).  ``echo_factor`` is computed either way.
    echo_kind : EchoKind or str
        ``"gradient-echo"`` (BOLD, default) or ``"spin-echo"`` (diffusion,
        spin-echo field-map references).  In a spin echo the static
        off-resonance phase is refocused at the echo, which coincides with the
        k-space centre: there is no through-plane dephasing and no echo shift at
        the centre, and the model predicts no loss (retained 1 wherever the
        field is finite).  What remains of the field in a spin echo is geometric
        (stretch and pile-up), the unwarping's business.
    sources : mapping, optional
        Provenance of the inputs (e.g. from :func:`protocol_from_metadata`);
        copied into ``info["sources"]``.

    Returns
    -------
    DropoutPrediction
    """
    f = np.asarray(field_hz, dtype=np.float64)
    if f.ndim != 3:
        raise EpicorrInputError("field map must be a 3-D array", key="shape", value=f.shape,
                                hint="pass one volume in Hz")
    zooms = voxel_sizes_mm(affine)
    pe_dir = parse_pe_direction(pe)
    if slice_axis not in (0, 1, 2) or isinstance(slice_axis, bool):
        raise EpicorrInputError("slice axis must be 0, 1 or 2", key="slice_axis", value=slice_axis)
    if slice_axis == pe_dir.axis:
        raise EpicorrInputError("the phase-encode axis is the slice axis", key="slice_axis",
                                value=slice_axis,
                                hint=f"PhaseEncodingDirection is {pe_dir.bids}; give the slice axis "
                                     "of the 2-D EPI acquisition")
    readout_axis = 3 - slice_axis - pe_dir.axis
    te = _echo_time(echo_time)
    prof = parse_option(SliceProfile, profile, name="profile")
    if slice_thickness_mm is None:
        dz = float(zooms[slice_axis])
        dz_source = "voxel size along the slice axis (no slice thickness given)"
    else:
        dz = float(slice_thickness_mm)
        if not (math.isfinite(dz) and dz > 0):
            raise EpicorrInputError("slice thickness must be a positive number of mm",
                                    key="SliceThickness", value=slice_thickness_mm)
        dz_source = (dict(sources or {}).get("slice_thickness_mm") or "given by the caller")
    finite = np.isfinite(f)
    support = finite
    brain = None
    if brain_mask is not None:
        brain = np.asarray(brain_mask, dtype=bool)
        if brain.shape != f.shape:
            raise EpicorrInputError("brain mask shape differs from the field map", key="brain_mask",
                                    value=brain.shape, hint=f"resample the mask to {f.shape}")
        support = finite & brain

    g_slice = field_gradient_hz_per_mm(f, zooms=zooms, axis=slice_axis, support=support)
    g_pe = field_gradient_hz_per_mm(f, zooms=zooms, axis=pe_dir.axis, support=support)
    kind = parse_option(EchoKind, echo_kind, name="echo_kind")
    spin_echo = kind is EchoKind.SPIN_ECHO
    tp = (np.ones_like(f) if spin_echo else
          through_plane_retained(g_slice, slice_thickness_mm=dz, echo_time=te, profile=prof))
    q = pe_echo_factor(g_pe, polarity=pe_dir.polarity, effective_echo_spacing=effective_echo_spacing,
                       n_pe=n_pe, voxel_size_pe_mm=float(zooms[pe_dir.axis]))
    if spin_echo:
        pe_term = np.ones_like(f)
    elif pe_echo_condition:
        pe_term = pe_retained(q, echo_time=te, effective_echo_spacing=effective_echo_spacing,
                              n_pe=n_pe, lines_before_centre=lines_before_centre, t2star=t2star)
    else:
        pe_term = np.ones_like(f)
    if readout_condition and not spin_echo:
        g_ro = field_gradient_hz_per_mm(f, zooms=zooms, axis=readout_axis, support=support)
        with np.errstate(divide="ignore", invalid="ignore"):
            te_eff = np.where(q > 0, te / np.where(q > 0, q, 1.0), np.nan)
        ro_term = readout_retained(g_ro, voxel_size_ro_mm=float(zooms[readout_axis]),
                                   effective_echo_time=te_eff)
    else:
        ro_term = np.ones_like(f)
    in_plane = pe_term * ro_term
    retained = np.where(finite, tp * in_plane, np.nan)
    mask = dropout_mask(retained, threshold=threshold, brain_mask=brain)

    interface = None
    if brain is not None:
        low = ~brain | mask
        interface = interface_distance_map(
            np.where(finite, f, np.nan), affine=affine, brain_mask=brain, low_signal_mask=low,
            gradient_threshold_hz_per_mm=half_loss_gradient_hz_per_mm(slice_thickness_mm=dz,
                                                                       echo_time=te))
    region = finite if brain is None else finite & brain
    info = {
        "slice_thickness_mm": dz,
        "slice_thickness_source": dz_source,
        "echo_time": te,
        "profile": prof.value,
        "pe": pe_dir.bids,
        "slice_axis": int(slice_axis),
        "readout_axis": int(readout_axis),
        "threshold": float(threshold),
        "voxel_sizes_mm": [float(z) for z in zooms],
        "effective_echo_spacing": float(effective_echo_spacing),
        "n_pe": int(n_pe),
        "readout_condition": bool(readout_condition),
        "pe_echo_condition": bool(pe_echo_condition),
        "t2star": None if t2star is None else float(t2star),
        "n_voxels_evaluated": int(region.sum()),
        "n_dropout": int(mask.sum()),
        "n_lost_pe_echo": int((region & (pe_term == 0)).sum()),
        "n_lost_readout": int((region & (ro_term == 0)).sum()),
        "n_nonfinite_field": int((~finite).sum()),
        "sources": dict(sources or {}),
        "echo_kind": kind.value,
        "model": ("spin echo: static dephasing refocused at the echo, no loss predicted" if spin_echo else
                  "through-plane x phase-encode echo shift x readout condition "
                  "(Deichmann et al. 2002; Weiskopf et al. 2006, 2007)"),
    }
    protocol = dict(affine=np.asarray(affine, dtype=np.float64), pe=pe_dir,
                    effective_echo_spacing=float(effective_echo_spacing), n_pe=int(n_pe),
                    echo_time=te, slice_axis=int(slice_axis), slice_thickness_mm=dz,
                    profile=prof, brain_mask=brain, threshold=float(threshold),
                    lines_before_centre=lines_before_centre, t2star=t2star,
                    readout_condition=bool(readout_condition),
                    pe_echo_condition=bool(pe_echo_condition), echo_kind=kind,
                    sources=dict(sources or {}))
    return DropoutPrediction(retained=retained, through_plane=tp, in_plane=in_plane, mask=mask,
                             echo_factor=q, interface_mm=interface, info=info, protocol=protocol)
