"""Render and write the QC pages from Jinja2 templates (autoescaped).

Per-subject page: ``OUTPUT_DIR/qc/sub-<L>.html``; batch index:
``OUTPUT_DIR/qc/index.html``.  Both are single self-contained files: images
are embedded as data URIs, CSS and JavaScript are inlined, nothing is fetched
from the network.
"""

from __future__ import annotations

import datetime as _dt
import math
import os
from functools import lru_cache
from pathlib import Path
from typing import Any, Sequence

import numpy as np
from jinja2 import Environment, FileSystemLoader, StrictUndefined, select_autoescape

from .._version import __version__
from ..cli import CAUTION
from ..qcmetrics import STATUSES, brain_correlation
from . import _figures as fg
from ._model import IndexFailure, IndexRow, SubjectReport, TargetReport

__all__ = ["render_subject_page", "write_subject_page", "render_index", "write_index",
           "INDEX_COLUMNS"]

_TEMPLATES = Path(__file__).resolve().parent / "templates"

#: Columns of the batch index: (metric key, header, tooltip).
INDEX_COLUMNS: tuple[tuple[str, str, str], ...] = (
    ("field_abs_p99_hz", "Field |p99| (Hz)", "99th percentile of the field size in the brain"),
    ("disp_abs_p99_vox", "Shift p99 (vox)", "99th percentile of the displacement size"),
    ("share_over_3vox", "Moved > 3 vox", "share of brain voxels moved more than 3 voxels"),
    ("foldover_voxels", "Fold-over", "brain voxels with Jacobian at or below zero"),
    ("dropout_ml", "Dropout (mL)", "predicted volume of lost signal"),
    ("pair_corr_after", "Pair r after", "agreement of the opposite-PE images after correction"),
    ("registration_quality", "Registration", "field-map magnitude to EPI similarity"),
    ("runtime_s", "Runtime (s)", "processing wall-clock time"),
)
_RANK = {s: n for n, s in enumerate(STATUSES)}


@lru_cache(maxsize=1)
def _env() -> Environment:
    return Environment(loader=FileSystemLoader(str(_TEMPLATES)),
                       autoescape=select_autoescape(["html", "htm"], default=True),
                       undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True)


def _atomic_write(path: str | os.PathLike, text: str) -> Path:
    """Write text to ``path`` through a temporary file in the same folder and ``os.replace``."""
    from ..io import _atomic_write as atomic

    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    return atomic(path, lambda tmp: Path(tmp).write_text(text, encoding="utf-8"))


def _severity(metrics) -> tuple[int, int, int]:
    st = [m.status for m in metrics if m.status is not None]
    worst = max((_RANK[s] for s in st), default=0)
    return worst, sum(s == "problem" for s in st), sum(s == "look" for s in st)


def _target_context(t: TargetReport, n: int) -> dict[str, Any]:
    mask = None if t.brain_mask is None else np.asarray(t.brain_mask) > 0
    view = fg.SliceView.from_grid(np.shape(t.reference_after), voxel_size_mm=t.voxel_size_mm,
                                  affine=t.affine, mask=mask)
    figs: dict[str, Any] = {
        "compare": fg.comparison_images(view, before=t.reference_before,
                                        after=t.reference_after, edges=t.edges),
        "field": fg.field_figure(view, reference=t.reference_after, field_hz=t.field_hz,
                                 mask=mask),
        "histogram": fg.displacement_histogram(t.displacement_vox, mask=mask,
                                               pe_voxel_mm=float(t.voxel_size_mm[t.pe.axis])),
        "dropout": None, "uncertainty": None, "pair": None,
    }
    if t.dropout_mask is not None or t.retained_signal is not None:
        figs["dropout"] = fg.dropout_figure(view, corrected=t.reference_after,
                                            dropout_mask=t.dropout_mask,
                                            retained_signal=t.retained_signal, mask=mask)
    if t.uncertainty is not None:
        figs["uncertainty"] = fg.uncertainty_figure(view, reference=t.reference_after,
                                                    uncertainty=t.uncertainty,
                                                    unit=t.uncertainty_unit, mask=mask)
    pair_corr = None
    pair_where = "in the brain" if mask is not None else "over the whole volume"
    if t.pair_before is not None and t.pair_after is not None:
        pview, pmask = view, mask
        if t.pair_affine is not None:  # the pair on its own grid
            from nibabel.affines import voxel_sizes

            pmask = None if t.pair_mask is None else np.asarray(t.pair_mask) > 0
            pair_where = (f"in {t.pair_mask_label}, on the grid of the reversed-PE images"
                          if pmask is not None else "over the whole grid of the reversed-PE images")
            pview = fg.SliceView.from_grid(np.shape(t.pair_before[0]),
                                           voxel_size_mm=voxel_sizes(np.asarray(t.pair_affine, float)),
                                           affine=t.pair_affine, mask=pmask)
        pair_corr = (brain_correlation(*t.pair_before, mask=pmask),
                     brain_correlation(*t.pair_after, mask=pmask))
        figs["pair"] = fg.pair_figure(pview, before=t.pair_before, after=t.pair_after,
                                      pe_axis=t.pe.axis if t.pair_pe_axis is None else int(t.pair_pe_axis),
                                      labels=t.pair_labels, corr=pair_corr)
    counts = {s: sum(m.status == s for m in t.metrics) for s in STATUSES}
    compare = []
    for (title, before, after, ratio), orient in zip(figs["compare"], fg.ORIENTATIONS):
        compare.append((f"{title} · PE {_pe_arrow(view, t.pe.axis, orient)}", before, after, ratio))
    figs["compare"] = compare
    return {"t": t, "n": n, "anchor": f"target-{n}", "status": t.status, "figs": figs,
            "counts": counts, "pair_corr": pair_corr,
            "pair_where": pair_where,
            "edges_label": t.edges_label if t.edges is not None else "corrected EPI reference"}


