"""Where the batch runs its nodes: ``--executor`` and ``--executor-args`` to a nipype plugin.

The one place that maps our executor names to nipype's plugins:

* ``serial``: nipype's ``Linear`` plugin (one node after another, in this process);
* ``local``: ``MultiProc`` with ``n_procs = --jobs`` (processes on this machine);
* ``slurm``: ``SLURM`` (each node an ``sbatch`` job; ``--jobs`` caps the jobs
  queued at once).  ``--executor-args '{"sbatch_args": "--partition=short --time=30"}'``
  passes options to every job.

``--executor-args`` is a JSON object merged into the plugin arguments
(it wins over the defaults here).
"""

from __future__ import annotations

import json
import os
from typing import Any

from ..errors import EpicorrInputError
from ..options import Executor, parse_option

__all__ = ["parse_executor_args", "plugin_for"]


def parse_executor_args(text: str | None) -> dict[str, Any]:
    """Parse ``--executor-args`` (a JSON object); ``None``/empty gives ``{}``."""
    if not text:
        return {}
    try:
        value = json.loads(text)
    except json.JSONDecodeError as err:
        raise EpicorrInputError(f"not valid JSON ({err.msg})", key="--executor-args", value=text,
                                hint='give a JSON object, e.g. \'{"sbatch_args": "--time=30"}\'') from None
    if not isinstance(value, dict):
        raise EpicorrInputError("must be a JSON object", key="--executor-args", value=text,
                                hint='give a JSON object, e.g. \'{"n_procs": 4}\'')
    return value


def plugin_for(executor: Executor | str, *, jobs: int = 1,
               executor_args: dict[str, Any] | None = None) -> tuple[str, dict[str, Any]]:
    """The nipype plugin name and arguments for an executor.

    Parameters
    ----------
    executor : Executor or str
        ``serial``, ``local`` or ``slurm``.
    jobs : int
        Parallel processes (local) or jobs in the queue at once (slurm).
    executor_args : dict, optional
        Extra plugin arguments (``--executor-args``).

    Returns
    -------
    (str, dict)
        For :meth:`nipype.pipeline.engine.Workflow.run`.
    """
    kind = parse_option(Executor, executor, name="--executor")
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise EpicorrInputError("must be a whole number of at least 1", key="--jobs", value=jobs)
    extra = dict(executor_args or {})
    if kind is Executor.SERIAL:
        name, args = "Linear", {}
    elif kind is Executor.LOCAL:
        name, args = "MultiProc", {"n_procs": jobs}
    else:
        # nipype's SLURM plugin names jobs after $LOGNAME and fails without it.
        os.environ.setdefault("LOGNAME", os.environ.get("USER", "epicorr"))
        name, args = "SLURM", {"max_jobs": jobs, "sbatch_args": "", "poll_sleep_duration": 2}
    args.update(extra)
    return name, args
