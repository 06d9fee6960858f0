"""Correction targets: the EPI series of a subject that get unwarped.

Targets are ``func/*_bold``, ``func/*_sbref`` and ``dwi/*_dwi`` (BIDS
specification, "Task imaging data" and "Diffusion imaging data").  The echoes
of a multi-echo series (files that differ only in ``echo-<n>``) form one
target: they share one field and one displacement.  A ``func/*_sbref`` with the
same entities as a ``func/*_bold`` joins that bold's target (same field, same
derivative names); it is then the registration reference, which is what
single-band references are acquired for.  A standalone sbref is its own
target.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from ._entities import build_name
from ._layout import BidsDataset, BidsFile

__all__ = ["Target", "TARGET_KINDS", "find_targets"]

#: (datatype, suffix) of the series we correct.
TARGET_KINDS: tuple[tuple[str, str], ...] = (("func", "bold"), ("func", "sbref"), ("dwi", "dwi"))


def _echo_number(f: BidsFile) -> float:
    try:
        return float(f.entities.get("echo", 0))
    except ValueError:
        return 0.0


@dataclass(frozen=True)
class Target:
    """One series to correct (all its echoes).

    Attributes
    ----------
    echoes : tuple of BidsFile
        The data files, one per echo in echo order (one file when single-echo).
    sbref : tuple of BidsFile
        Single-band references with the same entities (unwarped too), echo order.
    bval, bvec : Path or None
        Gradient tables of a ``dwi`` series (kept beside the output).
    """

    echoes: tuple
    sbref: tuple = ()
    bval: Path | None = None
    bvec: Path | None = None

    @property
    def first(self) -> BidsFile:
        """The first echo's file (carries the shared geometry)."""
        return self.echoes[0]

    @property
    def files(self) -> tuple:
        """Every file to unwarp: the echoes, then the sbref echoes."""
        return tuple(self.echoes) + tuple(self.sbref)

    @property
    def reference(self) -> BidsFile:
        """The file whose first volume is the registration reference."""
        return self.sbref[0] if self.sbref else self.echoes[0]

    @property
    def subject(self) -> str:
        return self.first.entities["sub"]

    @property
    def session(self) -> str | None:
        return self.first.entities.get("ses")

    @property
    def datatype(self) -> str:
        return self.first.datatype or ""

    @property
    def suffix(self) -> str:
        return self.first.suffix

    @property
    def multi_echo(self) -> bool:
        return len(self.echoes) > 1

    @property
    def group_entities(self) -> dict:
        """The entities shared by all echoes (``echo`` dropped for multi-echo series)."""
        ents = dict(self.first.entities)
        if self.multi_echo:
            ents.pop("echo", None)
        return ents

    @property
    def name(self) -> str:
        """A readable, unique name, e.g. ``sub-01_task-rest_bold``."""
        return build_name(self.group_entities, self.suffix)

    @property
    def relpaths(self) -> tuple[str, ...]:
        return tuple(f.relpath for f in self.files)


def find_targets(dataset: BidsDataset, subject: str) -> list[Target]:
    """All targets of one subject, sorted by name."""
    groups: dict[tuple, dict[str, list[BidsFile]]] = {}
    for datatype, suffix in TARGET_KINDS:
        for f in dataset.select(subject=subject, datatype=datatype, suffix=suffix):
            ents = {k: v for k, v in f.entities.items() if k != "echo"}
            kind = "func" if suffix in ("bold", "sbref") else suffix
            key = (f.folder, kind, tuple(sorted(ents.items())))
            groups.setdefault(key, {}).setdefault(suffix, []).append(f)
    targets = []
    for by_suffix in groups.values():
        for files in by_suffix.values():
            files.sort(key=_echo_number)
        primary = by_suffix.get("bold") or by_suffix.get("dwi") or by_suffix.get("sbref")
        sbref = by_suffix.get("sbref", []) if primary is not by_suffix.get("sbref") else []
        first = primary[0]
        bval = bvec = None
        if first.suffix == "dwi":
            bval = dataset.companion(first, ".bval")
            bvec = dataset.companion(first, ".bvec")
        targets.append(Target(echoes=tuple(primary), sbref=tuple(sbref), bval=bval, bvec=bvec))
    targets.sort(key=lambda t: (t.session or "", t.datatype, t.name))
    return targets
