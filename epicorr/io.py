"""File input and output (an edge of the package).

* :func:`load_image` opens a NIfTI file lazily and checks what the core
  functions rely on (dimensions, a usable affine, a complete data block), so
  bad files fail early with one clear :class:`~epicorr.errors.EpicorrInputError`.
  The data stay on disk: ``np.asanyarray(img.dataobj)`` keeps the stored
  dtype, and ``img.dataobj[..., t]`` reads one volume of a series.
* :func:`load_sidecar` reads a BIDS JSON sidecar.
* :func:`save_image_atomic` / :func:`save_json_atomic` write to a temporary
  file in the destination folder, ``fsync`` it and ``os.replace`` it over the
  final name, so a reader never sees a half-written file under that name.
* :func:`image_like` wraps an output array in the header of a reference
  image (affine, qform/sform and codes, zooms, TR, units kept; scaling reset).
"""

from __future__ import annotations

import gzip
import json
import math
import os
import tempfile
import zlib
from pathlib import Path
from typing import Any, Iterable

import nibabel as nib
import numpy as np

from .errors import EpicorrInputError

__all__ = ["load_image", "load_sidecar", "save_image_atomic", "save_json_atomic", "save_text_atomic",
           "remove_stale_temporaries",
           "copy_file_atomic", "image_like"]

_NIFTI_SUFFIXES = (".nii", ".nii.gz", ".hdr", ".img", ".img.gz", ".hdr.gz")


def _label(name: str | None) -> str:
    return f"{name}: " if name else ""


def _gzip_length(path: Path) -> int | None:
    """Uncompressed length of a gzip file, or None if the stream ends early or is corrupt."""
    total = 0
    try:
        with gzip.open(path, "rb") as fh:
            while True:
                chunk = fh.read(1 << 22)
                if not chunk:
                    return total
                total += len(chunk)
    except (EOFError, OSError, zlib.error):
        return None


def _check_complete(img: nib.Nifti1Image, path: Path, name: str | None) -> None:
    """Fail if the data block is shorter than the header promises (truncated file)."""
    hdr = img.header
    fmap = img.file_map.get("image")
    data_path = Path(fmap.filename) if fmap is not None and fmap.filename else path
    # The proxy knows where the data block starts (the image's header copy may not).
    offset = int(getattr(img.dataobj, "offset", hdr.get_data_offset()))
    expected = offset + int(np.prod(img.shape, dtype=np.int64)) * hdr.get_data_dtype().itemsize
    if str(data_path).endswith(".gz"):
        with open(data_path, "rb") as fh:
            fh.seek(0, os.SEEK_END)
            size = fh.tell()
            if size >= 4:
                fh.seek(-4, os.SEEK_END)
                isize = int.from_bytes(fh.read(4), "little")  # RFC 1952: length mod 2**32
            else:
                isize = -1
        if isize == expected % 2**32:
            return
        actual = _gzip_length(data_path)  # slow path: decompress to be sure
        if actual is not None and actual >= expected:
            return
    else:
        actual = data_path.stat().st_size
        if actual >= expected:
            return
    raise EpicorrInputError(f"{_label(name)}file is truncated or corrupt (data block shorter than "
                            f"the header's {tuple(img.shape)} x {hdr.get_data_dtype()})",
                            file=data_path, hint="re-export or re-download the file")


