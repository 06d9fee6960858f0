"""Quality-control metrics of one corrected target, and their status.

Pure functions on numpy arrays (no file I/O).  The HTML report
(:mod:`epicorr.report`) shows what :func:`target_metrics` returns; the batch
index sorts on the same statuses.

Conventions
-----------
* All volumes share one voxel grid, shape ``(I, J, K)``; voxel axes ``i, j, k``
  are array axes 0, 1, 2 (see :mod:`epicorr.geometry`).
* ``field_hz`` is the off-resonance field in Hz, ``displacement_vox`` the
  displacement along the phase-encode (PE) axis in voxels, defined in
  undistorted space: signal from position ``y`` appears at ``y + d(y)``.
* The PE Jacobian of that mapping is ``J = 1 + dd/dy``.  Where ``J <= 0`` the
  mapping folds over: several undistorted positions land on one distorted
  voxel and cannot be told apart (Jezzard & Balaban 1995).

Status
------
Each metric with a threshold gets ``"fine"``, ``"look"`` (a reviewer should
look at the figures) or ``"problem"`` (likely a failed correction or bad
input) from :data:`THRESHOLDS`, through :func:`status`.  A metric that could
not be computed (NaN or infinite) is a ``"problem"``: it means a broken
intermediate file.  Where no published source sets a threshold, the table
marks it "common practice": these are starting points for triage, to be
tuned per study, not diagnostic limits.

References
----------
Jezzard P, Balaban RS. Correction for geometric distortion in echo planar
images from B0 field variations. Magn Reson Med 1995;34:65-73.

Chang H, Fitzpatrick JM. A technique for accurate magnetic resonance
imaging in the presence of field inhomogeneities. IEEE Trans Med Imaging
1992;11:319-329.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .errors import EpicorrInputError

__all__ = [
    "STATUSES",
    "Threshold",
    "THRESHOLDS",
    "EXPLANATIONS",
    "Metric",
    "status",
    "worst_status",
    "field_summary",
    "displacement_summary",
    "pe_jacobian",
    "foldover_count",
    "dropout_volume_ml",
    "brain_correlation",
    "target_metrics",
]

#: Status names, best first.
STATUSES: tuple[str, ...] = ("fine", "look", "problem")
_RANK = {name: rank for rank, name in enumerate(STATUSES)}

#: Percentiles reported for the field and the displacement.
PERCENTILES: tuple[float, ...] = (1.0, 5.0, 50.0, 95.0, 99.0)


@dataclass(frozen=True)
class Threshold:
    """When a metric needs a look, and when it is a problem.

    Attributes
    ----------
    look, problem : float
        Boundaries.  With ``higher_is_worse`` the status is ``"look"`` from
        ``value >= look`` and ``"problem"`` from ``value >= problem``;
        otherwise from ``value <= look`` and ``value <= problem``.
    higher_is_worse : bool
        Direction of the scale.
    source : str
        Where the numbers come from ("common practice" when unsourced).
    """

    look: float
    problem: float
    higher_is_worse: bool = True
    source: str = "common practice"

    def describe(self, unit: str = "") -> str:
        """A short human-readable statement of the rule."""
        op = "≥" if self.higher_is_worse else "≤"
        u = f" {unit}" if unit else ""
        return f"look {op} {self.look:g}{u}; problem {op} {self.problem:g}{u} ({self.source})"


#: The documented thresholds, one per metric key with a status.
THRESHOLDS: dict[str, Threshold] = {
    # Inside the brain at 1.5-3 T the field offset rarely exceeds about 100-200 Hz
    # (orbitofrontal and temporal poles); hundreds of Hz everywhere suggest a
    # phase-unwrapping error or a map in rad/s instead of Hz.
    "field_abs_p99_hz": Threshold(150.0, 400.0, True, "common practice (typical 3 T head fields)"),
    # Robust upper displacement: a few voxels is usual for 3 T EPI.
    "disp_abs_p99_vox": Threshold(4.0, 10.0, True, "common practice"),
    "share_over_1vox": Threshold(0.30, 0.70, True, "common practice"),
    "share_over_3vox": Threshold(0.03, 0.15, True, "common practice"),
    # Any fold-over means some anatomy cannot be restored; many means the
    # field or its sign/scale is probably wrong.
    "foldover_voxels": Threshold(1.0, 200.0, True, "common practice"),
    "dropout_ml": Threshold(5.0, 30.0, True, "common practice"),
    # Correlation of the two unwarped polarities (reversed phase encoding).
    "pair_corr_after": Threshold(0.90, 0.75, False, "common practice"),
    # After minus before: a correction that lowers the agreement went wrong.
    "pair_corr_gain": Threshold(0.0, -0.05, False, "common practice"),
    # Similarity (0-1, e.g. correlation or normalised mutual information) of the
    # field-map magnitude moved onto the EPI grid with the EPI reference.
    "registration_quality": Threshold(0.50, 0.30, False, "common practice"),
    "runtime_s": Threshold(1800.0, 7200.0, True, "common practice (a stuck or oversized job)"),
}

#: Plain-language meaning of every metric key.
EXPLANATIONS: dict[str, str] = {
    "field_abs_p99_hz": (
        "How strong the field offset is inside the brain (99th percentile of its size). "
        "Values of a few tens to about a hundred Hz are usual near the sinuses and ear canals; "
        "hundreds of Hz everywhere usually mean a phase-unwrapping error or wrong units."),
    "disp_abs_p99_vox": (
        "How far signal was moved along the phase-encode axis, for the most displaced 1% of "
        "brain voxels. Large shifts are correctable, but check the corrected image closely."),
    "share_over_1vox": (
        "Share of brain voxels whose signal was shifted by more than one voxel: how much of the "
        "brain the correction changes visibly."),
    "share_over_3vox": (
        "Share of brain voxels shifted by more than three voxels: regions of strong distortion, "
        "usually frontal and temporal, where the result deserves a close look."),
    "foldover_voxels": (
        "Brain voxels where the distortion folds the image onto itself (Jacobian at or below "
        "zero). Signal there is mixed from several places and cannot be separated again."),
    "dropout_ml": (
        "Predicted volume of brain where signal is lost for good (dephasing within the voxel). "
        "No distortion correction brings it back; analyses there are unreliable."),
    "pair_corr_after": (
        "Agreement (correlation in the brain) of the two opposite phase-encode images after "
        "correction. Near 1 means both were unwarped to the same anatomy."),
    "pair_corr_gain": (
        "Change in that agreement from before to after correction. It should go up; a drop "
        "means the correction made things worse."),
    "pair_corr_before": (
        "Agreement of the two opposite phase-encode images before correction, for comparison."),
    "registration_quality": (
        "How well the field map's magnitude image lines up with the EPI after being moved onto "
        "its grid (0 to 1). A poor fit puts the field in the wrong place."),
    "runtime_s": "Wall-clock time this target took to process.",
    "brain_voxels": "Number of voxels in the brain mask the metrics are computed in.",
}


@dataclass
class Metric:
    """One metric of one target, ready to show.

    Attributes
    ----------
    key : str
        Stable identifier (a key of :data:`EXPLANATIONS`).
    label : str
        Short display name.
    value : float
        The number the status is computed from.
    unit : str
        Display unit of ``value`` ("Hz", "voxels", "mL", "%" for shares, ...).
    status : str or None
        ``"fine"``, ``"look"``, ``"problem"``, or ``None`` for information only.
    explanation : str
        Plain-language meaning.
    detail : str
        Extra numbers (percentiles, mm equivalents, before value).
    rule : str
        The threshold rule, as text (empty when there is none).
    """

    key: str
    label: str
    value: float
    unit: str = ""
    status: str | None = None
    explanation: str = ""
    detail: str = ""
    rule: str = ""

    @classmethod
    def from_dict(cls, row: dict) -> "Metric":
        """Rebuild a metric from :func:`dataclasses.asdict` output (e.g. read back from JSON).

        A ``value`` of ``None`` (how JSON stores a metric that could not be
        computed) becomes NaN.
        """
        known = {f: row[f] for f in cls.__dataclass_fields__ if f in row}
        known["value"] = float("nan") if known.get("value") is None else float(known["value"])
        return cls(**known)

    @property
    def display_value(self) -> str:
        """``value`` formatted for a table (shares as percentages)."""
        if self.value is None or not math.isfinite(float(self.value)):
            return "n/a"
        if self.unit == "%":
            return f"{100.0 * self.value:.1f} %"
        if self.unit in ("voxels", "count") and float(self.value).is_integer():
            return f"{int(self.value):d}" + ("" if self.unit == "count" else " voxels")
        if self.unit == "":
            return f"{float(self.value):.3f}"
        return f"{_fmt(self.value)} {self.unit}".strip()


def _fmt(x: float) -> str:
    x = float(x)
    if not math.isfinite(x):
        return "n/a"
    if x == 0:
        return "0"
    if abs(x) >= 100:
        return f"{x:.0f}"
    if abs(x) >= 10:
        return f"{x:.1f}"
    return f"{x:.2f}"


def status(metric: str, value: float) -> str:
    """Triage status of one metric value.

    Parameters
    ----------
    metric : str
        A key of :data:`THRESHOLDS`.
    value : float
        The metric value, in the unit of that key (shares as fractions 0-1).

    Returns
    -------
    str
        ``"fine"``, ``"look"`` or ``"problem"``.  Non-finite values are a
        ``"problem"`` (the metric could not be computed).

    Raises
    ------
    EpicorrInputError
        If ``metric`` has no threshold.
    """
    if metric not in THRESHOLDS:
        raise EpicorrInputError("no QC threshold for this metric", key="metric", value=metric,
                                hint=f"use one of {', '.join(sorted(THRESHOLDS))}")
    v = float(value)
    if not math.isfinite(v):
        return "problem"
    t = THRESHOLDS[metric]
    if t.higher_is_worse:
        return "problem" if v >= t.problem else "look" if v >= t.look else "fine"
    return "problem" if v <= t.problem else "look" if v <= t.look else "fine"


def worst_status(statuses: Sequence[str | None]) -> str:
    """The worst of several statuses (``None`` entries are ignored; none at all is ``"fine"``)."""
    ranks = [_RANK[s] for s in statuses if s is not None]
    return STATUSES[max(ranks)] if ranks else "fine"


def _as_mask(mask: np.ndarray | None, shape: tuple[int, ...], name: str = "brain_mask") -> np.ndarray:
    if mask is None:
        return np.ones(shape, dtype=bool)
    m = np.asarray(mask)
    if m.shape != tuple(shape):
        raise EpicorrInputError(f"shape {m.shape} does not match the volume shape {tuple(shape)}",
                                key=name, hint="resample the mask onto the EPI grid")
    return m > 0


def _values(volume: np.ndarray, mask: np.ndarray, name: str) -> np.ndarray:
    vol = np.asarray(volume, dtype=float)
    m = _as_mask(mask, vol.shape, "brain_mask")
    vals = vol[m]
    if vals.size == 0:
        raise EpicorrInputError("the brain mask is empty", key="brain_mask",
                                hint=f"check the mask used for the {name} metrics")
    return vals


def field_summary(field_hz: np.ndarray, *, mask: np.ndarray | None = None) -> dict[str, float]:
    """Range and percentiles of the field inside a mask.

    Parameters
    ----------
    field_hz : ndarray, shape (I, J, K)
        Field offset, Hz.
    mask : ndarray of bool, shape (I, J, K), optional
        Brain mask; the whole volume when omitted.

    Returns
    -------
    dict
        ``min_hz``, ``max_hz``, ``p1_hz`` ... ``p99_hz`` (signed, see
        :data:`PERCENTILES`) and ``abs_p99_hz`` (99th percentile of ``|field|``).
        NaN voxels propagate to NaN results.
    """
    vals = _values(field_hz, mask, "field")
    out = {"min_hz": float(vals.min()), "max_hz": float(vals.max())}
    for p, q in zip(PERCENTILES, np.percentile(vals, PERCENTILES)):
        out[f"p{p:g}_hz"] = float(q)
    out["abs_p99_hz"] = float(np.percentile(np.abs(vals), 99.0))
    return out


def displacement_summary(displacement_vox: np.ndarray, *, mask: np.ndarray | None = None,
                         voxel_size_mm: float = 1.0) -> dict[str, float]:
    """Percentiles of the PE displacement and the share of voxels moved far.

    Parameters
    ----------
    displacement_vox : ndarray, shape (I, J, K)
        Displacement along the PE axis, voxels (undistorted space).
    mask : ndarray of bool, shape (I, J, K), optional
        Brain mask; the whole volume when omitted.
    voxel_size_mm : float
        Voxel size along the PE axis, mm (for the ``_mm`` values).

    Returns
    -------
    dict
        Signed percentiles ``p1_vox`` ... ``p99_vox`` and their ``_mm``
        equivalents, ``abs_p50_vox``, ``abs_p95_vox``, ``abs_p99_vox``,
        ``abs_max_vox`` (and ``_mm``), ``share_over_1vox`` and
        ``share_over_3vox`` (fractions of mask voxels with ``|d| > 1`` and
        ``|d| > 3``).
    """
    vals = _values(displacement_vox, mask, "displacement")
    mm = float(voxel_size_mm)
    out: dict[str, float] = {}
    for p, q in zip(PERCENTILES, np.percentile(vals, PERCENTILES)):
        out[f"p{p:g}_vox"] = float(q)
        out[f"p{p:g}_mm"] = float(q) * mm
    a = np.abs(vals)
    for p in (50, 95, 99):
        q = float(np.percentile(a, p))
        out[f"abs_p{p}_vox"] = q
        out[f"abs_p{p}_mm"] = q * mm
    out["abs_max_vox"] = float(a.max())
    out["abs_max_mm"] = float(a.max()) * mm
    out["share_over_1vox"] = float(np.mean(a > 1.0))
    out["share_over_3vox"] = float(np.mean(a > 3.0))
    return out


def pe_jacobian(displacement_vox: np.ndarray, *, pe_axis: int) -> np.ndarray:
    """Jacobian ``1 + dd/dy`` of the PE mapping ``y -> y + d(y)``.

    Parameters
    ----------
    displacement_vox : ndarray, shape (I, J, K)
        Displacement along the PE axis, voxels (undistorted space).
    pe_axis : int
        Array axis of phase encoding (0, 1 or 2).

    Returns
    -------
    ndarray, shape (I, J, K)
        Dimensionless; central differences inside, one-sided at the edges.
    """
    d = np.asarray(displacement_vox, dtype=float)
    if pe_axis not in (0, 1, 2) or d.ndim != 3:
        raise EpicorrInputError("need a 3-D displacement and a PE axis of 0, 1 or 2",
                                key="pe_axis", value=pe_axis)
    return 1.0 + np.gradient(d, axis=pe_axis)


def foldover_count(jacobian: np.ndarray, *, mask: np.ndarray | None = None) -> int:
    """Number of mask voxels where the Jacobian is ``<= 0`` (fold-over).

    Parameters
    ----------
    jacobian : ndarray, shape (I, J, K)
        PE Jacobian, dimensionless (e.g. from :func:`pe_jacobian`).
    mask : ndarray of bool, shape (I, J, K), optional
    """
    jac = np.asarray(jacobian, dtype=float)
    m = _as_mask(mask, jac.shape)
    return int(np.count_nonzero((jac <= 0) & m))


def dropout_volume_ml(dropout_mask: np.ndarray, *, voxel_volume_mm3: float,
                      mask: np.ndarray | None = None) -> float:
    """Volume of predicted dropout, millilitres (1 mL = 1000 mm³).

    Parameters
    ----------
    dropout_mask : ndarray of bool, shape (I, J, K)
        Voxels where signal is predicted lost.
    voxel_volume_mm3 : float
        Volume of one voxel, mm³ (product of the voxel sizes).
    mask : ndarray of bool, shape (I, J, K), optional
        Count only inside this (brain) mask.
    """
    dm = np.asarray(dropout_mask) > 0
    m = _as_mask(mask, dm.shape)
    return float(np.count_nonzero(dm & m)) * float(voxel_volume_mm3) / 1000.0


def brain_correlation(a: np.ndarray, b: np.ndarray, *, mask: np.ndarray | None = None) -> float:
    """Pearson correlation of two volumes inside a mask.

    Parameters
    ----------
    a, b : ndarray, shape (I, J, K)
        Two images on the same grid (e.g. the two PE polarities).
    mask : ndarray of bool, shape (I, J, K), optional

    Returns
    -------
    float
        In [-1, 1]; NaN when either image is constant inside the mask.
    """
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    if a.shape != b.shape:
        raise EpicorrInputError(f"the two images differ in shape: {a.shape} and {b.shape}",
                                key="pair", hint="resample both onto one grid")
    m = _as_mask(mask, a.shape)
    x, y = a[m], b[m]
    x = x - x.mean()
    y = y - y.mean()
    den = math.sqrt(float(np.dot(x, x)) * float(np.dot(y, y)))
    return float(np.dot(x, y) / den) if den > 0 else float("nan")


def _metric(key: str, label: str, value: float, unit: str, detail: str = "",
            rule_unit: str | None = None) -> Metric:
    th = THRESHOLDS.get(key)
    st = status(key, value) if th is not None else None
    rule = ""
    if th is not None:
        if unit == "%":
            scaled = Threshold(th.look * 100, th.problem * 100, th.higher_is_worse, th.source)
            rule = scaled.describe("%")
        else:
            rule = th.describe(rule_unit if rule_unit is not None else unit)
    return Metric(key=key, label=label, value=float(value), unit=unit, status=st,
                  explanation=EXPLANATIONS.get(key, ""), detail=detail, rule=rule)


def target_metrics(*, field_hz: np.ndarray, displacement_vox: np.ndarray,
                   brain_mask: np.ndarray | None, voxel_size_mm: Sequence[float],
                   pe_axis: int, jacobian: np.ndarray | None = None,
                   dropout_mask: np.ndarray | None = None,
                   pair_before: tuple[np.ndarray, np.ndarray] | None = None,
                   pair_after: tuple[np.ndarray, np.ndarray] | None = None,
                   pair_agreement: tuple[float, float] | None = None,
                   registration_quality: float | None = None,
                   runtime_s: float | None = None) -> list[Metric]:
    """Every QC metric of one target, with status and explanation.

    Parameters
    ----------
    field_hz : ndarray, shape (I, J, K)
        Field offset on the EPI grid, Hz.
    displacement_vox : ndarray, shape (I, J, K)
        PE displacement, voxels (undistorted space).
    brain_mask : ndarray of bool, shape (I, J, K) or None
        Where the metrics are computed (whole volume if None).
    voxel_size_mm : sequence of 3 floats
        Voxel sizes along i, j, k, mm.
    pe_axis : int
        Phase-encode array axis.
    jacobian : ndarray, shape (I, J, K), optional
        PE Jacobian; computed from ``displacement_vox`` when omitted.
    dropout_mask : ndarray of bool, shape (I, J, K), optional
        Predicted signal dropout.
    pair_before, pair_after : (ndarray, ndarray), optional
        The two opposite-PE images before and after correction (reversed-PE data).
    pair_agreement : (float, float), optional
        Reversed-PE data on another grid than the target: the correlation
        of the two polarities before and after correction as the estimator
        measured it on the pair's own grid and mask.  Used when
        ``pair_after`` is not given.
    registration_quality : float, optional
        Similarity 0-1 of the moved field-map magnitude with the EPI.
    runtime_s : float, optional
        Processing wall-clock time, s.

    Returns
    -------
    list of Metric
        In display order; optional metrics only when their input is given.
    """
    shape = np.shape(field_hz)
    if np.shape(displacement_vox) != shape:
        raise EpicorrInputError(f"displacement shape {np.shape(displacement_vox)} differs from "
                                f"the field shape {shape}", key="displacement_vox")
    vs = [float(v) for v in voxel_size_mm]
    if len(vs) != 3 or not all(v > 0 and math.isfinite(v) for v in vs):
        raise EpicorrInputError("need three positive voxel sizes in mm", key="voxel_size_mm",
                                value=tuple(voxel_size_mm))
    mask = _as_mask(brain_mask, shape)
    out: list[Metric] = []

    fs = field_summary(field_hz, mask=mask)
    out.append(_metric(
        "field_abs_p99_hz", "Field strength in brain", fs["abs_p99_hz"], "Hz",
        detail=(f"range {_fmt(fs['min_hz'])} to {_fmt(fs['max_hz'])} Hz; percentiles "
                + ", ".join(f"{p:g}%: {_fmt(fs[f'p{p:g}_hz'])}" for p in PERCENTILES) + " Hz")))

    pe_mm = vs[pe_axis]
    ds = displacement_summary(displacement_vox, mask=mask, voxel_size_mm=pe_mm)
    out.append(_metric(
        "disp_abs_p99_vox", "Displacement (99th percentile)", ds["abs_p99_vox"], "voxels",
        detail=(f"= {_fmt(ds['abs_p99_mm'])} mm; median {_fmt(ds['abs_p50_vox'])} voxels "
                f"({_fmt(ds['abs_p50_mm'])} mm), largest {_fmt(ds['abs_max_vox'])} voxels "
                f"({_fmt(ds['abs_max_mm'])} mm); PE voxel {pe_mm:g} mm")))
    out.append(_metric("share_over_1vox", "Brain moved > 1 voxel", ds["share_over_1vox"], "%"))
    out.append(_metric("share_over_3vox", "Brain moved > 3 voxels", ds["share_over_3vox"], "%"))

    jac = pe_jacobian(displacement_vox, pe_axis=pe_axis) if jacobian is None else jacobian
    n_fold = foldover_count(jac, mask=mask)
    n_brain = int(np.count_nonzero(mask))
    out.append(_metric("foldover_voxels", "Fold-over voxels", n_fold, "count",
                       detail=f"{100.0 * n_fold / n_brain:.2f} % of {n_brain} brain voxels",
                       rule_unit="voxels"))

    if dropout_mask is not None:
        vol = dropout_volume_ml(dropout_mask, voxel_volume_mm3=vs[0] * vs[1] * vs[2], mask=mask)
        out.append(_metric("dropout_ml", "Predicted dropout", vol, "mL",
                           detail=f"{100.0 * vol * 1000.0 / (n_brain * vs[0] * vs[1] * vs[2]):.2f} "
                                  "% of the brain volume"))

    where = ""
    if pair_after is not None:
        after = brain_correlation(pair_after[0], pair_after[1], mask=mask)
        before = (brain_correlation(pair_before[0], pair_before[1], mask=mask)
                  if pair_before is not None else float("nan"))
    elif pair_agreement is not None:
        before, after = (float(v) for v in pair_agreement)
        where = "; measured on the pair's own grid, inside its head mask"
    if pair_after is not None or pair_agreement is not None:
        out.append(_metric("pair_corr_after", "Pair agreement after", after, "",
                           detail=f"before correction: {before:.3f}{where}"))
        if math.isfinite(before):
            out.append(_metric("pair_corr_gain", "Pair agreement gain", after - before, "",
                               detail=f"{before:.3f} → {after:.3f}"))

    if registration_quality is not None:
        out.append(_metric("registration_quality", "Field-map registration",
                           float(registration_quality), ""))
    if runtime_s is not None:
        out.append(_metric("runtime_s", "Runtime", float(runtime_s), "s",
                           detail=f"{float(runtime_s) / 60.0:.1f} min"))
    return out
