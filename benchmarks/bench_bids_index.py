"""Indexing a 50-subject BIDS dataset: epicorr's own parser vs pybids.

The dataset is generated (empty image files, real JSON sidecars) with every
target and field-source case of the test suite.  Both libraries index it and
read the inherited metadata of every data file.  Prints the times and their
ratio; writes ``benchmarks/results/bids_index.json``.
"""

from __future__ import annotations

import json
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests"))


def main(n_subjects: int = 50) -> dict:
    from bids_synth import make_layout_dataset

    from epicorr.bids import index_dataset, plan_subject  # noqa: F401

    with tempfile.TemporaryDirectory() as tmp:
        root = make_layout_dataset(Path(tmp) / "raw", n_subjects)
        t0 = time.perf_counter()
        ds = index_dataset(root)
        t_index = time.perf_counter() - t0
        for f in ds.files:
            ds.metadata(f)
        t_ours = time.perf_counter() - t0
        n_files = len(ds.files)

        import bids

        t0 = time.perf_counter()
        layout = bids.BIDSLayout(str(root), validate=False)
        t_pyb_index = time.perf_counter() - t0
        for f in ds.files:
            layout.get_metadata(str(f.path))
        t_pyb = time.perf_counter() - t0
    result = {
        "subjects": n_subjects, "data_files": n_files,
        "epicorr_index_s": round(t_index, 4), "epicorr_index_and_metadata_s": round(t_ours, 4),
        "pybids_index_s": round(t_pyb_index, 4), "pybids_index_and_metadata_s": round(t_pyb, 4),
        "pybids_over_epicorr": round(t_pyb / t_ours, 1),
    }
    for k, v in result.items():
        print(f"{k:32s} {v}")
    out = HERE / "results"
    out.mkdir(exist_ok=True)
    (out / "bids_index.json").write_text(json.dumps(result, indent=2))
    return result


if __name__ == "__main__":
    main()
