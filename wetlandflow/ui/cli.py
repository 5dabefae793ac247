"""Command-line entry point: ``wetlandflow demo|run|check|monitor|sample|assess|compare|report|doctor``.

Exit code 0 on success; on failure one clear message and a non-zero code
(``--debug`` shows the traceback).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from .. import CAUTION, __version__
from ..errors import WetlandflowError


def _cmd_check(args: argparse.Namespace) -> int:
    from ..pipeline.check import check_project

    print(check_project(args.project).text())
    return 0


def _cmd_run(args: argparse.Namespace) -> int:
    from ..pipeline.run import run_project

    result = run_project(args.project, progress=not args.quiet)
    print(result.summary())
    return 0


def _cmd_monitor(args: argparse.Namespace) -> int:
    from ..pipeline.monitor import monitor_project

    result = monitor_project(args.project, progress=not args.quiet)
    print(result.summary())
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from ..demo.landscape import make_demo
    from ..pipeline.run import run_project

    out = Path(args.dir)
    print(f"generating the demo landscape ({args.size} x {args.size} pixels) in {out} ...")
    project_file = make_demo(out, size=args.size, seed=args.seed, progress=not args.quiet,
                             archive=not args.no_monitor)
    print(f"project file: {project_file}")
    if args.no_run:
        return 0
    result = run_project(project_file, progress=not args.quiet)
    print(result.summary())
    if not args.no_monitor:
        from ..pipeline.monitor import monitor_project

        print("")
        print(monitor_project(project_file, progress=not args.quiet).summary())
    if args.no_assess:
        return 0
    from ..accuracy.assessment import class_codes, design_sample, label_from_reference
    from ..demo.landscape import load_truth
    from ..inputs.project import load_project

    project = load_project(project_file)
    with _locked(project.run_dir, "demo"):
        sample = design_sample(project, overwrite=True)
        # The demo's "photo-interpreter" is its hidden truth raster; with real data people label the sample.
        labelled = label_from_reference(sample, load_truth(out), class_codes(project),
                                        sample.with_name("sample_labelled.gpkg"))
        print("")
        print(format_assessment(project, labelled))
    return 0


def _locked(run_dir, command: str):
    """Hold the run folder's lock (refused, with the holder named, while another command writes it)."""
    from ..pipeline.lock import run_folder_lock

    return run_folder_lock(run_dir, command)


def _cmd_sample(args: argparse.Namespace) -> int:
    from ..accuracy.assessment import SAMPLE_DIR, design_sample, plan_sample
    from ..inputs.project import load_project

    project = load_project(args.project)
    with _locked(project.run_dir, f"sample {Path(args.project).name}"):
        plan = plan_sample(project, target_se=args.target_se, allocation=args.allocation,
                           min_per_class=args.min_per_class, exclude_buffer_m=args.buffer_m,
                           points_per_hour=args.points_per_hour)
        print(plan.text(), flush=True)  # before anything is written: size, effort and precision
        path = design_sample(project, plan=plan, overwrite=args.overwrite)
    print(f"\nwritten to {path} (no map class: it is kept in {SAMPLE_DIR}/map_classes.csv for `assess`)\n"
          f"Give the interpreters {path.name} and {SAMPLE_DIR}/LABELLING.md (instructions and class "
          f"definitions); they fill reference_class. Then: wetlandflow assess {Path(args.project).name} "
          f"{SAMPLE_DIR}/{path.name}")
    return 0


def _cmd_assess(args: argparse.Namespace) -> int:
    from ..inputs.project import load_project

    project = load_project(args.project)
    with _locked(project.run_dir, f"assess {Path(args.project).name}"):
        text = format_assessment(project, args.labelled, design=args.design)
    print(text)
    return 0


