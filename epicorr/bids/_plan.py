"""A subject's plan: which field source corrects which target, checked up front.

:func:`plan_subject` finds the targets and field sources, links them
(priority in :mod:`._fieldsources`), and checks what can be checked without
reading image data: sidecar keys the pipeline needs and image headers.  A
problem raises :class:`~epicorr.errors.EpicorrInputError` naming the file and
the key, so the batch command can fail that subject with one line.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from ..errors import EpicorrInputError
from ..geometry import parse_pe_direction, readout_timing
from ..options import FieldSourceKind
from ._fieldsources import FieldSource, candidate_sources, choose_source, find_field_sources
from ._layout import BidsDataset, BidsFile
from ._targets import Target, find_targets

__all__ = ["PlanItem", "SubjectPlan", "plan_subject", "image_shape", "check_epi_metadata"]


@dataclass
class PlanItem:
    """One target and the field source chosen for it."""

    target: Target
    link: str
    source: FieldSource
    alternatives: list = field(default_factory=list)


@dataclass
class SubjectPlan:
    """What the pipeline will do for one subject.

    Attributes
    ----------
    items : list of PlanItem
    skipped : list of (str, str)
        ``(target name, reason)`` for targets without a usable field source.
    """

    subject: str
    items: list = field(default_factory=list)
    skipped: list = field(default_factory=list)


def image_shape(f: BidsFile) -> tuple[int, ...]:
    """Shape from the NIfTI header (no data read).

    Raises
    ------
    EpicorrInputError
        When the header cannot be read.
    """
    import nibabel as nib

    try:
        img = nib.load(str(f.path))
        return tuple(int(n) for n in img.shape)
    except Exception as err:  # nibabel raises many types for broken files
        raise EpicorrInputError(f"cannot read the NIfTI header ({type(err).__name__}: {err})",
                                file=f.path, hint="re-export or replace the file") from None


def check_epi_metadata(dataset: BidsDataset, f: BidsFile) -> None:
    """Check an EPI file's ``PhaseEncodingDirection`` and readout timing keys."""
    meta = dataset.metadata(f)
    key = "PhaseEncodingDirection"
    if meta.get(key) is None:
        raise EpicorrInputError("required key missing from the sidecar", file=dataset.origin(f, key),
                                key=key, hint="add it (one of i, i-, j, j-, k, k-)")
    pe = parse_pe_direction(meta[key], file=dataset.origin(f, key))
    shape = image_shape(f)
    if len(shape) < 3:
        raise EpicorrInputError(f"image is {len(shape)}-D; a 3-D or 4-D series is needed",
                                file=f.path, hint="check the file")
    timing_file = dataset.origin(f, "EffectiveEchoSpacing" if "EffectiveEchoSpacing" in meta
                                 else "TotalReadoutTime")
    readout_timing(meta, n_pe_image=shape[pe.axis], file=timing_file)


def plan_subject(dataset: BidsDataset, subject: str, *,
                 field_source: FieldSourceKind | str | None = None) -> SubjectPlan:
    """Plan one subject.

    Parameters
    ----------
    dataset : BidsDataset
    subject : str
        Label without ``sub-``.
    field_source : FieldSourceKind or str, optional
        Use only sources of this kind.

    Raises
    ------
    EpicorrInputError
        For bad input of a target or of a field source linked to a target.
    """
    plan = SubjectPlan(subject=subject)
    sources = find_field_sources(dataset, subject)
    for target in find_targets(dataset, subject):
        candidates = candidate_sources(dataset, target, sources)
        chosen = choose_source(candidates, kind=field_source)
        if chosen is None:
            why = "no field source links to it (B0FieldSource or IntendedFor)"
            if candidates and field_source is not None:
                kinds = ", ".join(sorted({c[1].kind.value for c in candidates}))
                why = f"no {field_source!s} field source (has: {kinds})"
            plan.skipped.append((target.name, why))
            continue
        for f in target.files:
            check_epi_metadata(dataset, f)
        if chosen[1].kind is FieldSourceKind.REVERSED_PE:
            for f in chosen[1].epi:
                check_epi_metadata(dataset, f)
        plan.items.append(PlanItem(target=target, link=chosen[0], source=chosen[1],
                                   alternatives=[c for c in candidates if c is not chosen]))
    return plan
