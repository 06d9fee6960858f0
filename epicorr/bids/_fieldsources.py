"""Field sources: the four BIDS field-map cases and how they link to targets.

BIDS specification, "Fieldmap data", describes four cases in ``fmap/``:

1. ``phasediff`` + ``magnitude1`` (+ ``magnitude2``), ``EchoTime1``/``EchoTime2``;
2. ``phase1`` + ``phase2`` + ``magnitude1`` + ``magnitude2``, ``EchoTime`` each;
3. ``fieldmap`` + ``magnitude``, ``Units``;
4. ``epi`` images with different ``PhaseEncodingDirection`` (reversed PE).

A source is linked to a target either by ``B0FieldIdentifier`` (on the
field-map files) matching the target's ``B0FieldSource``, or by the field-map
files' ``IntendedFor`` listing the target (BIDS URIs ``bids::sub-01/...``
relative to the dataset root, or the older paths relative to the subject
folder).

Priority when several sources apply to one target (documented choice)
--------------------------------------------------------------------
1. The link: ``B0FieldSource``/``B0FieldIdentifier`` first (the explicit,
   newer mechanism of the specification), then ``IntendedFor``.
2. The kind: :data:`KIND_PRIORITY`, direct ``fieldmap`` first, then
   ``phasediff``, ``two-phases``, ``reversed-pe``: fewest estimation steps
   first (a direct map needs only a unit conversion; phase maps need
   unwrapping; a reversed-PE pair needs an inverse problem solved).
3. The source name, alphabetically (deterministic).

``--field-source KIND`` keeps only sources of that kind.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable

from ..errors import EpicorrInputError
from ..geometry import parse_pe_direction
from ..options import FieldSourceKind
from ._entities import build_name
from ._layout import BidsDataset, BidsFile

__all__ = ["FieldSource", "KIND_PRIORITY", "LINK_PRIORITY", "find_field_sources",
           "resolve_intended_for", "candidate_sources", "choose_source"]

KIND_PRIORITY: tuple[FieldSourceKind, ...] = (
    FieldSourceKind.FIELDMAP, FieldSourceKind.PHASEDIFF, FieldSourceKind.TWO_PHASES,
    FieldSourceKind.REVERSED_PE,
)
LINK_PRIORITY: tuple[str, ...] = ("B0FieldSource", "IntendedFor")

_GRE_SUFFIXES = {"phasediff", "phase1", "phase2", "magnitude1", "magnitude2", "fieldmap", "magnitude"}
_ROLES = {
    FieldSourceKind.PHASEDIFF: (("phasediff", "magnitude1"), ("magnitude2",)),
    FieldSourceKind.TWO_PHASES: (("phase1", "phase2", "magnitude1"), ("magnitude2",)),
    FieldSourceKind.FIELDMAP: (("fieldmap", "magnitude"), ()),
}
_REQUIRED_KEYS = {"phasediff": ("EchoTime1", "EchoTime2"), "phase1": ("EchoTime",),
                  "phase2": ("EchoTime",), "fieldmap": ("Units",)}


@dataclass
class FieldSource:
    """One field-map acquisition of a subject.

    Attributes
    ----------
    kind : FieldSourceKind
    name : str
        Its ``B0FieldIdentifier``, or the shared file-name stem.
    files : dict
        Role to file, e.g. ``{"phasediff": BidsFile, "magnitude1": BidsFile}``.
        For ``reversed-pe`` the roles are ``epi0``, ``epi1``, ... in name order.
    identifiers : tuple of str
        ``B0FieldIdentifier`` values.
    intended_for : set of str
        Data-file relpaths listed by ``IntendedFor``.
    """

    kind: FieldSourceKind
    name: str
    files: dict
    identifiers: tuple = ()
    intended_for: set = field(default_factory=set)

    @property
    def session(self) -> str:
        """The session label of the files (``""`` without sessions)."""
        return next(iter(self.files.values())).entities.get("ses") or ""

    @property
    def epi(self) -> list[BidsFile]:
        """The ``epi`` images of a reversed-PE source, in name order."""
        return [self.files[k] for k in sorted(self.files) if k.startswith("epi")]

    @property
    def relpaths(self) -> list[str]:
        return sorted(f.relpath for f in self.files.values())


def _as_list(value) -> list:
    if value is None:
        return []
    return list(value) if isinstance(value, (list, tuple)) else [value]


def resolve_intended_for(dataset: BidsDataset, source_file: BidsFile, entry) -> str:
    """Resolve one ``IntendedFor`` entry to a relpath of an existing data file.

    Accepts BIDS URIs ``bids::<path from the root>`` and the older paths
    relative to the subject folder (BIDS specification, "IntendedFor").

    Raises
    ------
    EpicorrInputError
        Naming the sidecar and the entry when it is not a string, uses another
        dataset's URI, or names no file of the dataset.
    """
    origin = dataset.origin(source_file, "IntendedFor")
    if not isinstance(entry, str) or not entry.strip():
        raise EpicorrInputError("each entry must be a path string", file=origin, key="IntendedFor",
                                value=entry, hint="list BIDS URIs such as 'bids::sub-01/func/...'")
    text = entry.strip()
    if text.startswith("bids:"):
        dataset_name, _, rel = text[len("bids:"):].partition(":")
        if dataset_name:
            raise EpicorrInputError("points into another dataset, which is not supported",
                                    file=origin, key="IntendedFor", value=entry,
                                    hint="use 'bids::<path>' for files of this dataset")
        rel = rel.lstrip("/")
    else:
        rel = f"sub-{source_file.entities['sub']}/" + text.lstrip("/")
    if dataset.get(rel) is None:
        raise EpicorrInputError("names a file that does not exist in the dataset", file=origin,
                                key="IntendedFor", value=entry,
                                hint="fix the path (a BIDS URI 'bids::sub-XX/...' or a path "
                                     "relative to the subject folder)")
    return rel


_FAMILY = {"phasediff": "pd", "phase1": "pp", "phase2": "pp", "fieldmap": "fm",
           "magnitude": "fm", "magnitude1": "m12", "magnitude2": "m12", "epi": "epi"}


def _group_key(dataset: BidsDataset, f: BidsFile) -> list[tuple]:
    ids = [str(v) for v in _as_list(dataset.metadata(f).get("B0FieldIdentifier"))]
    if ids:
        # Identifiers are unique per session (the same label may recur in each).
        return [("id", i, f.entities.get("ses") or "") for i in ids]
    family = _FAMILY[f.suffix]
    ents = {k: v for k, v in f.entities.items() if not (family == "epi" and k == "dir")}
    return [("stem", build_name(ents, "fmap"), family)]


def _attach_magnitudes(groups: dict[tuple, list[BidsFile]]) -> None:
    """Without identifiers, ``magnitude1/2`` join the phasediff (else two-phase) set of the same name."""
    for key in [k for k in groups if k[0] == "stem" and k[2] == "m12"]:
        for family in ("pd", "pp"):
            home = ("stem", key[1], family)
            if home in groups:
                groups[home].extend(groups.pop(key))
                break


def _adopt_unlabelled(groups: dict[tuple, list[BidsFile]]) -> None:
    """Files without an identifier join an identified field map with the same name stem.

    BIDS asks for ``B0FieldIdentifier`` on every file of a field map; converters
    sometimes write it on the phase/field image only.  Such a magnitude image
    (same entities, same folder) is taken into the identified set.
    """
    for key in [k for k in groups if k[0] == "id"]:
        stems = set()
        for f in groups[key]:
            family = _FAMILY[f.suffix]
            ents = {k: v for k, v in f.entities.items() if not (family == "epi" and k == "dir")}
            stems.add(build_name(ents, "fmap"))
        if any(f.suffix == "epi" for f in groups[key]):
            continue  # epi images carry their own metadata; nothing to adopt
        for other in [k for k in groups if k[0] == "stem" and k[1] in stems]:
            # Only unlabelled magnitudes are adopted: an unlabelled phase or field
            # image is a field map of its own, not part of this one.
            if all(f.suffix.startswith("magnitude") for f in groups[other]):
                groups[key].extend(groups.pop(other))


def _check_keys(dataset: BidsDataset, f: BidsFile) -> None:
    meta = dataset.metadata(f)
    for key in _REQUIRED_KEYS.get(f.suffix, ()):
        if meta.get(key) is None:
            raise EpicorrInputError("required key missing from the sidecar",
                                    file=dataset.origin(f, key), key=key,
                                    hint=f"BIDS requires {key} for a {f.suffix} image")


def _build(dataset: BidsDataset, key: tuple, files: list[BidsFile]) -> FieldSource:
    name = key[1]
    suffixes = {f.suffix for f in files}
    gre = suffixes & _GRE_SUFFIXES
    if gre and "epi" in suffixes:
        raise EpicorrInputError("one B0FieldIdentifier groups epi and gradient-echo images",
                                file=files[0].path, key="B0FieldIdentifier", value=name,
                                hint="give each field-map acquisition its own identifier")
    if "epi" in suffixes:
        epi = sorted(files, key=lambda f: f.relpath)
        dirs = []
        for f in epi:
            meta = dataset.metadata(f)
            dirs.append(parse_pe_direction(meta.get("PhaseEncodingDirection"),
                                           file=dataset.origin(f, "PhaseEncodingDirection")))
        if len({d.polarity for d in dirs}) < 2 or len({d.axis for d in dirs}) > 1:
            last = epi[-1]
            raise EpicorrInputError(
                "a reversed phase-encode field needs images with opposite polarity along one axis, "
                f"but the epi images have {', '.join(d.bids for d in dirs)}",
                file=dataset.origin(last, "PhaseEncodingDirection"), key="PhaseEncodingDirection",
                value=dirs[-1].bids, hint="acquire or name one image with the reversed polarity")
        return FieldSource(FieldSourceKind.REVERSED_PE, name,
                           {f"epi{i}": f for i, f in enumerate(epi)})
    by_suffix = {}
    for f in files:
        if f.suffix in by_suffix:
            raise EpicorrInputError("two files with the same role in one field map", file=f.path,
                                    key="B0FieldIdentifier", value=name,
                                    hint="give each field-map acquisition its own identifier")
        by_suffix[f.suffix] = f
    if "phasediff" in by_suffix:
        kind = FieldSourceKind.PHASEDIFF
    elif "phase1" in by_suffix or "phase2" in by_suffix:
        kind = FieldSourceKind.TWO_PHASES
    elif "fieldmap" in by_suffix:
        kind = FieldSourceKind.FIELDMAP
    else:
        raise EpicorrInputError("magnitude images without a phase or field image",
                                file=files[0].path, hint="add the phasediff/phase1+phase2/fieldmap image")
    required, optional = _ROLES[kind]
    for role in required:
        if role not in by_suffix:
            have = sorted(by_suffix)
            raise EpicorrInputError(f"the {kind.value} field map lacks its {role} image "
                                    f"(found {', '.join(have)})", file=files[0].path,
                                    hint=f"add the {role} image beside it (and give every file "
                                         "of one field map the same B0FieldIdentifier)")
    for f in by_suffix.values():
        _check_keys(dataset, f)
    roles = {r: by_suffix[r] for r in required + optional if r in by_suffix}
    return FieldSource(kind, name, roles)


def find_field_sources(dataset: BidsDataset, subject: str) -> list[FieldSource]:
    """Every field source in a subject's ``fmap/`` folders.

    Raises
    ------
    EpicorrInputError
        For an incomplete or inconsistent field map, a missing required key,
        equal PE polarities, or a broken ``IntendedFor`` entry.
    """
    groups: dict[tuple, list[BidsFile]] = {}
    for f in dataset.select(subject=subject, datatype="fmap"):
        if f.suffix != "epi" and f.suffix not in _GRE_SUFFIXES:
            continue
        for key in _group_key(dataset, f):
            groups.setdefault(key, []).append(f)
    _attach_magnitudes(groups)
    _adopt_unlabelled(groups)
    sources = []
    for key in sorted(groups):
        files = groups[key]
        src = _build(dataset, key, files)
        src.identifiers = tuple(key[1:2]) if key[0] == "id" else ()
        for f in files:
            for entry in _as_list(dataset.metadata(f).get("IntendedFor")):
                src.intended_for.add(resolve_intended_for(dataset, f, entry))
        sources.append(src)
    return sources


def candidate_sources(dataset: BidsDataset, target, sources: Iterable[FieldSource]
                      ) -> list[tuple[str, FieldSource]]:
    """``(link, source)`` for every source linked to ``target`` (a :class:`Target`).

    Raises
    ------
    EpicorrInputError
        When the target's ``B0FieldSource`` names no identifier of the subject.
    """
    sources = list(sources)
    meta = dataset.metadata(target.first)
    wanted = [str(v) for v in _as_list(meta.get("B0FieldSource"))]
    out: list[tuple[str, FieldSource]] = []
    for value in wanted:
        matches = [s for s in sources if value in s.identifiers
                   and s.session == (target.session or "")]
        if not matches:
            raise EpicorrInputError("no field map of this subject has that B0FieldIdentifier",
                                    file=dataset.origin(target.first, "B0FieldSource"),
                                    key="B0FieldSource", value=value,
                                    hint="fix the value or the field map's B0FieldIdentifier")
        out.extend(("B0FieldSource", s) for s in matches)
    rels = set(target.relpaths)
    for s in sources:
        if s.intended_for & rels and all(s is not o for _, o in out):
            out.append(("IntendedFor", s))
    return out


def choose_source(candidates: list[tuple[str, FieldSource]], *,
                  kind: FieldSourceKind | str | None = None) -> tuple[str, FieldSource] | None:
    """Pick one candidate by the documented priority (module docstring), or ``None``."""
    from ..options import parse_option

    if kind is not None:
        kind = parse_option(FieldSourceKind, kind, name="--field-source")
        candidates = [c for c in candidates if c[1].kind is kind]
    if not candidates:
        return None
    return min(candidates, key=lambda c: (LINK_PRIORITY.index(c[0]),
                                          KIND_PRIORITY.index(c[1].kind), c[1].name))