def load_image(path: Any, *, allowed_ndim: Iterable[int] = (3, 4), name: str | None = None,
               check_data: bool = True) -> nib.Nifti1Image:
    """Open a NIfTI image and check it can be used.

    Parameters
    ----------
    path : str or path-like
        A ``.nii`` or ``.nii.gz`` file (NIfTI-1 or NIfTI-2).
    allowed_ndim : sequence of int
        Accepted numbers of dimensions.  Trailing dimensions of length 1
        beyond these are dropped (e.g. a field map stored as ``(X, Y, Z, 1)``).
    name : str, optional
        What the file is (``"field map"``, ``"EPI series"``), for messages.
    check_data : bool
        Verify that the data block is complete (cheap for ``.nii``; for
        ``.nii.gz`` the gzip length trailer is read, and only if it disagrees
        is the file decompressed).

    Returns
    -------
    nibabel.Nifti1Image
        Lazily loaded (``img.dataobj`` is an array proxy).

    Raises
    ------
    EpicorrInputError
        Missing, unreadable, truncated or non-NIfTI file; wrong number of
        dimensions; a zero-size dimension; a non-finite or singular affine.
    """
    path = Path(path)
    allowed = tuple(int(n) for n in allowed_ndim)
    label = _label(name)
    if not path.exists():
        raise EpicorrInputError(f"{label}file not found", file=path, hint="check the path")
    if path.is_dir():
        raise EpicorrInputError(f"{label}is a folder, not a NIfTI file", file=path)
    if not str(path).lower().endswith(_NIFTI_SUFFIXES):
        raise EpicorrInputError(f"{label}not a NIfTI file (expected .nii or .nii.gz)", file=path)
    try:
        img = nib.load(str(path))
    except Exception as exc:  # nibabel raises many kinds for bad files
        detail = " ".join(str(exc).split()) or type(exc).__name__
        raise EpicorrInputError(f"{label}cannot be read as NIfTI ({detail})", file=path,
                                hint="check that the file is a complete NIfTI image") from None
    if not isinstance(img, nib.Nifti1Image):
        raise EpicorrInputError(f"{label}not a NIfTI image ({type(img).__name__})", file=path,
                                hint="convert it to NIfTI first")
    shape = tuple(int(s) for s in img.shape)
    if 0 in shape:
        raise EpicorrInputError(f"{label}image has a zero-size dimension", file=path, key="shape",
                                value=shape)
    if len(shape) not in allowed:
        keep = len(shape)
        while keep > 3 and shape[keep - 1] == 1 and keep not in allowed:
            keep -= 1
        if keep in allowed:
            img = img.__class__(img.dataobj.reshape(shape[:keep]), img.affine, img.header)
            shape = shape[:keep]
        else:
            want = " or ".join(f"{n}-D" for n in allowed)
            raise EpicorrInputError(f"{label}image is {len(shape)}-D, expected {want}", file=path,
                                    key="shape", value=shape)
    affine = np.asarray(img.affine, dtype=np.float64)
    if not np.all(np.isfinite(affine)):
        raise EpicorrInputError(f"{label}affine contains NaN or infinite values", file=path,
                                hint="fix the qform/sform of the file")
    det = float(np.linalg.det(affine[:3, :3]))
    scale = float(np.prod(np.linalg.norm(affine[:3, :3], axis=0)))
    if not math.isfinite(det) or scale == 0 or abs(det) < 1e-6 * scale:
        raise EpicorrInputError(f"{label}affine is not invertible (determinant {det:.3g})", file=path,
                                hint="fix the qform/sform of the file")
    if check_data:
        _check_complete(img, path, name)
    return img


def load_sidecar(path: Any) -> dict:
    """Read a BIDS JSON sidecar.

    Returns
    -------
    dict

    Raises
    ------
    EpicorrInputError
        Missing file, invalid JSON (with line and column) or a top level that
        is not an object.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise EpicorrInputError("sidecar not found", file=path,
                                hint="BIDS needs a .json sidecar with the acquisition metadata") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise EpicorrInputError(f"sidecar cannot be read ({type(exc).__name__})", file=path) from None
    try:
        obj = json.loads(text)
    except json.JSONDecodeError as exc:
        raise EpicorrInputError(f"invalid JSON at line {exc.lineno} column {exc.colno}: {exc.msg}",
                                file=path, hint="fix the sidecar") from None
    if not isinstance(obj, dict):
        raise EpicorrInputError("sidecar must be a JSON object", file=path,
                                value=type(obj).__name__, hint="fix the sidecar")
    return obj


def _suffix(path: Path) -> str:
    name = path.name
    for suf in (".nii.gz", ".json.gz"):
        if name.endswith(suf):
            return suf
    return path.suffix


def _default_mode() -> int:
    """Permission bits an ordinary new file gets (0o666 minus the umask)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return 0o666 & ~mask


def _write_error(path: Path, err: OSError) -> EpicorrInputError:
    """An output that cannot be written (unwritable folder, full disk) is bad input: exit 2."""
    reason = err.strerror or str(err) or type(err).__name__
    return EpicorrInputError(f"cannot write this output ({reason})", file=path,
                             hint="check that the output folder exists, is writable and has free space")


def _atomic_write(path: Any, write) -> Path:
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    try:
        fd, tmp = tempfile.mkstemp(dir=folder, prefix=f".{path.name}.", suffix=".part" + _suffix(path))
    except OSError as err:
        raise _write_error(path, err) from err
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        write(tmp_path)
        with open(tmp_path, "rb+") as fh:
            os.fsync(fh.fileno())
        os.chmod(tmp_path, _default_mode())  # mkstemp makes 0600 files
        os.replace(tmp_path, path)
    except BaseException as err:
        try:
            tmp_path.unlink()
        except FileNotFoundError:
            pass
        if isinstance(err, OSError):
            raise _write_error(path, err) from err
        raise
    try:  # make the rename itself durable
        dir_fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)
    except OSError:  # pragma: no cover - some file systems refuse
        pass
    return path


