"""File-level commands for one series, for people without a BIDS dataset.

* ``epicorr phase-field``: field (Hz) from a phase difference or two phase images;
* ``epicorr pair-field``: field (Hz) from EPI images with opposite phase-encode polarity;
* ``epicorr unwarp``: correct a series with a field map on its grid.

Each runs the same node the batch uses, in a temporary folder, and moves the
results to the requested names atomically.  Nothing is written when an input
is bad (exit code 2).
"""

from __future__ import annotations

import tempfile
from pathlib import Path

from . import CAUTION
from ..errors import EpicorrInputError

__all__ = ["register"]


def _readout(p) -> None:
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--echo-spacing", type=float, metavar="SECONDS",
                   help="effective echo spacing (BIDS EffectiveEchoSpacing), s")
    g.add_argument("--readout-time", type=float, metavar="SECONDS",
                   help="total readout time (BIDS TotalReadoutTime), s")


def register(subparsers) -> None:
    """Add ``phase-field``, ``pair-field`` and ``unwarp``."""
    epi = "CAUTION: " + CAUTION
    p = subparsers.add_parser(
        "phase-field", help="field map (Hz) from gradient-echo phase images",
        description="Estimate the B0 field in Hz from a phase-difference image (with --phasediff) "
                    "or from two phase images (with --phase1/--phase2), plus magnitudes.",
        epilog=epi)
    p.add_argument("--phasediff", metavar="NIFTI", help="phase difference image (wrapped)")
    p.add_argument("--phase1", metavar="NIFTI", help="first-echo phase image")
    p.add_argument("--phase2", metavar="NIFTI", help="second-echo phase image")
    p.add_argument("--magnitude", required=True, metavar="NIFTI", help="first-echo magnitude")
    p.add_argument("--magnitude2", metavar="NIFTI", help="second-echo magnitude")
    p.add_argument("--echo-times", required=True, nargs=2, type=float, metavar=("TE1", "TE2"),
                   help="the two echo times, s")
    p.add_argument("--out", required=True, metavar="NIFTI", help="output field map (Hz)")
    p.add_argument("--out-sigma", metavar="NIFTI", help="also write the field's standard deviation (Hz)")
    p.set_defaults(func=_phase_field)

    p = subparsers.add_parser(
        "pair-field", help="field map (Hz) from EPI images with opposite phase-encode polarity",
        description="Estimate the B0 field in Hz from two (or more) EPI images acquired with "
                    "opposite phase-encode polarity on one axis.", epilog=epi)
    p.add_argument("images", nargs="+", metavar="NIFTI", help="the EPI images")
    p.add_argument("--pe-directions", nargs="+", required=True, metavar="CODE",
                   help="BIDS PhaseEncodingDirection of each image, e.g. j j-")
    _readout(p)
    p.add_argument("--out", required=True, metavar="NIFTI", help="output field map (Hz)")
    p.add_argument("--out-corrected", metavar="NIFTI", help="also write the corrected reference image")
    p.add_argument("--edge-scale", type=float, metavar="VOXELS",
                   help="edge-preserving smoothness: field step between neighbours, in voxels of "
                        "displacement per voxel, above which smoothing is relaxed (e.g. 0.3; default "
                        "off, plain quadratic smoothness)")
    p.add_argument("--harmonic", type=float, metavar="WEIGHT",
                   help="harmonic refinement: the field inside the brain is pulled towards a solution "
                        "of Laplace's equation, as a field from outside sources is (e.g. 300; default "
                        "off; about three times the time)")
    p.set_defaults(func=_pair_field)

    p = subparsers.add_parser(
        "unwarp", help="correct an EPI series with a field map on its grid",
        description="Unwarp every volume of a 3-D or 4-D EPI series along the phase-encode axis "
                    "with a field map (Hz) on the same grid.", epilog=epi)
    p.add_argument("series", metavar="NIFTI", help="the distorted series")
    p.add_argument("--field", required=True, metavar="NIFTI", help="field map in Hz on the series grid")
    p.add_argument("--pe-direction", required=True, metavar="CODE",
                   help="BIDS PhaseEncodingDirection of the series (i, i-, j, j-, k, k-)")
    _readout(p)
    p.add_argument("--interpolation", default="cubic", choices=["cubic", "linear"],
                   help="interpolation along the phase-encode axis (default cubic)")
    p.add_argument("--no-jacobian", action="store_true", help="no Jacobian intensity modulation")
    p.add_argument("--out", required=True, metavar="NIFTI", help="output corrected series")
    p.add_argument("--out-displacement", metavar="NIFTI", help="also write the displacement (voxels)")
    p.set_defaults(func=_unwarp)


def _meta(args, pe: str) -> dict:
    meta = {"PhaseEncodingDirection": pe}
    if getattr(args, "echo_spacing", None) is not None:
        meta["EffectiveEchoSpacing"] = args.echo_spacing
    if getattr(args, "readout_time", None) is not None:
        meta["TotalReadoutTime"] = args.readout_time
    return meta


def _check_out(path: str, flag: str) -> Path:
    out = Path(path)
    if not out.name.endswith((".nii", ".nii.gz")):
        raise EpicorrInputError("output must be a .nii or .nii.gz file", key=flag, value=path)
    if not out.parent.is_dir():
        raise EpicorrInputError("output folder does not exist", key=flag, value=path,
                                hint="create the folder first")
    return out


def _refuse_overwriting_inputs(outputs: dict, inputs) -> None:
    """Inputs are never modified: an output path naming an input is refused."""
    ins = {Path(i).resolve() for i in inputs if i}
    for flag, path in outputs.items():
        if path and Path(path).resolve() in ins:
            raise EpicorrInputError("output would overwrite an input", file=path, key=flag,
                                    hint="write the result under another name")


