"""BIDS discovery and derivatives naming (an edge of the package).

A small parser of our own (see ``benchmarks/bench_bids_index.py`` for why it
is used instead of a general-purpose BIDS library): index a dataset, find the
targets (``func/*_bold``, ``func/*_sbref``, ``dwi/*_dwi``), find the field
sources (the four BIDS field-map cases) and link them, and name the outputs.

Field-source priority when several apply to one target: see
:mod:`epicorr.bids._fieldsources`.
"""

from ._derivatives import (DERIVATIVE_NAME, OUTPUTS, OutputSpec, bids_uri, output_path,
                           sidecar_for, target_outputs, write_dataset_description)
from ._entities import ENTITY_ORDER, ParsedName, build_name, parse_name
from ._fieldsources import (KIND_PRIORITY, LINK_PRIORITY, FieldSource, candidate_sources,
                            choose_source, find_field_sources, resolve_intended_for)
from ._layout import BidsDataset, BidsFile, index_dataset
from ._plan import PlanItem, SubjectPlan, check_epi_metadata, image_shape, plan_subject
from ._targets import TARGET_KINDS, Target, find_targets

__all__ = [
    "index_dataset", "BidsDataset", "BidsFile",
    "parse_name", "build_name", "ParsedName", "ENTITY_ORDER",
    "Target", "TARGET_KINDS", "find_targets",
    "FieldSource", "find_field_sources", "resolve_intended_for", "candidate_sources",
    "choose_source", "KIND_PRIORITY", "LINK_PRIORITY",
    "PlanItem", "SubjectPlan", "plan_subject", "check_epi_metadata", "image_shape",
    "OUTPUTS", "OutputSpec", "output_path", "target_outputs", "write_dataset_description",
    "bids_uri", "sidecar_for", "DERIVATIVE_NAME",
]
