"""Index a BIDS dataset: data files, entities and inherited sidecar metadata.

A small parser of our own: one ``os.scandir`` walk, names parsed with
:mod:`._entities`, sidecars read lazily and cached.  Metadata follows the
BIDS inheritance principle (specification, "The Inheritance Principle"): a
JSON sidecar applies to a data file when it sits in the file's folder or a
parent folder up to the dataset root, has the same suffix, and its entities
are a subset of the file's; deeper and more specific sidecars override
shallower ones, key by key.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Any, Iterable, Mapping

from ..errors import EpicorrInputError
from ._entities import parse_name

__all__ = ["BidsFile", "BidsDataset", "index_dataset", "DATA_EXTENSIONS"]

#: Extensions of image data files we index.
DATA_EXTENSIONS = (".nii.gz", ".nii")
_SIDECAR_EXTENSIONS = (".json", ".bval", ".bvec")
_SKIP_TOP = {"derivatives", "sourcedata", "code", "stimuli"}


@dataclass(frozen=True)
class BidsFile:
    """One file of the dataset.

    Attributes
    ----------
    path : Path
        Absolute path.
    relpath : str
        POSIX path relative to the dataset root, e.g. ``"sub-01/func/sub-01_task-x_bold.nii.gz"``.
    entities : dict
        Parsed entities (``{"sub": "01", "task": "x"}``).
    suffix, extension : str
        e.g. ``"bold"``, ``".nii.gz"``.
    datatype : str or None
        The folder above the file (``func``, ``fmap``, ``dwi``, ``anat``), ``None`` at top level.
    """

    path: Path
    relpath: str
    entities: dict = field(hash=False, compare=False)
    suffix: str = ""
    extension: str = ""
    datatype: str | None = None

    @property
    def folder(self) -> str:
        """Relative folder (``"sub-01/func"``, ``""`` for the root)."""
        parent = str(PurePosixPath(self.relpath).parent)
        return "" if parent == "." else parent

    @property
    def stem(self) -> str:
        """File name without extension."""
        name = PurePosixPath(self.relpath).name
        return name[: len(name) - len(self.extension)] if self.extension else name

    def __str__(self) -> str:  # pragma: no cover - trivial
        return self.relpath


def _depth(folder: str) -> int:
    return 0 if not folder else folder.count("/") + 1


class BidsDataset:
    """An indexed BIDS dataset (build it with :func:`index_dataset`).

    Attributes
    ----------
    root : Path
    files : list of BidsFile
        Image data files (``.nii``/``.nii.gz``) under ``sub-*`` folders.
    """

    def __init__(self, root: Path, data: list[BidsFile], sidecars: list[BidsFile]):
        self.root = root
        self.files = sorted(data, key=lambda f: f.relpath)
        self._by_rel = {f.relpath: f for f in self.files}
        self._sidecars: dict[tuple[str, str, str], list[BidsFile]] = {}
        for sc in sidecars:
            self._sidecars.setdefault((sc.suffix, sc.extension, sc.folder), []).append(sc)
        self._json_cache: dict[Path, dict] = {}
        self._meta_cache: dict[str, tuple[dict, dict]] = {}

    # -- queries ---------------------------------------------------------
    def subjects(self) -> list[str]:
        """Subject labels (without ``sub-``), sorted."""
        return sorted({f.entities["sub"] for f in self.files})

    def get(self, relpath: str) -> BidsFile | None:
        """The data file at ``relpath`` (POSIX, relative to the root), or ``None``."""
        return self._by_rel.get(relpath)

    def select(self, *, subject: str | None = None, datatype: str | None = None,
               suffix: str | Iterable[str] | None = None) -> list[BidsFile]:
        """Data files matching all the given criteria."""
        suffixes = {suffix} if isinstance(suffix, str) else (set(suffix) if suffix else None)
        return [f for f in self.files
                if (subject is None or f.entities.get("sub") == subject)
                and (datatype is None or f.datatype == datatype)
                and (suffixes is None or f.suffix in suffixes)]

    # -- sidecars --------------------------------------------------------
    def _applicable(self, target: BidsFile, extension: str) -> list[BidsFile]:
        parts = target.folder.split("/") if target.folder else []
        out = []
        for depth in range(len(parts) + 1):
            folder = "/".join(parts[:depth])
            for sc in self._sidecars.get((target.suffix, extension, folder), ()):
                if all(target.entities.get(k) == v for k, v in sc.entities.items()):
                    out.append(sc)
        # Shallow and general first, so deeper and more specific ones override.
        out.sort(key=lambda sc: (_depth(sc.folder), len(sc.entities)))
        return out

    def _read_json(self, path: Path) -> dict:
        if path not in self._json_cache:
            try:
                with open(path, encoding="utf-8") as fh:
                    data = json.load(fh)
            except (OSError, UnicodeDecodeError, json.JSONDecodeError) as err:
                raise EpicorrInputError(f"cannot read the JSON sidecar ({err})", file=path,
                                        hint="fix the file (it must be valid UTF-8 JSON)") from None
            if not isinstance(data, dict):
                raise EpicorrInputError("a sidecar must hold a JSON object", file=path,
                                        hint="fix the file")
            self._json_cache[path] = data
        return self._json_cache[path]

    def metadata(self, target: BidsFile) -> dict:
        """Inherited sidecar metadata of a data file (a new dict)."""
        return dict(self._metadata(target)[0])

    def origin(self, target: BidsFile, key: str) -> Path:
        """The sidecar that gave ``key`` (or the nearest sidecar, or the file itself)."""
        meta, origins = self._metadata(target)
        if key in origins:
            return origins[key]
        chain = self.sidecar_chain(target)
        return chain[-1] if chain else target.path

    def sidecar_chain(self, target: BidsFile) -> list[Path]:
        """The JSON sidecars that apply to ``target``, general first."""
        return [sc.path for sc in self._applicable(target, ".json")]

    def _metadata(self, target: BidsFile) -> tuple[dict, dict]:
        if target.relpath not in self._meta_cache:
            meta: dict[str, Any] = {}
            origins: dict[str, Path] = {}
            for sc in self._applicable(target, ".json"):
                for k, v in self._read_json(sc.path).items():
                    meta[k] = v
                    origins[k] = sc.path
            self._meta_cache[target.relpath] = (meta, origins)
        return self._meta_cache[target.relpath]

    def companion(self, target: BidsFile, extension: str) -> Path | None:
        """The nearest ``.bval``/``.bvec`` (any sidecar extension) that applies, or ``None``."""
        chain = self._applicable(target, extension)
        return chain[-1].path if chain else None


def _scan(root: Path, rel: str, data: list, sidecars: list) -> None:
    try:
        entries = list(os.scandir(root / rel if rel else root))
    except OSError:
        return
    for entry in entries:
        name = entry.name
        if name.startswith("."):
            continue
        relpath = f"{rel}/{name}" if rel else name
        if entry.is_dir():
            if not rel and (name in _SKIP_TOP or not name.startswith("sub-")):
                continue
            _scan(root, relpath, data, sidecars)
            continue
        is_data = name.endswith(DATA_EXTENSIONS)
        is_side = name.endswith(_SIDECAR_EXTENSIONS)
        if not (is_data or is_side):
            continue
        parsed = parse_name(name)
        if parsed is None:
            continue
        parts = relpath.split("/")
        datatype = parts[-2] if len(parts) >= 2 and not parts[-2].startswith(("sub-", "ses-")) else None
        bf = BidsFile(path=Path(entry.path), relpath=relpath, entities=parsed.entities,
                      suffix=parsed.suffix, extension=parsed.extension, datatype=datatype)
        if is_data:
            if "sub" in parsed.entities and rel:
                data.append(bf)
        else:
            sidecars.append(bf)


def index_dataset(root: str | os.PathLike, *, participant_labels: Iterable[str] | None = None
                  ) -> BidsDataset:
    """Index the BIDS dataset at ``root``.

    Parameters
    ----------
    root : path
        The dataset folder (holds ``dataset_description.json``).
    participant_labels : iterable of str, optional
        Only index these subjects (with or without the ``sub-`` prefix);
        the root's own sidecars are always read.

    Raises
    ------
    EpicorrInputError
        When ``root`` is not a BIDS dataset or a requested subject is absent.
    """
    root = Path(root).resolve()
    desc = root / "dataset_description.json"
    if not root.is_dir():
        raise EpicorrInputError("not a folder", file=root, hint="give the BIDS dataset folder")
    if not desc.is_file():
        raise EpicorrInputError("not a BIDS dataset: dataset_description.json is missing",
                                file=desc, hint="give the folder that holds dataset_description.json")
    data: list[BidsFile] = []
    sidecars: list[BidsFile] = []
    if participant_labels is None:
        _scan(root, "", data, sidecars)
    else:
        labels = [str(lab).removeprefix("sub-") for lab in participant_labels]
        for entry in os.scandir(root):
            if entry.is_file() and entry.name.endswith(_SIDECAR_EXTENSIONS):
                parsed = parse_name(entry.name)
                if parsed is not None:
                    sidecars.append(BidsFile(path=Path(entry.path), relpath=entry.name,
                                             entities=parsed.entities, suffix=parsed.suffix,
                                             extension=parsed.extension))
        for label in labels:
            if not (root / f"sub-{label}").is_dir():
                raise EpicorrInputError("no such subject in the dataset", file=root,
                                        key="--participant-label", value=label,
                                        hint="give labels of existing sub-<label> folders")
            _scan(root, f"sub-{label}", data, sidecars)
    return BidsDataset(root, data, sidecars)


def read_description(root: Path) -> Mapping[str, Any]:  # pragma: no cover - convenience
    """The dataset's ``dataset_description.json``."""
    with open(Path(root) / "dataset_description.json", encoding="utf-8") as fh:
        return json.load(fh)
