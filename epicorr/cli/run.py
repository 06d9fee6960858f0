"""``epicorr run BIDS_DIR OUTPUT_DIR participant``: correct a whole BIDS dataset.

Subjects are processed one after another; within a subject the nodes run on
the chosen executor (``serial``, ``local`` processes, or ``slurm`` jobs).  A
failing subject is recorded and the batch goes on; the run ends with a
summary and exit code 1 if any subject failed (2 for bad command-line input).
Verbose logs go to ``OUTPUT_DIR/logs/sub-<L>.log``.
"""

from __future__ import annotations

import argparse
import logging
import sys
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path

from . import CAUTION, EXIT_FAILED, EXIT_OK
from ..errors import EpicorrInputError
from ..options import Executor, FieldSourceKind, Interpolation, parse_option

__all__ = ["register", "run", "SubjectOutcome", "process_subject", "crash_message"]

_LOG = logging.getLogger("epicorr")


def register(subparsers) -> None:
    """Add the ``run`` sub-command."""
    p = subparsers.add_parser(
        "run", help="correct every EPI series of a BIDS dataset (BIDS-Apps style)",
        description=("Find the EPI series (func bold/sbref, dwi) of each subject and the field "
                     "maps linked to them (B0FieldSource/B0FieldIdentifier or IntendedFor), "
                     "estimate the field, unwarp, predict dropout and write BIDS derivatives "
                     "and one QC page per subject."),
        epilog=("Field-source priority when several apply: the B0FieldSource link before "
                "IntendedFor, then fieldmap, phasediff, two-phases, reversed-pe. "
                "CAUTION: " + CAUTION),
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("bids_dir", metavar="BIDS_DIR", help="the raw BIDS dataset (read only)")
    p.add_argument("output_dir", metavar="OUTPUT_DIR", help="where the derivatives are written")
    p.add_argument("analysis_level", metavar="participant", choices=["participant"],
                   help="analysis level (only 'participant')")
    p.add_argument("--participant-label", nargs="+", metavar="L", default=None,
                   help="subjects to process (labels with or without 'sub-'); default all")
    p.add_argument("--scratch", metavar="DIR", default=None,
                   help="working folder for intermediate files (kept: a re-run reuses finished "
                        "steps); default OUTPUT_DIR/.epicorr-work")
    p.add_argument("--jobs", type=int, default=1, metavar="N",
                   help="parallel processes (local) or queued jobs (slurm); default 1")
    p.add_argument("--executor", default="local", choices=[e.value for e in Executor],
                   help="where steps run: serial (this process), local (processes), slurm")
    p.add_argument("--executor-args", default=None, metavar="JSON",
                   help='extra executor settings as a JSON object, e.g. '
                        '\'{"sbatch_args": "--partition=short --time=30"}\'')
    p.add_argument("--field-source", default=None, choices=[k.value for k in FieldSourceKind],
                   metavar="KIND",
                   help="use only field sources of this kind: " +
                        ", ".join(k.value for k in FieldSourceKind))
    p.add_argument("--interpolation", default="cubic", choices=[i.value for i in Interpolation],
                   help="interpolation along the phase-encode axis (default cubic)")
    p.add_argument("--no-jacobian", action="store_true",
                   help="do not modulate intensities by the Jacobian")
    p.add_argument("--dropout-threshold", type=float, default=0.5, metavar="FRACTION",
                   help="mark dropout where the predicted retained signal is below this "
                        "(default 0.5, a project choice)")
    p.add_argument("--quiet", action="store_true", help="print only failures and the summary")
    p.set_defaults(func=run)


@dataclass
class SubjectOutcome:
    """What happened to one subject."""

    subject: str
    ok: bool
    message: str = ""
    targets: list = field(default_factory=list)
    skipped: list = field(default_factory=list)
    seconds: float = 0.0
    log: str = ""


class _Progress:
    def __init__(self, quiet: bool, index: int, total: int, subject: str):
        self.quiet, self.prefix = quiet, f"[{index}/{total}] sub-{subject}"
        self.done = 0
        self.total_nodes = 0

    def say(self, text: str) -> None:
        if not self.quiet:
            print(f"{self.prefix}: {text}", flush=True)

    def callback(self, node, status) -> None:
        name = node.fullname.split(".", 1)[-1]
        if status == "start":
            self.say(f"running {name}")
        elif status == "end":
            self.done += 1
        elif status == "exception":
            self.say(f"FAILED in {name}")


def crash_message(crash_dir: Path) -> str | None:
    """The first input error (or last exception line) in nipype text crash files."""
    best = None
    for path in sorted(Path(crash_dir).glob("crash-*.txt")):
        lines = [ln.strip() for ln in path.read_text(errors="replace").splitlines() if ln.strip()]
        for ln in reversed(lines):
            if "EpicorrInputError:" in ln:
                return ln.split("EpicorrInputError:", 1)[1].strip()
        for ln in reversed(lines):
            if "Error:" in ln or "Exception:" in ln:
                best = best or ln
                break
    return best


def _attach_log(path: Path) -> tuple[logging.Handler, list]:
    path.parent.mkdir(parents=True, exist_ok=True)
    handler = logging.FileHandler(path, mode="a", encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(name)s %(levelname)s: %(message)s"))
    handler.setLevel(logging.DEBUG)
    nip = logging.getLogger("nipype")
    saved = list(nip.handlers)
    for h in saved:
        nip.removeHandler(h)
    nip.addHandler(handler)
    _LOG.addHandler(handler)
    _LOG.setLevel(logging.INFO)
    return handler, saved


def _detach_log(handler: logging.Handler, saved: list) -> None:
    nip = logging.getLogger("nipype")
    nip.removeHandler(handler)
    _LOG.removeHandler(handler)
    for h in saved:
        nip.addHandler(h)
    handler.close()


def process_subject(ds, subject: str, *, out_dir: Path, scratch: Path, plugin: str,
                    plugin_args: dict, field_source=None, options: dict, progress: _Progress,
                    command_line: str = "") -> SubjectOutcome:
    """Plan, run, export and report one subject; never raises for a subject's own problem."""
    from ..bids import plan_subject
    from ..bids._export import export_target

    t0 = time.perf_counter()
    outcome = SubjectOutcome(subject=subject, ok=False)
    log_path = out_dir / "logs" / f"sub-{subject}.log"
    outcome.log = str(log_path)
    handler, saved = _attach_log(log_path)
    crash_dir = scratch / f"sub-{subject}" / "crash"
    try:
        from ..io import remove_stale_temporaries

        for folder in (out_dir / f"sub-{subject}", out_dir / "qc"):
            for stale in remove_stale_temporaries(folder, name_prefix=f"sub-{subject}"):
                _LOG.info("removed a temporary left by an interrupted run: %s", stale)
        _LOG.info("subject %s: planning", subject)
        progress.say("finding targets and field maps")
        plan = plan_subject(ds, subject, field_source=field_source)
        outcome.skipped = list(plan.skipped)
        for name, why in plan.skipped:
            _LOG.warning("skipped %s: %s", name, why)
            progress.say(f"skipped {name}: {why}")
        for item in plan.items:
            _LOG.info("target %s <- %s (%s, via %s)", item.target.name, item.source.name,
                      item.source.kind.value, item.link)
        if plan.items:
            from ..workflows import build_subject_workflow, collect_outputs

            tail = {"interpolation": options["Interpolation"], "jacobian": options["Jacobian"],
                    "dropout_threshold": options["DropoutThreshold"]}
            wf, outnodes = build_subject_workflow(ds, plan, **tail)
            wf.base_dir = str(scratch)
            crash_dir.mkdir(parents=True, exist_ok=True)
            for old in crash_dir.glob("crash-*"):
                old.unlink()
            wf.config["execution"] = {"crashdump_dir": str(crash_dir), "crashfile_format": "txt",
                                      "stop_on_first_crash": "false",
                                      "remove_unnecessary_outputs": "false",
                                      "poll_sleep_duration": "2" if plugin == "SLURM" else "0.1"}
            progress.say(f"{len(plan.items)} target(s): " +
                         ", ".join(f"{i.target.name} ({i.source.kind.value})" for i in plan.items))
            try:
                wf.run(plugin=plugin, plugin_args=dict(plugin_args, status_callback=progress.callback))
            except Exception as err:
                msg = crash_message(crash_dir)
                raise RuntimeError(msg or f"workflow failed: {' '.join(str(err).split())[:300]}") from err
            progress.say("writing derivatives")
            exported = {}
            for item in plan.items:
                results = collect_outputs(wf, outnodes[item.target.name])
                exported[item.target.name] = (item, results,
                                              export_target(out_dir, ds, item, results, options=options))
                outcome.targets.append(item.target.name)
            progress.say("writing the QC page")
            t_rep = time.perf_counter()
            try:
                from ..bids._report import write_subject_report

                write_subject_report(out_dir, subject, exported, skipped=plan.skipped,
                                     command_line=command_line)
                _LOG.info("QC page written in %.1f s", time.perf_counter() - t_rep)
            except ImportError as err:  # report package not available
                _LOG.warning("no QC page: %s", err)
        outcome.ok = True
    except EpicorrInputError as err:
        outcome.message = str(err)
    except RuntimeError as err:
        outcome.message = " ".join(str(err).split())
    except Exception as err:  # a subject's failure must never stop the batch
        outcome.message = f"{type(err).__name__}: {' '.join(str(err).split())}"
    finally:
        if not outcome.ok:
            _LOG.error("subject %s failed: %s", subject, outcome.message)
            _LOG.error("%s", traceback.format_exc())
        outcome.seconds = time.perf_counter() - t0
        _LOG.info("subject %s finished in %.1f s (%s)", subject, outcome.seconds,
                  "ok" if outcome.ok else "failed")
        _detach_log(handler, saved)
    return outcome


def run(args) -> int:
    """Run the batch; returns the exit code."""
    from ..bids import index_dataset, write_dataset_description
    from ._executors import parse_executor_args, plugin_for

    bids_dir = Path(args.bids_dir).resolve()
    out_dir = Path(args.output_dir).resolve()
    if out_dir == bids_dir or bids_dir in out_dir.parents and not (
            (bids_dir / "derivatives") in out_dir.parents or out_dir == bids_dir / "derivatives"):
        raise EpicorrInputError("the output folder must not be the dataset or inside it (except "
                                "under its derivatives/ folder)", key="OUTPUT_DIR", value=str(out_dir),
                                hint="choose another folder, e.g. BIDS_DIR/derivatives/epicorr")
    field_source = (parse_option(FieldSourceKind, args.field_source, name="--field-source")
                    if args.field_source else None)
    if not 0.0 < float(args.dropout_threshold) < 1.0:
        raise EpicorrInputError("must be between 0 and 1", key="--dropout-threshold",
                                value=args.dropout_threshold)
    plugin, plugin_args = plugin_for(args.executor, jobs=args.jobs,
                                     executor_args=parse_executor_args(args.executor_args))
    ds = index_dataset(bids_dir, participant_labels=args.participant_label)
    subjects = (ds.subjects() if args.participant_label is None
                else [str(s).removeprefix("sub-") for s in args.participant_label])
    if not subjects:
        raise EpicorrInputError("no subjects found", file=bids_dir, hint="check the dataset")
    scratch = Path(args.scratch).resolve() if args.scratch else out_dir / ".epicorr-work"
    command = ["epicorr"] + (sys.argv[1:] if sys.argv and "epicorr" in Path(sys.argv[0]).name
                             else ["run", str(bids_dir), str(out_dir), "participant"])
    # Batch-level files an interrupted run may have left half-written as temporaries.
    from ..io import remove_stale_temporaries

    for folder, name in ((out_dir, "dataset_description.json"), (out_dir / "qc", "index.html"),
                         (out_dir / "logs", "summary.json")):
        remove_stale_temporaries(folder, name_prefix=name, recursive=False)
    write_dataset_description(out_dir, source_dir=bids_dir, command=command)
    options = {"Interpolation": args.interpolation, "Jacobian": not args.no_jacobian,
               "DropoutThreshold": float(args.dropout_threshold)}
    if not args.quiet:
        print(f"epicorr: {len(subjects)} subject(s) from {bids_dir}; outputs in {out_dir}; "
              f"executor {args.executor} ({plugin}), jobs {args.jobs}", flush=True)
    outcomes = []
    t0 = time.perf_counter()
    for idx, subject in enumerate(subjects, 1):
        progress = _Progress(args.quiet, idx, len(subjects), subject)
        outcome = process_subject(ds, subject, out_dir=out_dir, scratch=scratch, plugin=plugin,
                                  plugin_args=plugin_args, field_source=field_source,
                                  options=options, progress=progress, command_line=" ".join(command))
        outcomes.append(outcome)
        state = "done" if outcome.ok else "FAILED"
        if outcome.ok:
            progress.say(f"{state} in {outcome.seconds:.0f} s ({len(outcome.targets)} corrected, "
                         f"{len(outcome.skipped)} skipped); {idx}/{len(subjects)} subjects finished")
        else:
            print(f"[{idx}/{len(subjects)}] sub-{subject}: FAILED: {outcome.message} "
                  f"(log: {outcome.log})", file=sys.stderr, flush=True)
    _write_summary(out_dir, outcomes, command)
    failed = [o for o in outcomes if not o.ok]
    if not args.quiet or failed:
        print(f"epicorr: {len(outcomes) - len(failed)} of {len(outcomes)} subject(s) succeeded "
              f"in {time.perf_counter() - t0:.0f} s", flush=True)
        for o in outcomes:
            if o.ok:
                if not args.quiet:
                    print(f"  sub-{o.subject}: ok ({len(o.targets)} corrected, {len(o.skipped)} skipped)")
            else:
                print(f"  sub-{o.subject}: FAILED: {o.message}")
    return EXIT_FAILED if failed else EXIT_OK


def _write_summary(out_dir: Path, outcomes: list, command: list) -> None:
    from ..io import save_json_atomic

    (out_dir / "logs").mkdir(parents=True, exist_ok=True)
    save_json_atomic({"CommandLine": " ".join(command), "Subjects": [
        {"subject": o.subject, "ok": o.ok, "message": o.message, "targets": o.targets,
         "skipped": [list(s) for s in o.skipped], "seconds": round(o.seconds, 2), "log": o.log}
        for o in outcomes]}, out_dir / "logs" / "summary.json")
    try:
        from ..bids._report import write_batch_index

        write_batch_index(out_dir, outcomes, command_line=" ".join(command))
    except ImportError:  # pragma: no cover - report package not available
        pass