def _pe_arrow(view: fg.SliceView, pe_axis: int, orient: str) -> str:
    """How the phase-encode axis lies in a displayed slice: ↔, ↕ or through-plane."""
    c = view.canonical_axis(pe_axis)
    horizontal, vertical = {"sagittal": (1, 2), "coronal": (0, 2), "axial": (0, 1)}[orient]
    return "↔" if c == horizontal else "↕" if c == vertical else "through-plane"


def render_subject_page(subject: SubjectReport) -> str:
    """The HTML text of one subject's QC page.

    Parameters
    ----------
    subject : SubjectReport

    Returns
    -------
    str
        A complete, self-contained HTML document.
    """
    targets = [_target_context(t, n) for n, t in enumerate(subject.targets)]
    return _env().get_template("subject.html").render(
        s=subject, targets=targets, status=subject.status, caution=CAUTION,
        version=subject.software_version)


def write_subject_page(path: str | os.PathLike, subject: SubjectReport) -> Path:
    """Render ``subject`` and write it atomically to ``path`` (e.g. ``qc/sub-01.html``)."""
    return _atomic_write(path, render_subject_page(subject))


def _cell(metric) -> dict[str, Any]:
    if metric is None:
        return {"text": "—", "sort": "", "status": None, "title": "not available"}
    v = float("nan") if metric.value is None else float(metric.value)
    return {"text": metric.display_value, "sort": f"{v:.6g}" if math.isfinite(v) else "",
            "status": metric.status, "title": metric.explanation}


def render_index(rows: Sequence[IndexRow], failures: Sequence[IndexFailure] = (), *,
                 title: str = "epicorr QC index", command_line: str = "",
                 created: str | None = None) -> str:
    """The HTML text of the batch index.

    Parameters
    ----------
    rows : sequence of IndexRow
        One per subject and target (see :func:`epicorr.report.index_rows`).
    failures : sequence of IndexFailure
        Subjects or targets that failed, shown with their error message.

    Returns
    -------
    str
        A self-contained HTML document; rows worst first (status, then number of
        problems, then of looks), re-sortable by clicking a column header.
    """
    ordered = sorted(rows, key=lambda r: (tuple(-x for x in _severity(r.metrics)), r.subject,
                                          r.target))
    table = []
    for r in ordered:
        worst, n_prob, n_look = _severity(r.metrics)
        by_key = {m.key: m for m in r.metrics}
        table.append({
            "row": r, "status": STATUSES[worst],
            "severity": worst * 10000 + n_prob * 100 + n_look,
            "n_problem": n_prob, "n_look": n_look,
            "cells": [_cell(by_key.get(key)) for key, _, _ in INDEX_COLUMNS],
        })
    shown_cols = [n for n, (key, _, _) in enumerate(INDEX_COLUMNS)
                  if any(row["cells"][n]["status"] is not None or row["cells"][n]["sort"]
                         for row in table)] or list(range(len(INDEX_COLUMNS)))
    counts = {s: sum(row["status"] == s for row in table) for s in STATUSES}
    return _env().get_template("index.html").render(
        title=title, rows=table, columns=[INDEX_COLUMNS[n] for n in shown_cols],
        shown=shown_cols, failures=list(failures), counts=counts, caution=CAUTION,
        version=__version__, command_line=command_line,
        created=created or _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        n_subjects=len({r.subject for r in rows} | {f.subject for f in failures}))


def write_index(path: str | os.PathLike, rows: Sequence[IndexRow],
                failures: Sequence[IndexFailure] = (), **kwargs: Any) -> Path:
    """Render the index and write it atomically to ``path`` (``OUTPUT_DIR/qc/index.html``)."""
    return _atomic_write(path, render_index(rows, failures, **kwargs))
