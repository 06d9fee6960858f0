"""Slurm, for real: a single-node cluster on this machine runs nipype jobs.

The session fixture starts munged, slurmctld and slurmd with
``tests/slurm/start-cluster.sh`` (Debian's ``slurm-wlm`` and ``munge``,
installed by ``make install-slurm``).  Locally, a machine without them skips
with the reason; CI (``EPICORR_REQUIRE_TOOLS=1``) fails instead.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from conftest import REPO, require_tool

pytestmark = pytest.mark.slurm

SLURM_DIR = REPO / "tests" / "slurm"
WHY = "the Slurm tests start a local single-node cluster (make install-slurm)"


@pytest.fixture(scope="session")
def slurm_cluster(tmp_path_factory):
    """Start (or reuse) the local cluster; yield the environment to talk to it."""
    for tool in ("slurmctld", "slurmd", "munged", "sbatch", "squeue", "srun"):
        require_tool(tool, why=WHY)
    if os.geteuid() != 0:
        message = "the test cluster's daemons run as root; this test process is not root"
        if os.environ.get("EPICORR_REQUIRE_TOOLS") == "1":
            pytest.fail(message)
        pytest.skip(message)
    state = Path(os.environ.get("EPICORR_SLURM_STATE", "/tmp/epicorr-slurm"))
    env = dict(os.environ, EPICORR_SLURM_STATE=str(state))
    proc = subprocess.run(["bash", str(SLURM_DIR / "start-cluster.sh")], env=env,
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, f"start-cluster.sh failed:\n{proc.stdout}\n{proc.stderr}"
    conf = [line.split("=", 1)[1] for line in proc.stdout.splitlines()
            if line.startswith("SLURM_CONF=")]
    assert conf and Path(conf[0]).is_file(), proc.stdout
    env["SLURM_CONF"] = conf[0]
    # nipype's SLURM plugin names jobs after $LOGNAME and fails without it.
    env.setdefault("LOGNAME", "root")
    return env


def _run(cmd, env, timeout=60, **kwargs):
    return subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=timeout, **kwargs)


def test_cluster_answers(slurm_cluster):
    """sinfo lists our one node as usable and srun runs a step on it."""
    env = slurm_cluster
    info = _run(["sinfo", "-h", "-N", "-o", "%N %T %c"], env)
    assert info.returncode == 0, info.stderr
    node, state, cpus = info.stdout.split()[:3]
    assert state in ("idle", "mixed", "allocated"), info.stdout
    assert cpus == "2"  # CPUs=2 in tests/slurm/slurm.conf.in
    host = _run(["srun", "-N1", "-n1", "--mem=100M", "hostname", "-s"], env)
    assert host.returncode == 0, host.stderr
    assert host.stdout.strip() == node


def test_start_script_is_idempotent(slurm_cluster):
    """A second start finds the running cluster and leaves it alone."""
    proc = _run(["bash", str(SLURM_DIR / "start-cluster.sh")], slurm_cluster)
    assert proc.returncode == 0, proc.stderr
    assert "already running" in proc.stdout


_WORKFLOW_SCRIPT = r"""
import json, os, sys
from nipype import Node, Workflow, config
from nipype.interfaces.base import CommandLine
config.set("execution", "poll_sleep_duration", "1")
base = sys.argv[1]
wf = Workflow(name="slurm_smoke", base_dir=base)
nodes = []
for idx in range(2):
    node = Node(CommandLine("sh", resource_monitor=False), name=f"job{idx}")
    # Each job writes the Slurm job id it ran under into its working folder.
    node.inputs.args = "-c 'echo ${SLURM_JOB_ID:-none} > slurm_job_id.txt'"
    node.plugin_args = {"sbatch_args": "--mem=200M --cpus-per-task=1"}
    nodes.append(node)
    wf.add_nodes([node])
wf.run(plugin="SLURM", plugin_args={"sbatch_args": "--time=5 --partition=debug"})
ids = {}
for idx in range(2):
    with open(os.path.join(base, "slurm_smoke", f"job{idx}", "slurm_job_id.txt")) as fh:
        ids[f"job{idx}"] = fh.read().strip()
print(json.dumps(ids))
"""


def test_nipype_workflow_through_slurm_plugin(slurm_cluster, tmp_path):
    """Nipype's SLURM plugin submits each node as a batch job and collects it."""
    script = tmp_path / "wf.py"
    script.write_text(_WORKFLOW_SCRIPT)
    proc = _run([sys.executable, str(script), str(tmp_path / "work")], slurm_cluster,
                timeout=150, cwd=tmp_path)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    ids = json.loads(proc.stdout.strip().splitlines()[-1])
    # Ran inside Slurm jobs (not locally): each node saw its own numeric job id.
    assert all(v.isdigit() for v in ids.values()), ids
    assert len(set(ids.values())) == 2, ids
    # The plugin wrote its batch scripts and Slurm wrote the job logs beside them.
    batch = tmp_path / "work" / "slurm_smoke" / "batch"
    assert sorted(p.name for p in batch.glob("slurm-*.out")) == sorted(
        f"slurm-{v}.out" for v in ids.values())
