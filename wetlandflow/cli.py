"""Command-line entry point: ``wetlandflow demo|run|check``.

Exit code 0 on success; on failure one clear message and a non-zero code
(``--debug`` shows the traceback).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from . import CAUTION, __version__
from .errors import WetlandflowError


def _cmd_check(args: argparse.Namespace) -> int:
    from .inputs import input_inventory, project_grid
    from .project import load_project

    project = load_project(args.project)
    grid = project_grid(project)
    inv = input_inventory(project, grid)
    x0, y0, x1, y1 = grid.bounds
    print(f"project: {project.project.name} ({project.file.name}) - valid")
    print(f"grid: {grid.crs}, {grid.resolution:g} m pixels, {grid.height} x {grid.width} "
          f"({grid.height * grid.width * grid.pixel_area_m2 / 1e6:,.1f} km2), bounds {x0:.0f} {y0:.0f} {x1:.0f} {y1:.0f}")
    print(f"classes: {', '.join(project.classes.names)}")
    print(f"seasons: {', '.join(f'{k} {a}..{b}' for k, (a, b) in project.seasons.items())}")
    with _pandas_wide():
        print(inv.to_string(index=False))
    return 0


def _cmd_run(args: argparse.Namespace) -> int:
    from .run import run_project

    result = run_project(args.project, progress=not args.quiet)
    print(result.summary())
    return 0


def _cmd_demo(args: argparse.Namespace) -> int:
    from .demo import make_demo
    from .run import run_project

    out = Path(args.dir)
    print(f"generating the demo landscape ({args.size} x {args.size} pixels) in {out} ...")
    project_file = make_demo(out, size=args.size, seed=args.seed, progress=not args.quiet)
    print(f"project file: {project_file}")
    if args.no_run:
        return 0
    result = run_project(project_file, progress=not args.quiet)
    print(result.summary())
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

    c = sub.add_parser("check", help="validate a project file and list its inputs, without running")
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
    d.add_argument("--quiet", action="store_true", help="no progress bars")
    d.set_defaults(func=_cmd_demo)
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
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
        print(f"error: unexpected {type(exc).__name__}: {exc} (rerun with --debug for the traceback)",
              file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