def format_assessment(project, labelled, *, design: str = "stratified") -> str:
    """Assess a labelled sample and format the error-adjusted areas and accuracy as text."""
    from ..accuracy.assessment import assess
    from ..pipeline.run import format_totals

    res = assess(project, labelled, design=design)
    table, acc = res["area_table"], res["accuracy_table"].set_index("class")
    half, conf = res["overall_ci_half_width"], f"{100 * res['confidence']:g} %"
    lines = [f"Error-adjusted areas from {res['n']} labelled sample points ({design} estimator, Olofsson "
             "et al. 2014):",
             *(format_totals(project.run_dir, classes=False) if hasattr(project, "run_dir") else []), "",
             f"  {'class':<12s} {'mapped ha':>10s} {'adjusted ha':>12s} {'95% CI ha':>21s} {'user':>6s} "
             f"{'producer':>9s}"]
    notes = []
    for _, r in table.iterrows():
        a = acc.loc[r["class"]]
        note = r.get("note")
        mark = "*" if isinstance(note, str) and note else " "
        if mark == "*":
            notes.append(f"  * {r['class']}: {note}")
        lines.append(f"  {r['class']:<12s} {r['mapped_area_ha']:>10,.1f} {r['estimated_area_ha']:>12,.1f} "
                     f"{r['ci_low_ha']:>10,.1f}-{r['ci_high_ha']:<10,.1f}{mark}{a['users']:>6.2f} "
                     f"{a['producers']:>9.2f}")
    if notes:
        lines += ["", "  * an error rate observed as zero in the sample: the interval comes from the "
                  "interval of that rate, not from a zero standard error:", *notes]
    oa = res["overall_accuracy"]
    lines += ["", f"Overall accuracy {oa:.3f} (SE {res['overall_se']:.3f}; {conf} CI {oa - half:.3f} to "
                  f"{oa + half:.3f}); user's and producer's accuracies per class above."]
    lines += ["", f"Tables and figures: {res['folder']}; areas.csv updated.", "", f"CAUTION: {CAUTION}"]
    return "\n".join(lines)


def _cmd_report(args: argparse.Namespace) -> int:
    from ..report.appendix import write_report

    with _locked(args.run_dir, "report"):
        paths = write_report(args.run_dir)
    print(f"report: {paths['html']} and {paths['markdown']}\nCAUTION: {CAUTION}")
    return 0


def _cmd_compare(args: argparse.Namespace) -> int:
    from ..models.compare import main as compare_main  # imported here: it loads scikit-learn and XGBoost

    run_dir = _compare_run_dir(args.rest)
    if run_dir is None:  # help, or arguments compare itself will refuse
        return compare_main(args.rest, prog="wetlandflow compare")
    with _locked(run_dir, "compare"):
        return compare_main(args.rest, prog="wetlandflow compare")


def _compare_run_dir(rest: list[str]) -> str | None:
    """The run folder among ``wetlandflow compare``'s own arguments (None when they do not name one)."""
    p = argparse.ArgumentParser(add_help=False, exit_on_error=False)
    p.add_argument("run_dir")
    for option in ("--out", "--selection", "--calibration"):
        p.add_argument(option)
    for option in ("--kinds", "--structures"):
        p.add_argument(option, nargs="+")
    if any(a in ("-h", "--help") for a in rest):
        return None
    try:
        return p.parse_known_args(rest)[0].run_dir
    except (argparse.ArgumentError, SystemExit):
        return None


def _cmd_doctor(args: argparse.Namespace) -> int:
    from .doctor import doctor_report

    text, _ = doctor_report()
    print(text)
    return 0


