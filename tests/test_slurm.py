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
    # The daemons must not have inherited the start lock: a free lock means a
    # later start that does need it (cluster half down) cannot hang on it.
    lock = Path(slurm_cluster["EPICORR_SLURM_STATE"]) / "start.lock"
    free = _run(["flock", "-n", "-E", "3", str(lock), "true"], slurm_cluster, timeout=10)
    assert free.returncode == 0, f"{lock} is held by a running process (fd inherited by a daemon?)"


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


def test_epicorr_run_on_slurm_end_to_end(slurm_cluster, tmp_path):
    """`epicorr run --executor slurm` corrects a subject with every step a Slurm job,
    user-set sbatch arguments reach sbatch, and the outputs equal a serial run's."""
    from bids_synth import make_tiny_study
    import nibabel as nib
    import numpy as np

    raw = make_tiny_study(tmp_path / "raw")
    env = dict(slurm_cluster)
    epicorr = [sys.executable, "-m", "epicorr"]
    common = ["participant", "--participant-label", "03", "--quiet"]
    slurm_out = tmp_path / "out-slurm"
    proc = _run(epicorr + ["run", str(raw), str(slurm_out)] + common + [
        "--executor", "slurm", "--jobs", "2",
        "--executor-args", json.dumps({"sbatch_args": "--mem=600M --time=10 --comment=epicorr-e2e"})],
        env, timeout=240, cwd=tmp_path)
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    name = "sub-03_task-tap_desc-unwarped_bold.nii.gz"
    result = slurm_out / "sub-03" / "func" / name
    assert result.is_file()
    # Each step ran as a batch job: Slurm's job logs sit beside nipype's batch scripts.
    logs = list(slurm_out.rglob("slurm-*.out"))
    scripts = list(slurm_out.rglob("batchscript_*.sh"))
    assert len(logs) >= 3 and len(scripts) == len(logs), (len(logs), len(scripts))
    assert all("Traceback" not in p.read_text(errors="replace") for p in logs)
    # The user's sbatch arguments reached Slurm: finished jobs stay known to slurmctld
    # for MinJobAge (tests/slurm/slurm.conf.in) with the comment and memory we asked for.
    jobs = _run(["scontrol", "-o", "show", "job"], env).stdout.splitlines()
    ours = [j for j in jobs if "Comment=epicorr-e2e" in j]
    assert ours, jobs[-3:]
    assert all("MinMemoryNode=600M" in j for j in ours), ours[0]

    serial_out = tmp_path / "out-serial"
    proc = _run(epicorr + ["run", str(raw), str(serial_out)] + common + ["--executor", "serial"],
                env, timeout=240, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-3000:]
    a = np.asanyarray(nib.load(str(result)).dataobj)
    b = np.asanyarray(nib.load(str(serial_out / "sub-03" / "func" / name)).dataobj)
    assert np.array_equal(a, b), "Slurm and serial runs differ"