def remove_stale_temporaries(folder: Any, *, name_prefix: str, recursive: bool = True) -> list[Path]:
    """Delete the hidden temporaries an interrupted atomic write left behind.

    The atomic writers name a temporary ``.<final name>.<random>.part<ext>``
    beside its final file and rename it when complete; a process killed in
    between leaves it.  Only temporaries whose final name starts with
    ``name_prefix`` followed by ``_`` or ``.`` (e.g. ``"sub-01"``, which
    leaves ``sub-010``'s alone) are removed, anywhere under
    ``folder``, so a re-run of one subject never touches another's writes in
    progress.  A missing folder is fine.  ``recursive=False`` looks in
    ``folder`` itself only (for batch-level files such as
    ``dataset_description.json`` at the top of a large output tree).

    Returns
    -------
    list of Path
        The files removed.
    """
    root = Path(folder)
    removed: list[Path] = []
    if not root.is_dir():
        return removed
    pattern = f".{name_prefix}*.part*"
    for path in root.rglob(pattern) if recursive else root.glob(pattern):
        rest = path.name[1:]
        after = rest[len(name_prefix):len(name_prefix) + 1]
        if not rest.startswith(name_prefix) or after not in ("_", ".") or not path.is_file():
            continue
        try:
            path.unlink()
            removed.append(path)
        except FileNotFoundError:
            pass
    return removed


def save_image_atomic(img: nib.Nifti1Image, path: Any) -> Path:
    """Write a NIfTI image atomically (temporary file in the same folder, then rename).

    Parameters
    ----------
    img : nibabel.Nifti1Image
    path : str or path-like
        Final name (``.nii`` or ``.nii.gz``; the suffix picks compression).

    Returns
    -------
    Path
        ``path``.  If writing fails, no file exists under ``path`` (an
        earlier file of that name is left untouched) and no temporary file
        is left behind.
    """
    return _atomic_write(path, lambda tmp: nib.save(img, str(tmp)))


def save_json_atomic(obj: Any, path: Any) -> Path:
    """Write JSON atomically (indented, UTF-8, sorted keys kept as given).

    Returns
    -------
    Path
    """
    text = json.dumps(obj, indent=2, allow_nan=False) + "\n"  # fails before writing anything
    return _atomic_write(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))


def save_text_atomic(text: str, path: Any) -> Path:
    """Write UTF-8 text (an HTML page, a TSV) atomically.

    Returns
    -------
    Path
    """
    return _atomic_write(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))


def copy_file_atomic(src: Any, dst: Any) -> Path:
    """Copy ``src`` to ``dst`` atomically (temporary file beside ``dst``, then rename).

    Returns
    -------
    Path
        ``dst``.  A failed copy leaves nothing under ``dst`` and raises
        :class:`~epicorr.errors.EpicorrInputError` naming it.
    """
    import shutil

    return _atomic_write(dst, lambda tmp: shutil.copyfile(src, tmp))


def image_like(data: np.ndarray, reference_img: nib.Nifti1Image, *, dtype: Any = np.float32) -> nib.Nifti1Image:
    """Wrap ``data`` in a copy of a reference image's header.

    Parameters
    ----------
    data : ndarray, shape (X, Y, Z) or (X, Y, Z, T)
        Same spatial grid as the reference.
    reference_img : nibabel.Nifti1Image
    dtype : numpy dtype
        On-disk data type (default float32).

    Returns
    -------
    nibabel.Nifti1Image
        Affine, qform and sform with their codes, voxel sizes, TR (when
        ``data`` is 4-D and the reference has one), xyzt units, slice
        information and description kept; ``scl_slope``/``scl_inter`` and
        ``cal_min``/``cal_max`` reset.
    """
    ref_hdr = reference_img.header
    data = np.asanyarray(data)
    if data.shape[:3] != tuple(reference_img.shape[:3]):
        raise EpicorrInputError("data grid does not match the reference image", key="shape",
                                value=data.shape, hint=f"expected {tuple(reference_img.shape[:3])}")
    hdr = ref_hdr.copy()
    hdr.set_data_shape(data.shape)
    hdr.set_data_dtype(dtype)
    ref_zooms = tuple(float(z) for z in ref_hdr.get_zooms())
    zooms = list(ref_zooms[:3])
    if data.ndim == 4:
        zooms.append(ref_zooms[3] if len(ref_zooms) > 3 else 1.0)  # TR (s, per xyzt units)
    elif data.ndim != 3:
        raise EpicorrInputError("data must be 3-D or 4-D", key="shape", value=data.shape)
    hdr.set_zooms(zooms)
    hdr["scl_slope"] = np.nan
    hdr["scl_inter"] = np.nan
    hdr["cal_min"] = 0.0
    hdr["cal_max"] = 0.0
    klass = type(reference_img) if isinstance(reference_img, nib.Nifti1Image) else nib.Nifti1Image
    out = klass(data, reference_img.affine, hdr)
    out.set_qform(ref_hdr.get_qform(), code=int(ref_hdr["qform_code"]))
    out.set_sform(ref_hdr.get_sform(), code=int(ref_hdr["sform_code"]))
    out.header.set_xyzt_units(*ref_hdr.get_xyzt_units())
    out.set_data_dtype(dtype)
    return out
