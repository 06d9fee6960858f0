"""HTML QC reports (an edge of the package): per-subject pages and the batch index.

Fill :class:`TargetReport` / :class:`SubjectReport` from the workflow's files
(metrics from :func:`epicorr.qcmetrics.target_metrics`), then call
:func:`write_subject_page` per subject and :func:`write_index` once per batch.
Every page carries :data:`epicorr.cli.CAUTION`.
"""

from ._model import (AcquisitionParam, IndexFailure, IndexRow, SubjectReport, TargetReport,
                     index_rows)
from ._render import (INDEX_COLUMNS, render_index, render_subject_page, write_index,
                      write_subject_page)

__all__ = ["AcquisitionParam", "TargetReport", "SubjectReport", "IndexRow", "IndexFailure",
           "index_rows", "render_subject_page", "write_subject_page", "render_index",
           "write_index", "INDEX_COLUMNS"]
