"""File I/O: NIfTI checks, header preservation, atomic writes."""

import gzip
import json
import os

import nibabel as nib
import numpy as np
import pytest

from epicorr import io as eio
from epicorr.errors import EpicorrInputError
from epicorr.io import image_like, load_image, load_sidecar, save_image_atomic, save_json_atomic

OBLIQUE = np.array([[-2.0, 0.1, 0.0, 90.0],
                    [0.0, 0.2, 2.5, -100.0],
                    [0.0, -2.0, 0.25, 80.0],
                    [0.0, 0.0, 0.0, 1.0]])


def _series(tmp_path, name="bold.nii.gz", shape=(6, 7, 5, 4), dtype=np.int16):
    data = np.arange(np.prod(shape)).reshape(shape).astype(dtype)
    img = nib.Nifti1Image(data, OBLIQUE)
    img.set_qform(OBLIQUE, code=1)   # NIfTI-1 standard: 1 = scanner anatomical
    img.set_sform(OBLIQUE, code=4)   # 4 = MNI-152 (any non-zero code must survive)
    img.header.set_zooms(img.header.get_zooms()[:3] + (1.7,))
    img.header.set_xyzt_units("mm", "sec")
    img.header["slice_duration"] = 0.05
    path = tmp_path / name
    nib.save(img, str(path))
    return path, data


def test_load_keeps_on_disk_dtype_and_is_lazy(tmp_path):
    path, data = _series(tmp_path)
    img = load_image(path, name="EPI series")
    assert isinstance(img.dataobj, nib.arrayproxy.ArrayProxy)
    arr = np.asanyarray(img.dataobj)
    assert arr.dtype == np.int16                   # not float64
    np.testing.assert_array_equal(arr, data)
    np.testing.assert_array_equal(np.asanyarray(img.dataobj[..., 2]), data[..., 2])


def test_image_like_preserves_header(tmp_path):
    # NIfTI-1 standard (nifti1.h): qform/sform with their codes, pixdim (zooms, TR in
    # pixdim[4]) and xyzt_units describe the grid; scl_slope = 0 or NaN means "no
    # scaling" for the float output.
    path, data = _series(tmp_path)
    ref = load_image(path)
    ref.header["scl_slope"] = 2.0
    ref.header["scl_inter"] = 5.0
    out = image_like(np.ones(ref.shape), ref)
    save_image_atomic(out, tmp_path / "out.nii.gz")
    back = nib.load(str(tmp_path / "out.nii.gz"))
    h, r = back.header, nib.load(str(path)).header
    np.testing.assert_allclose(back.affine, OBLIQUE, atol=1e-5)
    assert int(h["qform_code"]) == 1 and int(h["sform_code"]) == 4
    np.testing.assert_allclose(h.get_qform(), r.get_qform(), atol=1e-5)
    np.testing.assert_allclose(h.get_sform(), r.get_sform(), atol=1e-6)
    np.testing.assert_allclose(h.get_zooms(), r.get_zooms(), rtol=1e-6)
    assert h.get_zooms()[3] == pytest.approx(1.7)
    assert h.get_xyzt_units() == ("mm", "sec")
    assert float(h["slice_duration"]) == pytest.approx(0.05)
    assert back.get_data_dtype() == np.float32
    assert h.get_slope_inter() == (None, None)
    np.testing.assert_array_equal(np.asanyarray(back.dataobj), 1.0)
    # A 3-D output from a 4-D reference keeps the spatial header.
    three = image_like(np.zeros(ref.shape[:3]), ref)
    assert three.shape == ref.shape[:3] and three.header.get_zooms() == r.get_zooms()[:3]
    with pytest.raises(EpicorrInputError, match="grid"):
        image_like(np.zeros((2, 2, 2)), ref)


