"""A catalogue of malformed inputs, each through the command line.

Every case must: exit with code 2 (bad input; ``epicorr.cli`` contract), print
one line naming the file or the key, write nothing under the output names
(no partial file, no temporary left behind), and leave every input file
byte-identical (SHA-256 before and after).  Batch runs (``epicorr run``) where
one subject's input is bad follow the batch contract instead: that subject is
reported, exit code 1 (see ``epicorr.cli``), no derivative for it.
"""

from __future__ import annotations

import errno
import gzip
import hashlib
import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage

from epicorr.cli import main

SHAPE = (16, 20, 10)
EES = "0.0005"


def _nii(path: Path, data, affine=None, dtype=np.float32) -> Path:
    aff = np.diag([3.0, 3.0, 3.0, 1.0]) if affine is None else affine
    nib.save(nib.Nifti1Image(np.asarray(data, dtype=dtype), aff), str(path))
    return path


def _phantom():
    x, y, z = np.meshgrid(*[np.linspace(-1, 1, n) for n in SHAPE], indexing="ij")
    head = ((x / 0.8) ** 2 + (y / 0.8) ** 2 + (z / 0.8) ** 2 < 1).astype(float)
    field = 40.0 * np.exp(-(x ** 2 + (y - 0.3) ** 2 + z ** 2) / 0.3)
    return head * (1 + 0.2 * np.sin(3 * x)), field


@pytest.fixture
def case(tmp_path):
    """Good inputs in ``in/``, an empty ``out/``; helpers to check the contract."""
    src, out = tmp_path / "in", tmp_path / "out"
    src.mkdir()
    out.mkdir()
    image, field = _phantom()
    _nii(src / "bold.nii.gz", np.stack([image, image * 1.01], axis=-1))
    _nii(src / "field.nii.gz", field)
    _nii(src / "ap.nii.gz", image)
    _nii(src / "pa.nii.gz", np.roll(image, 1, axis=1))
    _nii(src / "mag.nii.gz", image)
    _nii(src / "phasediff.nii.gz", np.angle(np.exp(2j * np.pi * field * 0.00246)))
    return src, out


def _hashes(folder: Path) -> dict:
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _check(argv, src, out, capsys, *, expect_code=2, names=()):
    before = _hashes(src)
    code = main([str(a) for a in argv])
    err = capsys.readouterr().err.strip()
    assert code == expect_code, f"exit {code}, stderr: {err}"
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, f"expected one line, got: {err!r}"
    assert any(n in lines[0] for n in names), f"none of {names} in {lines[0]!r}"
    assert _hashes(src) == before, "an input file changed"
    assert list(out.rglob("*")) == [], f"output written: {list(out.rglob('*'))}"
    return lines[0]


def _unwarp(src, out, series="bold.nii.gz", field="field.nii.gz", *extra, timing=("--echo-spacing", EES),
            pe="j"):
    return ["unwarp", src / series, "--field", src / field, "--pe-direction", pe, *timing,
            "--out", out / "corrected.nii.gz", "--out-displacement", out / "disp.nii.gz", *extra]


# --- missing, truncated and non-NIfTI files --------------------------------

def test_good_inputs_work(case, capsys):
    """Control: the same fixture with nothing broken succeeds (so the cases below test the fault)."""
    src, out = case
    assert main([str(a) for a in _unwarp(src, out)]) == 0
    assert (out / "corrected.nii.gz").is_file() and (out / "disp.nii.gz").is_file()


def test_01_series_missing(case, capsys):
    src, out = case
    _check(_unwarp(src, out, series="nope.nii.gz"), src, out, capsys, names=("nope.nii.gz",))


def test_02_field_missing(case, capsys):
    src, out = case
    _check(_unwarp(src, out, field="nofield.nii.gz"), src, out, capsys, names=("nofield.nii.gz",))


