"""Packaging: every package folder is declared, so installs (editable or not) see it."""

import subprocess
import sys
import tomllib
from pathlib import Path

import epicorr

REPO = Path(__file__).resolve().parents[1]


def test_every_package_folder_is_listed_in_pyproject():
    conf = tomllib.loads((REPO / "pyproject.toml").read_text())["tool"]["setuptools"]
    listed = set(conf["packages"])
    found = {".".join(p.parent.relative_to(REPO).parts) for p in (REPO / "epicorr").rglob("__init__.py")}
    found |= {"epicorr.workflows." + ".".join(p.parent.relative_to(REPO / "workflows").parts)
              for p in (REPO / "workflows").rglob("__init__.py") if p.parent != REPO / "workflows"}
    found.add("epicorr.workflows")
    found = {f for f in found if "__pycache__" not in f}
    assert found <= listed, f"add to [tool.setuptools] packages: {sorted(found - listed)}"


def test_workflows_ship_as_subpackage():
    import epicorr.workflows as wf
    assert Path(wf.__file__).resolve().parent == (REPO / "workflows").resolve()


def test_cli_version_and_help_offline():
    out = subprocess.run([sys.executable, "-m", "epicorr", "--version"], capture_output=True, text=True)
    assert out.returncode == 0 and out.stdout.strip() == f"epicorr {epicorr.__version__}"
    out = subprocess.run([sys.executable, "-m", "epicorr", "--help"], capture_output=True, text=True)
    assert out.returncode == 0
    assert "not a medical device" in out.stdout and "anatomical reference" in out.stdout


def test_nipype_version_check_is_disabled_before_import():
    code = ("import os, epicorr; assert os.environ['NIPYPE_NO_ET'] == '1'; "
            "import sys; assert 'nipype' not in sys.modules")
    env = {k: v for k, v in __import__("os").environ.items() if k != "NIPYPE_NO_ET"}
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert out.returncode == 0, out.stderr