@pytest.mark.parametrize("suffix", [".nii", ".nii.gz"])
def test_truncated_file_rejected(tmp_path, suffix):
    path, _ = _series(tmp_path, name="bold" + suffix, shape=(10, 10, 8, 6), dtype=np.float32)
    raw = path.read_bytes()
    if suffix == ".nii.gz":   # cut the compressed stream in half
        path.write_bytes(raw[: len(raw) // 2])
    else:
        path.write_bytes(raw[: len(raw) - 100])
    with pytest.raises(EpicorrInputError, match="truncated") as err:
        load_image(path, name="EPI series")
    assert str(path) in str(err.value) and "\n" not in str(err.value)


def test_multi_member_gzip_is_accepted(tmp_path):
    # RFC 1952 allows several gzip members in one file; the length trailer then
    # covers the last member only, so the loader must fall back to a full read.
    path, data = _series(tmp_path, name="bold.nii", dtype=np.float32)
    raw = path.read_bytes()
    gz = tmp_path / "multi.nii.gz"
    gz.write_bytes(gzip.compress(raw[:1000]) + gzip.compress(raw[1000:]))
    img = load_image(gz)
    np.testing.assert_array_equal(np.asanyarray(img.dataobj), data)


def test_bad_files(tmp_path):
    with pytest.raises(EpicorrInputError, match="not found"):
        load_image(tmp_path / "missing.nii.gz")
    txt = tmp_path / "notes.txt"
    txt.write_text("hello")
    with pytest.raises(EpicorrInputError, match="not a NIfTI"):
        load_image(txt)
    junk = tmp_path / "junk.nii.gz"
    junk.write_bytes(b"this is not an image at all")
    with pytest.raises(EpicorrInputError, match="cannot be read") as err:
        load_image(junk)
    assert "junk.nii.gz" in str(err.value)
    mgh = tmp_path / "vol.mgz"
    nib.save(nib.MGHImage(np.zeros((3, 3, 3), np.float32), np.eye(4)), str(mgh))
    with pytest.raises(EpicorrInputError, match="NIfTI"):
        load_image(mgh)


def test_dimensions_checked(tmp_path):
    five = tmp_path / "five.nii"
    nib.save(nib.Nifti1Image(np.zeros((3, 3, 3, 2, 2), np.float32), np.eye(4)), str(five))
    with pytest.raises(EpicorrInputError, match="5-D"):
        load_image(five)
    series = tmp_path / "series.nii"
    nib.save(nib.Nifti1Image(np.zeros((3, 3, 3, 2), np.float32), np.eye(4)), str(series))
    with pytest.raises(EpicorrInputError, match="expected 3-D"):
        load_image(series, allowed_ndim=(3,), name="field map")
    single = tmp_path / "single.nii"
    nib.save(nib.Nifti1Image(np.ones((3, 4, 5, 1), np.float32), np.eye(4)), str(single))
    img = load_image(single, allowed_ndim=(3,))
    assert img.shape == (3, 4, 5)
    assert np.asanyarray(img.dataobj).shape == (3, 4, 5)
    empty = tmp_path / "empty.nii"
    nib.save(nib.Nifti1Image(np.zeros((3, 0, 3), np.float32), np.eye(4)), str(empty))
    with pytest.raises(EpicorrInputError, match="zero-size"):
        load_image(empty)


@pytest.mark.parametrize("bad", ["nan", "singular"])
def test_affine_checked(tmp_path, bad):
    img = nib.Nifti1Image(np.zeros((3, 3, 3), np.float32), np.eye(4))
    aff = np.eye(4)
    if bad == "nan":
        aff[0, 3] = np.nan
    else:
        aff[2] = [0, 0, 0, 0]
        aff[3, 3] = 1
    img.set_sform(aff, code=1)
    img.set_qform(None, code=0)
    path = tmp_path / "a.nii"
    nib.save(img, str(path))
    with pytest.raises(EpicorrInputError, match="affine"):
        load_image(path)


def test_sidecar(tmp_path):
    good = tmp_path / "bold.json"
    good.write_text(json.dumps({"EffectiveEchoSpacing": 0.0005, "PhaseEncodingDirection": "j-"}))
    assert load_sidecar(good)["PhaseEncodingDirection"] == "j-"
    with pytest.raises(EpicorrInputError, match="not found") as err:
        load_sidecar(tmp_path / "nope.json")
    assert "nope.json" in str(err.value)
    broken = tmp_path / "broken.json"
    broken.write_text('{"EffectiveEchoSpacing": 0.0005,\n "TotalReadoutTime": }')
    with pytest.raises(EpicorrInputError, match="line 2") as err:
        load_sidecar(broken)
    assert "broken.json" in str(err.value)
    listing = tmp_path / "list.json"
    listing.write_text("[1, 2]")
    with pytest.raises(EpicorrInputError, match="JSON object"):
        load_sidecar(listing)


def test_atomic_write_leaves_nothing_on_failure(tmp_path, monkeypatch):
    # Atomic replacement (POSIX rename(2) semantics via os.replace): a failed write
    # leaves no file under the final name and no temporary file.
    img = nib.Nifti1Image(np.zeros((3, 3, 3), np.float32), np.eye(4))
    target = tmp_path / "out.nii.gz"

    def boom(*args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(eio.nib, "save", boom)
    # An OS-level write failure is reported as bad output (exit 2 at the CLI), naming the file.
    with pytest.raises(EpicorrInputError, match="out.nii.gz.*disk full"):
        save_image_atomic(img, target)
    assert list(tmp_path.iterdir()) == []
    monkeypatch.undo()
    # An earlier good file survives a failed overwrite untouched.
    save_image_atomic(img, target)
    before = target.read_bytes()
    monkeypatch.setattr(eio.nib, "save", boom)
    with pytest.raises(EpicorrInputError):
        save_image_atomic(img, target)
    assert target.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.nii.gz"]


def test_json_atomic(tmp_path):
    target = tmp_path / "summary.json"
    save_json_atomic({"a": 1.5, "b": [1, 2]}, target)
    assert json.loads(target.read_text()) == {"a": 1.5, "b": [1, 2]}
    mode = target.stat().st_mode & 0o777
    umask = os.umask(0)
    os.umask(umask)
    assert mode == 0o666 & ~umask
    with pytest.raises(ValueError):
        save_json_atomic({"x": float("nan")}, tmp_path / "nan.json")   # not valid JSON
    assert not (tmp_path / "nan.json").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["summary.json"]


def test_stale_temporaries_of_one_subject_are_removed_and_nothing_else(tmp_path):
    # The atomic writer's temporary naming: ".<final name>.<random>.part<ext>" (see _atomic_write).
    from epicorr.io import remove_stale_temporaries

    func = tmp_path / "sub-01" / "func"
    func.mkdir(parents=True)
    stale = [func / ".sub-01_task-a_desc-field_fieldmap.json.k2j3.part.json",
             func / ".sub-01_task-a_desc-unwarped_bold.nii.gz.x9y8.part.nii.gz"]
    keep = [func / "sub-01_task-a_desc-field_fieldmap.json",            # a final output
            func / ".sub-010_task-a_bold.nii.gz.q1w2.part.nii.gz",      # another subject's write
            func / ".hidden_note.part"]                                 # not ours at all
    for p in stale + keep:
        p.write_text("x")
    removed = remove_stale_temporaries(tmp_path / "sub-01", name_prefix="sub-01")
    assert sorted(removed) == sorted(stale)
    assert all(p.exists() for p in keep) and not any(p.exists() for p in stale)
    assert remove_stale_temporaries(tmp_path / "missing", name_prefix="sub-01") == []
    # Top level only: a batch-level file's temporary goes, a same-named one deeper stays.
    top = tmp_path / ".dataset_description.json.a1b2.part.json"
    deep = func / ".dataset_description.json.c3d4.part.json"
    for p in (top, deep):
        p.write_text("x")
    assert remove_stale_temporaries(tmp_path, name_prefix="dataset_description.json",
                                    recursive=False) == [top]
    assert deep.exists() and not top.exists()
