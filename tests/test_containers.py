"""Build the container image from containers/Dockerfile and run epicorr inside it.

Runs where a container engine can be started on this machine: a Docker
daemon that answers, or Debian's podman (root, ``vfs`` storage, ``runc`` with
``cgroupfs``; rlimits kept within the host's).  No registry is reachable from
the test machines, so the Debian base image is made with ``debootstrap`` and
imported.  Where none of that is possible the test skips and says exactly why
(it may skip in CI: ``make install-tools`` does not install an engine).

The image is tagged with a hash of the files that go into it, so a re-run
with unchanged sources reuses it (a first build takes several minutes).
"""

from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
from pathlib import Path

import pytest

from conftest import REPO

pytestmark = pytest.mark.slow

BASE_TAG = "localhost/epicorr-base:bookworm"
CONTEXT_PATHS = ("pyproject.toml", "README.md", "LICENSE", "epicorr", "workflows",
                 "containers/Dockerfile")
HOST_CA = Path("/etc/ssl/certs/ca-certificates.crt")
IN_IMAGE_CA = "/etc/ssl/host-ca-bundle.crt"


def _run(cmd, timeout=120, **kw):
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, **kw)


def _engine() -> tuple[list[str], list[str]]:
    """(engine command prefix, extra ``run``/``build`` options), or skip with the reason."""
    reasons = []
    if shutil.which("docker"):
        info = _run(["docker", "info"], timeout=30)
        if info.returncode == 0:
            return ["docker"], []
        reasons.append("the docker client is installed but no Docker engine answers "
                       f"({(info.stderr.strip().splitlines() or ['no output'])[-1]})")
    else:
        reasons.append("no docker client")
    if shutil.which("podman"):
        if os.geteuid() != 0:
            reasons.append("podman needs root here (no subuid map for rootless vfs storage)")
        else:
            prefix = ["podman", "--storage-driver", "vfs"]
            if shutil.which("runc"):
                # crun cannot handle this machine's hybrid cgroup v1/v2 layout.
                prefix += ["--runtime", "runc", "--cgroup-manager", "cgroupfs"]
            # Raising rlimits is refused here: stay at (or under) the host's limits.
            nofile = os.sysconf("SC_OPEN_MAX")
            return prefix, ["--ulimit", f"nofile={nofile}:{nofile}",
                            "--ulimit", "nproc=4096:4096"]
    else:
        reasons.append("podman is not installed (apt-get install podman runc debootstrap)")
    pytest.skip("no container engine can be started on this machine: " + "; ".join(reasons))


def _image_exists(engine, tag) -> bool:
    return _run(engine + ["image", "inspect", tag], timeout=60).returncode == 0


def _ensure_base(engine, opts, tmp_path_factory) -> None:
    """A Debian bookworm base image from debootstrap (no registry is reachable)."""
    if _image_exists(engine, BASE_TAG):
        return
    if not shutil.which("debootstrap"):
        pytest.skip("no base image and no debootstrap to make one (apt-get install debootstrap)")
    root = tmp_path_factory.mktemp("rootfs") / "bookworm"
    boot = _run(["debootstrap", "--variant=minbase", "bookworm", str(root),
                 "http://deb.debian.org/debian"], timeout=900)
    if boot.returncode != 0:
        pytest.skip("debootstrap could not build a bookworm root: "
                    + (boot.stderr.strip().splitlines() or ["?"])[-1])
    if HOST_CA.is_file():
        # The machine's trust store, so pip inside the build trusts the same proxies.
        (root / "etc" / "ssl").mkdir(parents=True, exist_ok=True)
        shutil.copy(HOST_CA, root / IN_IMAGE_CA.lstrip("/"))
    tar = subprocess.Popen(["tar", "-C", str(root), "-c", "."], stdout=subprocess.PIPE)
    imp = subprocess.run(engine + ["import", "-", BASE_TAG], stdin=tar.stdout,
                         capture_output=True, text=True, timeout=600)
    tar.wait()
    assert imp.returncode == 0, imp.stderr
    probe = _run(engine + ["run", "--rm", "--network", "none"] + opts + [BASE_TAG, "true"])
    if probe.returncode != 0:
        pytest.skip("the engine cannot start a container here: " + probe.stderr.strip()[-300:])


def _context(tmp_path) -> tuple[Path, str]:
    """Copy the project's own files into a build context; return it and its content hash."""
    ctx = tmp_path / "context"
    digest = hashlib.sha256()
    for rel in CONTEXT_PATHS:
        src = REPO / rel
        files = [src] if src.is_file() else sorted(
            p for p in src.rglob("*") if p.is_file() and "__pycache__" not in p.parts)
        for path in files:
            dest = ctx / path.relative_to(REPO)
            dest.parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(path, dest)
            digest.update(str(path.relative_to(REPO)).encode() + b"\0" + path.read_bytes())
    return ctx, digest.hexdigest()[:16]


@pytest.fixture(scope="module")
def image(tmp_path_factory):
    engine, opts = _engine()
    _ensure_base(engine, opts, tmp_path_factory)
    ctx, digest = _context(tmp_path_factory.mktemp("ctx"))
    tag = f"localhost/epicorr:src-{digest}"
    if not _image_exists(engine, tag):
        build = _run(engine + ["build", "--network", "host"] + opts + [
            "--build-arg", f"BASE_IMAGE={BASE_TAG}",
            "--build-arg", f"EXTRA_CA_BUNDLE={IN_IMAGE_CA if HOST_CA.is_file() else ''}",
            "-f", "containers/Dockerfile", "-t", tag, "."], cwd=ctx, timeout=1800)
        if build.returncode != 0 and "pypi.org" in build.stdout + build.stderr:
            pytest.skip("the image build cannot reach the Python package index: "
                        + build.stdout.strip()[-300:])
        assert build.returncode == 0, build.stdout[-3000:] + build.stderr[-3000:]
    return engine, opts, tag


def test_version_inside_container(image):
    engine, opts, tag = image
    from epicorr import __version__

    out = _run(engine + ["run", "--rm", "--network", "none"] + opts + [tag, "--version"])
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == f"epicorr {__version__}"


def test_demo_inside_container(image, tmp_path):
    engine, opts, tag = image
    out_dir = tmp_path / "demo"
    out_dir.mkdir()
    proc = _run(engine + ["run", "--rm", "--network", "none", "-v", f"{out_dir}:/out"] + opts
                + [tag, "demo", "/out"], timeout=600)
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    written = sorted(p.name for p in out_dir.rglob("*.nii*"))
    assert written, "the demo wrote no NIfTI images"
    # The entry point is the BIDS-Apps style `epicorr` command: its help names `run`.
    helptext = _run(engine + ["run", "--rm", "--network", "none"] + opts + [tag, "run", "--help"])
    assert helptext.returncode == 0 and "BIDS_DIR OUTPUT_DIR" in helptext.stdout
