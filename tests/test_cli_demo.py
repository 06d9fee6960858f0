"""``epicorr demo``: end to end on synthetic data, and bad options."""

import json

import nibabel as nib
import numpy as np
import pytest

from epicorr.cli import main


def test_demo_writes_files_and_reduces_error(tmp_path, capsys):
    # Part (1) only: the study run (part 2) is exercised by test_demo_study.py in a subprocess.
    out = tmp_path / "demo"
    assert main(["demo", str(out), "--phantom-only"]) == 0
    text = capsys.readouterr().out
    assert "SYNTHETIC DATA" in text and "not a medical device" in text
    summary = json.loads((out / "demo_summary.json").read_text())
    assert summary["synthetic"] is True
    # Unwarping with the true field must undo most of the distortion.
    assert summary["after"]["rmse"] < 0.1 * summary["before"]["rmse"]
    assert summary["after"]["correlation"] > 0.999
    truth = nib.load(str(out / "truth_bold.nii.gz"))
    fixed = nib.load(str(out / "unwarped_bold.nii.gz"))
    assert fixed.shape == truth.shape and fixed.get_data_dtype() == np.float32
    np.testing.assert_allclose(fixed.affine, truth.affine)
    assert fixed.header.get_zooms()[3] == pytest.approx(2.0)       # TR kept
    # Printed numbers are the ones in the summary.
    assert f"{summary['after']['rmse']:8.4f}" in text
    # No temporary files left behind by the atomic writes.
    assert not [p for p in out.iterdir() if p.name.startswith(".")]


@pytest.mark.parametrize("argv,needle", [
    (["--echo-spacing", "0.55"], "EffectiveEchoSpacing=0.55"),      # ms given as s: absurd
    (["--echo-spacing", "0"], "EffectiveEchoSpacing=0.0"),
    (["--echo-spacing", "nan"], "EffectiveEchoSpacing=nan"),
    (["--echo-spacing", "-0.0005"], "EffectiveEchoSpacing=-0.0005"),
    (["--pe-direction", "y"], "--pe-direction='y'"),
])
def test_bad_options_exit_2_and_write_nothing(tmp_path, capsys, argv, needle):
    # Readout limits: epicorr.geometry (BIDS: EffectiveEchoSpacing in seconds).
    out = tmp_path / "demo"
    assert main(["demo", str(out)] + argv) == 2
    err = capsys.readouterr().err.strip()
    assert needle in err and "\n" not in err and err.startswith("epicorr: error:")
    assert not out.exists()


def test_out_dir_that_is_a_file(tmp_path, capsys):
    target = tmp_path / "file.txt"
    target.write_text("keep me")
    assert main(["demo", str(target)]) == 2
    assert "not a folder" in capsys.readouterr().err
    assert target.read_text() == "keep me"
