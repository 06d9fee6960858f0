"""A subject's workflow from a BIDS plan: one route per field source, one tail per target."""

from __future__ import annotations

import re

from nipype.pipeline import engine as pe

from epicorr.bids import BidsDataset, FieldSource, SubjectPlan, Target
from epicorr.options import FieldSourceKind

from ._tail import build_tail_workflow
from .routes import _NATIVE, build_route_workflow

__all__ = ["build_subject_workflow", "route_inputs", "tail_inputs", "safe_name", "collect_outputs"]


def safe_name(text: str) -> str:
    """A nipype-safe node name (letters, digits, underscores)."""
    return re.sub(r"[^A-Za-z0-9_]", "_", text)


def _origin(ds: BidsDataset, f, key: str) -> str:
    return str(ds.origin(f, key))


def route_inputs(ds: BidsDataset, source: FieldSource) -> dict:
    """Values of a route's own inputnode fields for one field source."""
    fl = source.files
    if source.kind is FieldSourceKind.PHASEDIFF:
        out = {"phasediff": str(fl["phasediff"].path), "magnitude1": str(fl["magnitude1"].path),
               "fieldmap_metadata": ds.metadata(fl["phasediff"]),
               "fieldmap_metadata_file": _origin(ds, fl["phasediff"], "EchoTime2")}
        if "magnitude2" in fl:
            out["magnitude2"] = str(fl["magnitude2"].path)
        return out
    if source.kind is FieldSourceKind.TWO_PHASES:
        return {"phase1": str(fl["phase1"].path), "phase2": str(fl["phase2"].path),
                "magnitude1": str(fl["magnitude1"].path), "magnitude2": str(fl["magnitude2"].path),
                "phase1_metadata": ds.metadata(fl["phase1"]),
                "phase2_metadata": ds.metadata(fl["phase2"]),
                "fieldmap_metadata_files": [_origin(ds, fl["phase1"], "EchoTime"),
                                            _origin(ds, fl["phase2"], "EchoTime")]}
    if source.kind is FieldSourceKind.FIELDMAP:
        return {"fieldmap": str(fl["fieldmap"].path), "magnitude": str(fl["magnitude"].path),
                "fieldmap_metadata": ds.metadata(fl["fieldmap"]),
                "fieldmap_metadata_file": _origin(ds, fl["fieldmap"], "Units")}
    epi = source.epi
    return {"epi_files": [str(f.path) for f in epi], "epi_metadata": [ds.metadata(f) for f in epi],
            "epi_metadata_files": [_origin(ds, f, "PhaseEncodingDirection") for f in epi]}


def tail_inputs(ds: BidsDataset, target: Target) -> dict:
    """Values of the tail's inputnode fields (except the field images) for one target."""
    return {
        "reference": str(target.reference.path),
        "metadata": ds.metadata(target.first),
        "metadata_file": _origin(ds, target.first, "PhaseEncodingDirection"),
        "in_files": [str(f.path) for f in target.files],
        "echo_metadata": [ds.metadata(f) for f in target.echoes],
    }


def build_subject_workflow(ds: BidsDataset, plan: SubjectPlan, *, name: str | None = None,
                           **tail_options) -> tuple[pe.Workflow, dict[str, str]]:
    """Wire every planned target of a subject.

    The first target of each field source gets the full route workflow; the
    others get a tail fed by that route's native field, so a field source is
    estimated once.

    Returns
    -------
    workflow : nipype Workflow
    outputs : dict
        Target name -> dotted path of its ``outputnode`` inside ``workflow``
        (e.g. ``"t0_sub_01_task_rest_bold.outputnode"``).
    """
    wf = pe.Workflow(name=name or safe_name(f"sub_{plan.subject}"))
    routes: dict[int, pe.Workflow] = {}
    outputs: dict[str, str] = {}
    for idx, item in enumerate(plan.items):
        label = safe_name(f"t{idx}_{item.target.name}")
        values = tail_inputs(ds, item.target)
        key = id(item.source)
        if key not in routes:
            route = build_route_workflow(item.source.kind, name=label, **tail_options)
            for field, value in {**route_inputs(ds, item.source), **values}.items():
                setattr(route.inputs.inputnode, field, value)
            wf.add_nodes([route])
            routes[key] = route
            outputs[item.target.name] = f"{label}.outputnode"
            continue
        tail = build_tail_workflow(name=label, **tail_options)
        for field, value in values.items():
            setattr(tail.inputs.inputnode, field, value)
        wf.connect([(routes[key], tail, [(f"outputnode.{_NATIVE[k]}", f"inputnode.{k}")
                                         for k in ("field", "sigma", "mask", "magnitude")]
                     + [(f"outputnode.{_NATIVE['info']}", "inputnode.field_info")])])
        outputs[item.target.name] = f"{label}.outputnode"
    return wf, outputs


def _find(wf: pe.Workflow, dotted: str):
    """The node (or workflow) at a dotted path inside ``wf``, and its chain of workflows."""
    parts = dotted.split(".")
    chain = [wf]
    obj = wf
    for part in parts:
        obj = next(n for n in obj._graph.nodes() if n.name == part)
        if isinstance(obj, pe.Workflow):
            chain.append(obj)
    return obj, chain


def _source(chain: list, node, field: str):
    """Follow identity nodes and workflow boundaries back to the node that makes ``field``."""
    from nipype.interfaces.utility import IdentityInterface

    owner = chain[-1]
    while True:
        if not isinstance(node.interface, IdentityInterface):
            return chain, node, field
        edge = None
        for u, _, data in owner._graph.in_edges(node, data=True):
            for src, dst in data["connect"]:
                if dst == field:
                    edge = (u, src)
        if edge is None:
            value = getattr(node.inputs, field)
            return chain, None, value
        u, src = edge
        src = src[0] if isinstance(src, tuple) else src
        if isinstance(u, pe.Workflow):
            path, _, fld = src.rpartition(".")
            sub, subchain = _find(u, path)
            chain = chain + [u] + subchain[1:]
            owner = chain[-1]
            node, field = sub, fld
        else:
            node, field = u, src


def collect_outputs(wf: pe.Workflow, outputnode: str) -> dict:
    """Read the results of a finished run for every field of an ``outputnode``.

    Nipype drops identity nodes from the executed graph, so the values are
    read from the result files of the nodes that produced them (in
    ``wf.base_dir``).
    """
    from nipype.utils.filemanip import loadpkl

    node, chain = _find(wf, outputnode)
    chain = chain[:-1] if chain[-1] is node else chain
    out = {}
    for field in node.inputs.copyable_trait_names():
        schain, real, fld = _source(list(chain), node, field)
        if real is None:
            out[field] = fld
            continue
        folder = [wf.base_dir] + [w.name for w in schain] + [real.name]
        import os

        result = loadpkl(os.path.join(*folder, f"result_{real.name}.pklz"))
        out[field] = getattr(result.outputs, fld)
    return out