class _pandas_wide:
    def __enter__(self):
        import pandas as pd

        self._ctx = pd.option_context("display.width", 200, "display.max_columns", 20)
        self._ctx.__enter__()

    def __exit__(self, *exc):
        self._ctx.__exit__(*exc)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="wetlandflow", description="Wetland inventories from EO rasters and plots.",
                                epilog=f"CAUTION: {CAUTION}", formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="version", version=f"wetlandflow {__version__}")
    p.add_argument("--debug", action="store_true", help="show the full traceback on errors")
    sub = p.add_subparsers(dest="command", required=True)

    c = sub.add_parser("check", help="refuse what a run would refuse before its features step, and list the "
                                     "inputs, features and plots, without computing features")
    c.add_argument("project", help="project file (TOML)")
    c.set_defaults(func=_cmd_check)

    r = sub.add_parser("run", help="run a project end to end and write its run folder")
    r.add_argument("project", help="project file (TOML)")
    r.add_argument("--quiet", action="store_true", help="no progress bars")
    r.set_defaults(func=_cmd_run)

    d = sub.add_parser("demo", help="generate the fictional demo landscape in DIR and run it")
    d.add_argument("dir", help="folder for the demo inputs (its run goes to DIR/runs/demo)")
    d.add_argument("--size", type=int, default=600, help="pixels per side at 10 m (default 600 = 6 km)")
    d.add_argument("--seed", type=int, default=0, help="seed of the landscape")
    d.add_argument("--no-run", action="store_true", help="only generate the inputs")
    d.add_argument("--no-assess", action="store_true",
                   help="skip the validation sample (labelled from the demo's truth) and the area estimates")
    d.add_argument("--no-monitor", action="store_true",
                   help="skip the image archive and its monitoring run (water, trends, BACI, recovery)")
    d.add_argument("--quiet", action="store_true", help="no progress bars")
    d.set_defaults(func=_cmd_demo)

    mo = sub.add_parser("monitor", help="water maps, trends, before/after-control-impact and recovery "
                                        "from the project's [monitor] section, into RUN_DIR/monitor")
    mo.add_argument("project", help="project file (TOML) with a [monitor] section")
    mo.add_argument("--quiet", action="store_true", help="no progress bars")
    mo.set_defaults(func=_cmd_monitor)

    s = sub.add_parser("sample", help="design the validation sample of a finished run (GeoPackage to label)")
    s.add_argument("project", help="project file (TOML)")
    s.add_argument("--target-se", type=float, default=0.01, help="target standard error of overall accuracy")
    s.add_argument("--allocation", choices=("min_per_class", "proportional", "equal"), default="min_per_class")
    s.add_argument("--min-per-class", type=int, default=50, help="floor per class for min_per_class")
    s.add_argument("--buffer-m", type=float, default=100.0, help="keep points this far from training plots")
    s.add_argument("--points-per-hour", type=float, default=30.0,
                   help="interpreter speed for the effort estimate (default 30: common practice, no source)")
    s.add_argument("--overwrite", action="store_true", help="replace an existing sample file (it may hold labels)")
    s.set_defaults(func=_cmd_sample)

    a = sub.add_parser("assess", help="error-adjusted areas and accuracy from the labelled validation sample")
    a.add_argument("project", help="project file (TOML)")
    a.add_argument("labelled", help="the sample GeoPackage with reference_class filled in")
    a.add_argument("--design", choices=("stratified", "simple_random", "systematic"), default="stratified")
    a.set_defaults(func=_cmd_assess)

    rp = sub.add_parser("report", help="write the methods report (HTML and Markdown) from a run folder")
    rp.add_argument("run_dir", help="the run folder")
    rp.set_defaults(func=_cmd_report)

    cm = sub.add_parser("compare", add_help=False,  # its own options: wetlandflow compare --help
                        help="compare models, structures and feature selection under a run's spatial folds")
    cm.set_defaults(func=_cmd_compare)

    dr = sub.add_parser("doctor", help="print the geospatial stack actually loaded and flag known conflicts")
    dr.set_defaults(func=_cmd_doctor)
    return p


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args, rest = parser.parse_known_args(argv)
    if rest and args.command != "compare":  # only compare passes its options on (to wetlandflow.models.compare)
        parser.error(f"unrecognized arguments: {' '.join(rest)}")
    args.rest = rest
    try:
        return args.func(args)
    except WetlandflowError as exc:
        if args.debug:
            raise
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("interrupted; finished steps are kept in the run folder's manifest.json", file=sys.stderr)
        return 130
    except Exception as exc:  # an unexpected failure: still one message, the traceback behind --debug
        if args.debug:
            raise
        from ..inputs.io import disk_full_error

        full = disk_full_error(exc, None)  # a full disk outside a run's steps (assess, report, ...)
        if full is not None:
            print(f"error: {full}", file=sys.stderr)
            return 2
        print(f"error: unexpected {type(exc).__name__}: {exc} (rerun with --debug for the traceback)",
              file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