def _run_node(node, outputs: dict[str, str | None]) -> None:
    """Run a node in a temporary folder; move its outputs to the given paths."""
    from ..bids._export import atomic_copy

    with tempfile.TemporaryDirectory(prefix="epicorr-") as tmp:
        try:
            result = node.run(cwd=tmp)
        except EpicorrInputError:
            raise
        except Exception as err:  # nipype wraps errors raised inside the node
            cause = err
            while cause.__cause__ is not None or cause.__context__ is not None:
                nxt = cause.__cause__ or cause.__context__
                if isinstance(nxt, EpicorrInputError):
                    raise nxt from None
                cause = nxt
            raise
        for name, dst in outputs.items():
            if dst:
                atomic_copy(getattr(result.outputs, name), dst)


def _absolute(args, names) -> None:
    """Make path arguments absolute (nodes run in another folder)."""
    for name in names:
        value = getattr(args, name, None)
        if isinstance(value, list):
            setattr(args, name, [str(Path(v).resolve()) for v in value])
        elif value:
            setattr(args, name, str(Path(value).resolve()))


def _phase_field(args) -> int:
    from ..nodes import PhaseDiffField, TwoPhaseField

    _absolute(args, ["phasediff", "phase1", "phase2", "magnitude", "magnitude2", "out", "out_sigma"])

    out = _check_out(args.out, "--out")
    sigma = _check_out(args.out_sigma, "--out-sigma") if args.out_sigma else None
    te1, te2 = args.echo_times
    if args.phasediff and (args.phase1 or args.phase2):
        raise EpicorrInputError("give either --phasediff or --phase1 and --phase2, not both",
                                key="--phasediff")
    for flag, path in (("--phasediff", args.phasediff), ("--phase1", args.phase1),
                       ("--phase2", args.phase2), ("--magnitude", args.magnitude),
                       ("--magnitude2", args.magnitude2)):
        if path and not Path(path).is_file():
            raise EpicorrInputError("file not found", file=path, key=flag)
    if args.phasediff:
        node = PhaseDiffField(phasediff=args.phasediff, magnitude1=args.magnitude,
                              metadata={"EchoTime1": te1, "EchoTime2": te2},
                              metadata_file="--echo-times")
        if args.magnitude2:
            node.inputs.magnitude2 = args.magnitude2
    elif args.phase1 and args.phase2:
        if not args.magnitude2:
            raise EpicorrInputError("two phase images need both magnitudes", key="--magnitude2",
                                    hint="add --magnitude2")
        node = TwoPhaseField(phase1=args.phase1, phase2=args.phase2, magnitude1=args.magnitude,
                             magnitude2=args.magnitude2, metadata1={"EchoTime": te1},
                             metadata2={"EchoTime": te2},
                             metadata_files=["--echo-times", "--echo-times"])
    else:
        raise EpicorrInputError("no phase image given", key="--phasediff",
                                hint="give --phasediff, or --phase1 and --phase2")
    _run_node(node, {"field": str(out), "sigma": str(sigma) if sigma else None})
    print(f"wrote {out} (field in Hz)")
    return 0


def _pair_field(args) -> int:
    from ..nodes import PairField

    _absolute(args, ["images", "out", "out_corrected"])

    out = _check_out(args.out, "--out")
    corrected = _check_out(args.out_corrected, "--out-corrected") if args.out_corrected else None
    if len(args.pe_directions) != len(args.images):
        raise EpicorrInputError("one phase-encode direction per image is needed",
                                key="--pe-directions", value=args.pe_directions,
                                hint=f"give {len(args.images)} codes")
    for path in args.images:
        if not Path(path).is_file():
            raise EpicorrInputError("file not found", file=path)
    node = PairField(in_files=list(args.images), metadata=[_meta(args, pe) for pe in args.pe_directions],
                     metadata_files=[f"--pe-directions ({p})" for p in args.images])
    if args.edge_scale is not None:
        node.inputs.edge_scale = args.edge_scale
    if args.harmonic is not None:
        node.inputs.harmonic = args.harmonic
    _run_node(node, {"field": str(out), "magnitude": str(corrected) if corrected else None})
    print(f"wrote {out} (field in Hz)")
    return 0


def _unwarp(args) -> int:
    from ..geometry import parse_pe_direction
    from ..nodes import FieldToDisplacement, UnwarpSeries

    _absolute(args, ["series", "field", "out", "out_displacement"])

    out = _check_out(args.out, "--out")
    disp_out = _check_out(args.out_displacement, "--out-displacement") if args.out_displacement else None
    pe = parse_pe_direction(args.pe_direction, key="--pe-direction")
    for flag, path in (("series", args.series), ("--field", args.field)):
        if not Path(path).is_file():
            raise EpicorrInputError("file not found", file=path, key=flag)
    _refuse_overwriting_inputs({"--out": out, "--out-displacement": disp_out},
                               [args.series, args.field])
    with tempfile.TemporaryDirectory(prefix="epicorr-") as tmp:
        disp_path = Path(tmp) / "displacement.nii.gz"
        _run_node(FieldToDisplacement(field=args.field, reference=args.series,
                                      metadata=_meta(args, pe.bids), metadata_file="command line"),
                  {"displacement": str(disp_path)})
        _run_node(UnwarpSeries(in_file=args.series, displacement=str(disp_path),
                               pe_direction=pe.bids, interpolation=args.interpolation,
                               jacobian=not args.no_jacobian), {"out_file": str(out)})
        if disp_out:
            from ..bids._export import atomic_copy

            atomic_copy(disp_path, disp_out)
    print(f"wrote {out} (corrected series)")
    return 0


