"""Nipype workflows wiring epicorr's nodes into the correction routes.

This folder sits at the top of the repository and ships as the subpackage
``epicorr.workflows`` (``package-dir`` in pyproject.toml).  Import it as
``from epicorr.workflows import ...``.

* :func:`build_phasediff_workflow`, :func:`build_two_phase_workflow`,
  :func:`build_hz_map_workflow`, :func:`build_reversed_pe_workflow` (or
  :func:`build_route_workflow` by kind): estimate the field, then the tail.
* :func:`build_tail_workflow`: to target grid, displacement, unwarp, dropout, QC.

Contracts: ``inputnode`` fields are :data:`ROUTE_INPUTS` ``[kind]`` plus
:data:`TAIL_INPUTS`; ``outputnode`` fields are :data:`TAIL_OUTPUTS` plus
``field_native``, ``sigma_native``, ``mask_native``, ``magnitude_native``, ``field_info``.
* :func:`build_subject_workflow`: every target of one BIDS subject (from a
  :class:`epicorr.bids.SubjectPlan`); targets sharing a field source share its estimate.
"""

from ._tail import TAIL_INPUTS, TAIL_OUTPUTS, build_tail_workflow
from .bids import build_subject_workflow, collect_outputs, route_inputs
from .routes import (ROUTE_INPUTS, build_hz_map_workflow, build_phasediff_workflow,
                     build_reversed_pe_workflow, build_route_workflow, build_two_phase_workflow)

__all__ = ["TAIL_INPUTS", "TAIL_OUTPUTS", "ROUTE_INPUTS", "build_tail_workflow",
           "build_phasediff_workflow", "build_two_phase_workflow", "build_hz_map_workflow",
           "build_reversed_pe_workflow", "build_route_workflow", "build_subject_workflow",
           "route_inputs", "collect_outputs"]
