"""Run every ``benchmarks/bench_*.py`` in turn (``make bench``).

Each benchmark module has a ``main()`` that prints its results (ratios
against its baselines) and writes JSON to ``benchmarks/results/``.  The exit
code is 1 if any benchmark raised; missed targets are printed, not fatal.
"""

from __future__ import annotations

import importlib.util
import sys
import time
import traceback
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main(argv: list[str] | None = None) -> int:
    names = argv if argv else None
    failed = []
    scripts = sorted(HERE.glob("bench_*.py"))
    if names:
        scripts = [s for s in scripts if any(n in s.stem for n in names)]
    if not scripts:
        print("no benchmarks found", file=sys.stderr)
        return 1
    for script in scripts:
        print(f"=== {script.stem} ===", flush=True)
        t0 = time.perf_counter()
        try:
            spec = importlib.util.spec_from_file_location(script.stem, script)
            module = importlib.util.module_from_spec(spec)
            spec.loader.exec_module(module)
            module.main()
        except Exception:  # report and go on with the others
            traceback.print_exc()
            failed.append(script.stem)
        print(f"=== {script.stem}: {time.perf_counter() - t0:.1f} s ===\n", flush=True)
    if failed:
        print("benchmarks that raised: " + ", ".join(failed), file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
