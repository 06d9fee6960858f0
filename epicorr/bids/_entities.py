"""BIDS file names: entities, suffix and extension, both ways.

A BIDS name is ``key-value`` pairs joined by ``_``, then ``_<suffix>``, then
the extension (BIDS specification, "File name structure").  Entities appear
in a fixed order (specification, "Entity table"); :func:`build_name` writes
them in that order.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping

__all__ = ["ENTITY_ORDER", "ParsedName", "parse_name", "build_name", "split_extension"]

#: Entity order of the BIDS specification (appendix "Entity table", v1.9).
ENTITY_ORDER: tuple[str, ...] = (
    "sub", "ses", "sample", "task", "tracksys", "acq", "nuc", "voi", "ce", "trc", "stain",
    "rec", "dir", "run", "mod", "echo", "flip", "inv", "mt", "part", "proc", "hemi", "space",
    "split", "recording", "chunk", "seg", "res", "den", "label", "desc",
)
_RANK = {key: idx for idx, key in enumerate(ENTITY_ORDER)}
_PAIR = re.compile(r"^([a-zA-Z]+)-([a-zA-Z0-9+]+)$")
_SUFFIX = re.compile(r"^[a-zA-Z0-9]+$")


def split_extension(name: str) -> tuple[str, str]:
    """Split ``"x_bold.nii.gz"`` into ``("x_bold", ".nii.gz")`` (everything after the first dot)."""
    base = name.rsplit("/", 1)[-1]
    if "." not in base:
        return name, ""
    stem, ext = base.split(".", 1)
    prefix = name[: len(name) - len(base)]
    return prefix + stem, "." + ext


@dataclass(frozen=True)
class ParsedName:
    """The parts of a BIDS file name.

    Attributes
    ----------
    entities : dict
        ``{"sub": "01", "task": "rest", ...}`` in file-name order.
    suffix : str
        e.g. ``"bold"``.
    extension : str
        e.g. ``".nii.gz"`` (with the leading dot; ``""`` when none).
    """

    entities: dict = field(hash=False)
    suffix: str
    extension: str

    @property
    def stem(self) -> str:
        """The name without its extension."""
        return build_name(self.entities, self.suffix)


def parse_name(name: str | Path) -> ParsedName | None:
    """Parse a BIDS file name (a path's last part is used).

    Returns ``None`` when the name is not of the form
    ``key-value[_key-value...]_suffix.ext`` with a leading ``sub-`` entity
    (top-level sidecars such as ``task-rest_bold.json`` are accepted too:
    they have no ``sub-``).
    """
    base = Path(name).name
    stem, ext = split_extension(base)
    parts = stem.split("_")
    if len(parts) < 2:
        return None
    suffix = parts[-1]
    if not _SUFFIX.match(suffix):
        return None
    entities: dict[str, str] = {}
    for part in parts[:-1]:
        m = _PAIR.match(part)
        if not m or m.group(1) in entities:
            return None
        entities[m.group(1)] = m.group(2)
    return ParsedName(entities=entities, suffix=suffix, extension=ext)


def build_name(entities: Mapping[str, str], suffix: str, extension: str = "") -> str:
    """Write a BIDS name with the entities in specification order.

    Unknown entities keep their relative order after the known ones.

    Examples
    --------
    >>> build_name({"task": "rest", "sub": "01"}, "bold", ".nii.gz")
    'sub-01_task-rest_bold.nii.gz'
    """
    keys = sorted(entities, key=lambda k: (_RANK.get(k, len(_RANK)), list(entities).index(k)))
    parts = [f"{k}-{entities[k]}" for k in keys if entities[k] is not None]
    return "_".join(parts + [suffix]) + extension