def test_03_truncated_gzip(case, capsys):
    src, out = case
    raw = (src / "bold.nii.gz").read_bytes()
    (src / "cut.nii.gz").write_bytes(raw[: len(raw) // 2])
    _check(_unwarp(src, out, series="cut.nii.gz"), src, out, capsys, names=("cut.nii.gz",))


def test_04_truncated_uncompressed(case, capsys):
    src, out = case
    raw = gzip.decompress((src / "bold.nii.gz").read_bytes())
    (src / "cut.nii").write_bytes(raw[: len(raw) - 1000])
    _check(_unwarp(src, out, series="cut.nii"), src, out, capsys, names=("cut.nii",))


def test_05_not_nifti_content(case, capsys):
    src, out = case
    (src / "text.nii.gz").write_bytes(gzip.compress(b"this is not an image\n" * 30))
    _check(_unwarp(src, out, series="text.nii.gz"), src, out, capsys, names=("text.nii.gz",))


def test_06_not_nifti_extension(case, capsys):
    src, out = case
    (src / "bold.mat").write_bytes((src / "bold.nii.gz").read_bytes())
    _check(_unwarp(src, out, series="bold.mat"), src, out, capsys, names=("bold.mat",))


def test_07_empty_file(case, capsys):
    src, out = case
    (src / "empty.nii.gz").write_bytes(b"")
    _check(_unwarp(src, out, field="empty.nii.gz"), src, out, capsys, names=("empty.nii.gz",))


# --- dimensions and grids --------------------------------------------------

def test_08_two_d_series(case, capsys):
    src, out = case
    _nii(src / "flat.nii.gz", np.ones(SHAPE[:2]))
    _check(_unwarp(src, out, series="flat.nii.gz"), src, out, capsys, names=("flat.nii.gz",))


def test_09_five_d_series(case, capsys):
    src, out = case
    _nii(src / "five.nii.gz", np.ones(SHAPE + (2, 2)))
    _check(_unwarp(src, out, series="five.nii.gz"), src, out, capsys, names=("five.nii.gz",))


def test_10_field_with_several_volumes(case, capsys):
    src, out = case
    _nii(src / "field4.nii.gz", np.zeros(SHAPE + (3,)))
    _check(_unwarp(src, out, field="field4.nii.gz"), src, out, capsys, names=("field4.nii.gz",))


def test_11_mismatched_grid(case, capsys):
    src, out = case
    _nii(src / "small.nii.gz", np.zeros((16, 18, 10)))
    _check(_unwarp(src, out, field="small.nii.gz"), src, out, capsys, names=("small.nii.gz",))


def test_12_zero_size_dimension(case, capsys):
    src, out = case
    img = nib.load(str(src / "field.nii.gz"))
    hdr = img.header.copy()
    raw = bytearray(hdr.binaryblock)
    dims = np.frombuffer(bytes(raw[40:56]), dtype="<i2").copy()
    dims[3] = 0  # dim[3] = 0: an image with no slices
    raw[40:56] = dims.astype("<i2").tobytes()
    (src / "zero.nii").write_bytes(bytes(raw) + b"\0" * 4)
    _check(_unwarp(src, out, field="zero.nii"), src, out, capsys, names=("zero.nii",))


def test_13_singular_affine(case, capsys):
    src, out = case
    img = nib.Nifti1Image(np.zeros(SHAPE, np.float32), None)
    img.header.set_sform(np.diag([3.0, 3.0, 0.0, 1.0]), code=1)  # slices of zero thickness
    img.header.set_qform(None, code=0)
    (src / "flat_aff.nii").write_bytes(img.header.binaryblock + b"\0" * 4
                                       + np.zeros(SHAPE, np.float32).tobytes(order="F"))
    _check(_unwarp(src, out, field="flat_aff.nii"), src, out, capsys, names=("flat_aff.nii",))


def test_14_nan_affine(case, capsys):
    src, out = case
    img = nib.Nifti1Image(np.zeros(SHAPE, np.float32), np.diag([3.0, 3.0, 3.0, 1.0]))
    img.header["srow_x"] = [np.nan, 0, 0, 0]
    img.header.set_sform(None, code=1)
    img.header["srow_x"] = [np.nan, 0, 0, 0]
    img.header.set_qform(None, code=0)
    (src / "nanaff.nii").write_bytes(img.header.binaryblock + b"\0" * 4
                                     + np.zeros(SHAPE, np.float32).tobytes(order="F"))
    _check(_unwarp(src, out, field="nanaff.nii"), src, out, capsys, names=("nanaff.nii",))


# --- voxel values ----------------------------------------------------------

def test_15_nan_field_voxels(case, capsys):
    src, out = case
    _, field = _phantom()
    field[5, 5, 5] = np.nan
    _nii(src / "nanfield.nii.gz", field)
    _check(_unwarp(src, out, field="nanfield.nii.gz"), src, out, capsys, names=("nanfield.nii.gz",))


def test_16_inf_field_voxels(case, capsys):
    src, out = case
    _, field = _phantom()
    field[3, 4, 5] = np.inf
    _nii(src / "inffield.nii.gz", field)
    _check(_unwarp(src, out, field="inffield.nii.gz"), src, out, capsys, names=("inffield.nii.gz",))


def test_17_nan_series_voxels_stay_local(case, capsys):
    """NaN voxels in a series are tolerated by design (the engine is NaN-safe): the
    correction succeeds, the input is unchanged, and NaN spreads at most one voxel."""
    import nibabel as nib

    src, out = case
    image, _ = _phantom()
    image[2, 2, 2] = np.nan
    _nii(src / "nanbold.nii.gz", image)
    before = _hashes(src)
    assert main([str(a) for a in _unwarp(src, out, series="nanbold.nii.gz")]) == 0
    assert _hashes(src) == before
    result = np.asanyarray(nib.load(out / "corrected.nii.gz").dataobj)
    bad = np.argwhere(~np.isfinite(result))
    assert len(bad) >= 1 and np.all(np.abs(bad - [2, 2, 2]).max(axis=1) <= 1)


def test_18_field_that_folds_the_image(case, capsys):
    """A 5 kHz bump (rad/s or a unit slip) moves signal by more than the image: folding."""
    src, out = case
    _, field = _phantom()
    _nii(src / "huge.nii.gz", field * 125.0)  # peak 5000 Hz -> 50 voxels at 0.5 ms x 20
    _check(_unwarp(src, out, field="huge.nii.gz"), src, out, capsys,
           names=("huge.nii.gz", "fold", "Jacobian"))


# --- metadata and options --------------------------------------------------

def test_19_pe_direction_world_letter(case, capsys):
    src, out = case
    _check(_unwarp(src, out, pe="y-"), src, out, capsys, names=("--pe-direction",))


def test_20_echo_spacing_in_ms(case, capsys):
    src, out = case
    _check(_unwarp(src, out, timing=("--echo-spacing", "0.5")), src, out, capsys,
           names=("EffectiveEchoSpacing",))


def test_21_readout_time_in_ms(case, capsys):
    src, out = case
    _check(_unwarp(src, out, timing=("--readout-time", "47.5")), src, out, capsys,
           names=("TotalReadoutTime",))


def test_22_negative_echo_spacing(case, capsys):
    src, out = case
    _check(_unwarp(src, out, timing=("--echo-spacing", "-0.0005")), src, out, capsys,
           names=("EffectiveEchoSpacing",))


def test_23_nan_readout_time(case, capsys):
    src, out = case
    _check(_unwarp(src, out, timing=("--readout-time", "nan")), src, out, capsys,
           names=("TotalReadoutTime",))


def test_24_pair_with_equal_polarity(case, capsys):
    src, out = case
    _check(["pair-field", src / "ap.nii.gz", src / "pa.nii.gz", "--pe-directions", "j", "j",
            "--echo-spacing", EES, "--out", out / "field.nii.gz"], src, out, capsys,
           names=("PhaseEncodingDirection", "polarity", "--pe-directions"))


def test_25_pair_on_different_axes(case, capsys):
    src, out = case
    _check(["pair-field", src / "ap.nii.gz", src / "pa.nii.gz", "--pe-directions", "i", "j-",
            "--echo-spacing", EES, "--out", out / "field.nii.gz"], src, out, capsys,
           names=("PhaseEncodingDirection", "--pe-directions", "axis"))


def test_26_pair_count_mismatch(case, capsys):
    src, out = case
    _check(["pair-field", src / "ap.nii.gz", src / "pa.nii.gz", "--pe-directions", "j",
            "--echo-spacing", EES, "--out", out / "field.nii.gz"], src, out, capsys,
           names=("--pe-directions",))


def test_good_pair_works(case, capsys):
    """Control for the pair cases: the same pair succeeds, with the edge-preserving option on."""
    src, out = case
    argv = ["pair-field", src / "ap.nii.gz", src / "pa.nii.gz", "--pe-directions", "j", "j-",
            "--echo-spacing", EES, "--edge-scale", "0.3", "--out", out / "field.nii.gz",
            "--out-corrected", out / "ref.nii.gz"]
    assert main([str(a) for a in argv]) == 0
    field = np.asarray(nib.load(str(out / "field.nii.gz")).dataobj)
    assert field.shape == SHAPE and (out / "ref.nii.gz").is_file()
    # pa is ap moved one voxel towards +j: d(j-) - d(j) = -2 f v = 1 voxel, so f = -1 / (2 v),
    # v = 0.5 ms x 20 lines (BIDS displacement convention): -50 Hz inside the head.
    image, _ = _phantom()
    inner = ndimage.binary_erosion(image > 0, iterations=2)
    assert np.median(field[inner]) == pytest.approx(-50.0, abs=5.0)


@pytest.mark.parametrize("flag,value,key", [("--edge-scale", "0", "edge_scale"),
                                            ("--edge-scale", "-0.3", "edge_scale"),
                                            ("--edge-scale", "nan", "edge_scale"),
                                            ("--harmonic", "-1", "harmonic"),
                                            ("--harmonic", "nan", "harmonic"),
                                            ("--harmonic", "inf", "harmonic")])
def test_26b_pair_bad_solver_option(case, capsys, flag, value, key):
    src, out = case
    _check(["pair-field", src / "ap.nii.gz", src / "pa.nii.gz", "--pe-directions", "j", "j-",
            "--echo-spacing", EES, flag, value, "--out", out / "field.nii.gz"], src, out, capsys,
           names=(key,))


def test_good_pair_works_with_harmonic(case, capsys):
    """Control for 26b: the same pair succeeds with the harmonic refinement on (-50 Hz, as above)."""
    src, out = case
    argv = ["pair-field", src / "ap.nii.gz", src / "pa.nii.gz", "--pe-directions", "j", "j-",
            "--echo-spacing", EES, "--harmonic", "300", "--out", out / "field.nii.gz"]
    assert main([str(a) for a in argv]) == 0
    field = np.asarray(nib.load(str(out / "field.nii.gz")).dataobj)
    image, _ = _phantom()
    inner = ndimage.binary_erosion(image > 0, iterations=2)
    assert np.median(field[inner]) == pytest.approx(-50.0, abs=5.0)


def test_27_equal_echo_times(case, capsys):
    src, out = case
    _check(["phase-field", "--phasediff", src / "phasediff.nii.gz", "--magnitude", src / "mag.nii.gz",
            "--echo-times", "0.00492", "0.00492", "--out", out / "field.nii.gz"], src, out, capsys,
           names=("EchoTime",))


def test_28_echo_times_in_ms(case, capsys):
    src, out = case
    _check(["phase-field", "--phasediff", src / "phasediff.nii.gz", "--magnitude", src / "mag.nii.gz",
            "--echo-times", "4.92", "7.38", "--out", out / "field.nii.gz"], src, out, capsys,
           names=("EchoTime",))


def test_29_phase_and_magnitude_grids_differ(case, capsys):
    src, out = case
    _nii(src / "mag_small.nii.gz", np.ones((16, 18, 10)))
    _check(["phase-field", "--phasediff", src / "phasediff.nii.gz", "--magnitude",
            src / "mag_small.nii.gz", "--echo-times", "0.00492", "0.00738",
            "--out", out / "field.nii.gz"], src, out, capsys, names=("mag_small.nii.gz",))


# --- output side -----------------------------------------------------------

def test_30_output_folder_missing(case, capsys):
    src, out = case
    argv = _unwarp(src, out)
    argv[argv.index(out / "corrected.nii.gz")] = out / "no" / "such" / "corrected.nii.gz"
    _check(argv, src, out, capsys, names=("--out",))


def test_31_output_folder_unwritable(case, capsys, monkeypatch):
    """An output folder refusing writes (simulated: this test runs as root, which ignores modes)."""
    src, out = case
    import tempfile

    real = tempfile.mkstemp

    def refuse(*args, dir=None, **kw):
        if dir is not None and Path(dir).resolve() == out.resolve():
            raise PermissionError(errno.EACCES, "Permission denied", str(dir))
        return real(*args, dir=dir, **kw)

    monkeypatch.setattr(tempfile, "mkstemp", refuse)
    _check(_unwarp(src, out), src, out, capsys, names=(str(out), "corrected.nii.gz"))


def test_32_disk_full(case, capsys, monkeypatch):
    """ENOSPC in the middle of writing an output (simulated in-process: no small tmpfs here)."""
    src, out = case
    import shutil

    real_copyfile = shutil.copyfile

    def full(a, b, *args, **kw):
        if Path(b).resolve().parent == out.resolve():
            Path(b).write_bytes(b"partial")  # some bytes made it before the disk filled
            raise OSError(errno.ENOSPC, "No space left on device", str(b))
        return real_copyfile(a, b, *args, **kw)

    monkeypatch.setattr(shutil, "copyfile", full)
    _check(_unwarp(src, out), src, out, capsys, names=(str(out), "corrected.nii.gz", "disp.nii.gz",
                                                      "space"))


def test_32b_disk_full_leaves_no_partial_output(case, capsys, monkeypatch):
    """Whatever the exit path, a full disk leaves nothing under the output names and no temporaries."""
    src, out = case
    import shutil

    real_copyfile = shutil.copyfile

    def full(a, b, *args, **kw):
        if Path(b).resolve().parent == out.resolve():
            Path(b).write_bytes(b"partial")
            raise OSError(errno.ENOSPC, "No space left on device", str(b))
        return real_copyfile(a, b, *args, **kw)

    monkeypatch.setattr(shutil, "copyfile", full)
    before = _hashes(src)
    try:
        code = main([str(a) for a in _unwarp(src, out)])
    except OSError as err:
        assert err.errno == errno.ENOSPC
        code = None
    assert code != 0
    assert list(out.rglob("*")) == []
    assert _hashes(src) == before


def test_33_output_overwrites_input(case, capsys):
    src, out = case
    argv = _unwarp(src, out)
    argv[argv.index(out / "corrected.nii.gz")] = src / "bold.nii.gz"
    _check(argv, src, out, capsys, names=("--out", "bold.nii.gz"))


# --- BIDS batch --------------------------------------------------------------

def test_34_run_on_missing_dataset(tmp_path, capsys):
    src, out = tmp_path / "raw", tmp_path / "out"
    src.mkdir()
    out.mkdir()
    _check(["run", tmp_path / "absent", out, "participant"], src, out, capsys,
           names=("absent", "BIDS_DIR"))


def test_35_run_bad_executor_args(tmp_path, capsys):
    src, out = tmp_path / "raw", tmp_path / "out"
    from bids_synth import make_tiny_study

    make_tiny_study(src)
    out.mkdir()
    _check(["run", src, out, "participant", "--executor", "slurm", "--executor-args", "{not json"],
           src, out, capsys, names=("--executor-args",))


@pytest.mark.parametrize("fault", ["missing_units", "contradictory_timing", "invalid_json"])
def test_36_run_bad_sidecar_fails_that_subject(tmp_path, capsys, fault):
    from bids_synth import make_tiny_study

    src, out = tmp_path / "raw", tmp_path / "out"
    make_tiny_study(src)
    for sub in ("sub-01", "sub-02", "sub-04"):  # keep one subject: fast
        import shutil

        shutil.rmtree(src / sub)
    side = src / "sub-03" / "fmap" / "sub-03_fieldmap.json"
    bold = src / "sub-03" / "func" / "sub-03_task-tap_bold.json"
    if fault == "missing_units":
        meta = json.loads(side.read_text())
        del meta["Units"]
        side.write_text(json.dumps(meta))
        target, key = side, "Units"
    elif fault == "contradictory_timing":
        meta = json.loads(bold.read_text())
        meta["TotalReadoutTime"] = meta["EffectiveEchoSpacing"] * 24 * 2  # twice what N=24 implies
        bold.write_text(json.dumps(meta))
        target, key = bold, "TotalReadoutTime"
    else:
        bold.write_text(bold.read_text()[:-5])
        target, key = bold, "JSON"
    before = _hashes(src)
    code = main([str(src), str(out)][:0] + ["run", str(src), str(out), "participant", "--quiet"])
    text = capsys.readouterr()
    lines = [ln for ln in (text.out + text.err).splitlines() if "FAILED" in ln]
    assert code == 1, text  # batch contract: a failed subject gives exit 1
    assert lines and target.name in lines[0] and key in lines[0], lines
    assert _hashes(src) == before
    assert not list(out.glob("sub-03/**/*.nii.gz")), "derivatives written for a failed subject"
