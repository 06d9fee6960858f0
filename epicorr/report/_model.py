"""Inputs of the QC pages: plain dataclasses the workflow fills from its files.

All volumes of one target share the EPI voxel grid, shape ``(I, J, K)``
(voxel axes i/j/k = array axes 0/1/2); ``affine`` maps them to RAS+ mm and is
used only to show the slices in a familiar orientation.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from .._version import __version__
from ..geometry import PEDirection
from ..qcmetrics import Metric, worst_status

__all__ = ["AcquisitionParam", "TargetReport", "SubjectReport", "IndexRow", "IndexFailure",
           "index_rows"]


@dataclass
class AcquisitionParam:
    """One acquisition parameter used by the correction, and where it came from.

    Attributes
    ----------
    name : str
        e.g. ``"Phase-encode direction"``, ``"Effective echo spacing"``.
    value : str
        Display text with unit, e.g. ``"j- (axis j, polarity -1)"``, ``"0.58 ms"``.
    source : str
        e.g. ``"sidecar EffectiveEchoSpacing"`` or ``"fallback: image size along PE"``
        (:attr:`epicorr.geometry.ReadoutTiming.sources` gives these).
    """

    name: str
    value: str
    source: str = ""

    @property
    def is_fallback(self) -> bool:
        """True when the value did not come straight from a sidecar key."""
        return not self.source.lower().startswith("sidecar")


@dataclass
class TargetReport:
    """Everything shown for one corrected target (one EPI series).

    Attributes
    ----------
    name : str
        Target label, e.g. ``"task-rest_run-1_bold"``.
    method : str
        How the field was obtained, e.g. ``"reversed phase-encode pair"``.
    pe : PEDirection
        Phase-encode direction of this target.
    voxel_size_mm : tuple of 3 floats
        Voxel sizes along i, j, k, mm.
    reference_before, reference_after : ndarray, shape (I, J, K)
        The EPI reference (e.g. a mean or first volume) as acquired and corrected.
    field_hz : ndarray, shape (I, J, K)
        Field offset on the EPI grid, Hz.
    displacement_vox : ndarray, shape (I, J, K)
        PE displacement, voxels.
    metrics : list of Metric
        From :func:`epicorr.qcmetrics.target_metrics`.
    brain_mask : ndarray of bool, shape (I, J, K), optional
    affine : ndarray, shape (4, 4), optional
        Voxel to RAS+ mm; slices are shown closest to radiological axes when given.
    edges : ndarray, shape (I, J, K), optional
        Image whose contours are drawn over both before and after (field-map
        magnitude or anatomical reference, resampled onto the EPI grid).
    edges_label : str
        What ``edges`` is, e.g. ``"anatomical reference"``.
    dropout_mask : ndarray of bool, shape (I, J, K), optional
    retained_signal : ndarray, shape (I, J, K), optional
        Predicted fraction of signal kept, 0-1.
    uncertainty : ndarray, shape (I, J, K), optional
        Field uncertainty; unit in ``uncertainty_unit``.
    uncertainty_unit : str
    pair_before, pair_after : (ndarray, ndarray), optional
        Reversed-PE data: the two polarities as acquired, and both unwarped.
    pair_labels : (str, str)
        Names of the two polarities, e.g. ``("j", "j-")``.
    pair_affine : ndarray, shape (4, 4), optional
        Voxel-to-world (RAS+ mm) affine of the pair images when they are on
        their own grid (the reversed-PE acquisition's) rather than the
        target's; None = the target grid.
    pair_mask : ndarray of bool, optional
        Brain or head mask on the pair's grid for the agreement figures (with
        ``pair_affine``; else the target's brain mask is used).
    pair_mask_label : str
        What ``pair_mask`` is, for the caption (e.g. ``"the brain"``).
    pair_pe_axis : int, optional
        Voxel axis (0, 1, 2 = i, j, k) of the pair's phase encoding, when it
        is not the target's.
    acquisition : list of AcquisitionParam
    runtime_s : float, optional
    notes : list of str
        Warnings worth a reviewer's attention (e.g. "echo spacing from fallback").
    """

    name: str
    method: str
    pe: PEDirection
    voxel_size_mm: Sequence[float]
    reference_before: np.ndarray
    reference_after: np.ndarray
    field_hz: np.ndarray
    displacement_vox: np.ndarray
    metrics: list[Metric] = field(default_factory=list)
    brain_mask: np.ndarray | None = None
    affine: np.ndarray | None = None
    edges: np.ndarray | None = None
    edges_label: str = "anatomical reference"
    dropout_mask: np.ndarray | None = None
    retained_signal: np.ndarray | None = None
    uncertainty: np.ndarray | None = None
    uncertainty_unit: str = "Hz"
    pair_before: tuple[np.ndarray, np.ndarray] | None = None
    pair_after: tuple[np.ndarray, np.ndarray] | None = None
    pair_labels: tuple[str, str] = ("PE +", "PE -")
    pair_affine: np.ndarray | None = None
    pair_mask: np.ndarray | None = None
    pair_mask_label: str = "the brain"
    pair_pe_axis: int | None = None
    acquisition: list[AcquisitionParam] = field(default_factory=list)
    runtime_s: float | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def status(self) -> str:
        """Worst status over the metrics."""
        return worst_status([m.status for m in self.metrics])

    def metric(self, key: str) -> Metric | None:
        """The metric with this key, or None."""
        return next((m for m in self.metrics if m.key == key), None)


@dataclass
class SubjectReport:
    """One subject's page.

    Attributes
    ----------
    subject : str
        BIDS label without ``sub-``.
    targets : list of TargetReport
    session : str, optional
        BIDS session label without ``ses-``.
    software_version : str
        Defaults to the installed epicorr version.
    command_line : str
        The command that produced the outputs.
    created : str
        Timestamp shown on the page (UTC ISO 8601 by default).
    failed_targets : list of (str, str)
        Targets of this subject that failed: (name, error message).
    """

    subject: str
    targets: list[TargetReport] = field(default_factory=list)
    session: str | None = None
    software_version: str = __version__
    command_line: str = ""
    created: str = field(default_factory=lambda: _dt.datetime.now(_dt.timezone.utc)
                         .strftime("%Y-%m-%d %H:%M UTC"))
    failed_targets: list[tuple[str, str]] = field(default_factory=list)

    @property
    def label(self) -> str:
        """``sub-<L>`` (``_ses-<S>`` when a session is given)."""
        return f"sub-{self.subject}" + (f"_ses-{self.session}" if self.session else "")

    @property
    def status(self) -> str:
        """Worst status over the targets (a failed target is a problem)."""
        st = [t.status for t in self.targets]
        if self.failed_targets:
            st.append("problem")
        return worst_status(st)


@dataclass
class IndexRow:
    """One row of the batch index: one subject and target.

    Attributes
    ----------
    subject : str
        Display label, e.g. ``"sub-01"``.
    target : str
    metrics : list of Metric
    href : str
        Link to the subject page, relative to the index (e.g. ``"sub-01.html#t0"``).
    """

    subject: str
    target: str
    metrics: list[Metric]
    href: str

    @property
    def status(self) -> str:
        return worst_status([m.status for m in self.metrics])


@dataclass
class IndexFailure:
    """A subject (or target) that failed: listed on the index with its error.

    Attributes
    ----------
    subject : str
    message : str
        The one-line error message.
    href : str, optional
        A page or log to link to.
    target : str, optional
    """

    subject: str
    message: str
    href: str | None = None
    target: str | None = None


def index_rows(subject: SubjectReport, *, href: str) -> tuple[list[IndexRow], list[IndexFailure]]:
    """Index rows and failures for one subject page written at ``href``."""
    rows = [IndexRow(subject=subject.label, target=t.name, metrics=list(t.metrics),
                     href=f"{href}#target-{n}") for n, t in enumerate(subject.targets)]
    fails = [IndexFailure(subject=subject.label, target=name, message=msg, href=href)
             for name, msg in subject.failed_targets]
    return rows, fails
