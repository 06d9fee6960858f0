"""HTML QC reports (an edge of the package): per-subject pages and the batch index."""
