"""How good are the maps really?  The demo's raw and final class maps scored against the generator's truth.

Not a timing case: an accuracy benchmark on two synthetic landscapes of our own (the demo, and a second
landscape with another seed and size, so other class shares), each run with the class priors as fitted
(``[priors] adjust = "none"``) and adjusted to the area by EM (``"em"``, Saerens et al. 2002).  For every
run it prints, as Markdown:

* the census accuracy of ``maps/class.tif`` (raw) and ``maps/class_final.tif`` (after the minimum mapping
  unit) against ``truth.tif``: overall accuracy, per-class producer's and user's accuracy;
* the spatial-CV overall accuracy of the same run with its standard error, and the difference to the truth;
* each class's share of the plots, of the truth and of the final map, and the EM's area priors.

Usage::

    python benchmarks/truth_accuracy.py [--out docs/benchmarks-truth.md] [--size 600]

Data and runs are cached under ``WETLANDFLOW_BENCH_DIR`` (default: the system temp folder).  One
landscape at 600 x 600 takes a few minutes on two cores.
"""

from __future__ import annotations

import argparse
import os
import re
import sys
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

LANDSCAPES = {  # name: make_demo keywords
    "demo (seed 0)": {"seed": 0},
    "second landscape (seed 11, 8 km)": {"seed": 11, "size_factor": 4 / 3},
}


def _cache() -> Path:
    root = Path(os.environ.get("WETLANDFLOW_BENCH_DIR", Path(tempfile.gettempdir()) / "wetlandflow-bench"))
    root.mkdir(parents=True, exist_ok=True)
    return root


def _landscape(name: str, size: int, seed: int, size_factor: float = 1.0) -> Path:
    from wetlandflow.demo import make_demo

    n = int(round(size * size_factor))
    folder = _cache() / f"truth-{re.sub(r'[^a-z0-9]+', '-', name)}-{n}"
    if not (folder / "project.toml").exists():
        make_demo(folder, size=n, seed=seed)
    return folder / "project.toml"


def _with(project_file: Path, adjust: str) -> Path:
    """A copy of the project file with explanations off (not scored) and the given prior adjustment."""
    import tomli_w

    from wetlandflow.inputs.project import tomllib

    doc = tomllib.loads(project_file.read_text(encoding="utf-8"))
    doc["output"] = {**doc.get("output", {}), "explain": False}
    doc["priors"] = {"adjust": adjust}
    doc["project"]["output_dir"] = f"runs/truth-{adjust}"
    out = project_file.with_name(f"project_truth_{adjust}.toml")
    out.write_text(tomli_w.dumps(doc), encoding="utf-8")
    return out


def _md(df: pd.DataFrame, index: bool = True) -> str:
    """A Markdown table (pandas' to_markdown needs tabulate, which the package does not install)."""
    df = df.reset_index() if index else df
    fmt = lambda v: f"{v:.3f}" if isinstance(v, float | np.floating) else str(v)  # noqa: E731
    head = "| " + " | ".join(map(str, df.columns)) + " |"
    rule = "|" + "---|" * len(df.columns)
    body = ["| " + " | ".join(fmt(v) for v in row) + " |" for row in df.itertuples(index=False)]
    return "\n".join([head, rule, *body])


def _scores(map_path: Path, truth: Path, classes: list[str]) -> tuple[float, pd.DataFrame, np.ndarray]:
    from wetlandflow.accuracy.estimators import accuracy_measures
    from wetlandflow.validation.honesty import map_error_matrix_against_truth

    m = map_error_matrix_against_truth(map_path, truth, map_classes=classes)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        acc = accuracy_measures(m)
    per = acc["per_class"].set_index("class")[["producers", "users"]]
    return float(acc["overall"].value), per, m.to_numpy()


def run_landscape(name: str, size: int, kw: dict) -> list[str]:
    from wetlandflow.pipeline.run import run_project

    pf = _landscape(name, size, **kw)
    truth = pf.parent / "truth.tif"
    lines = [f"### {name}", ""]
    rows, per_rows, shares = [], [], {}
    for adjust in ("none", "em"):
        result = run_project(_with(pf, adjust), progress=False)
        classes = list(result.areas["class"])
        metrics = result.metrics
        cv, cv_se = metrics["overall_accuracy"], metrics.get("overall_accuracy_se", float("nan"))
        for layer in ("class", "class_final"):
            oa, per, matrix = _scores(result.run_dir / "maps" / f"{layer}.tif", truth, classes)
            rows.append({"priors": adjust, "map": "raw" if layer == "class" else "final (after MMU)",
                         "truth OA": oa, "spatial-CV OA": cv, "CV SE": cv_se, "CV - truth": cv - oa,
                         "lowest UA": f"{per['users'].min():.3f} ({per['users'].idxmin()})"})
            if layer == "class_final":
                per_rows.append(per.rename(columns={"producers": f"PA {adjust}", "users": f"UA {adjust}"}))
                shares["truth"] = matrix.sum(axis=0) / matrix.sum()
                shares[f"final map, priors {adjust}"] = matrix.sum(axis=1) / matrix.sum()
        samples = pd.read_parquet(result.run_dir / "samples.parquet", columns=["class", "plot_id"])
        plots = samples.drop_duplicates("plot_id")["class"].value_counts(normalize=True)
        shares["plots"] = np.array([plots.get(c, 0.0) for c in classes])
        pri = result.manifest["steps"]["mapping"].get("priors")
        if pri:
            shares["EM area priors"] = np.array([pri["priors"][c]["estimated"] for c in classes])
            shares["training priors (weighted)"] = np.array([pri["priors"][c]["training"] for c in classes])
    table = pd.DataFrame(rows)
    lines += [_md(table, index=False), ""]
    lines += ["Per class, final map against truth:", "", _md(pd.concat(per_rows, axis=1)),
              ""]
    lines += ["Class shares:", "", _md(pd.DataFrame(shares, index=pd.Index(classes, name="class"))), ""]
    return lines


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=600, help="demo pixels per side (the CLI demo's default)")
    ap.add_argument("--out", type=Path, help="also write the Markdown here")
    ap.add_argument("--only", choices=list(LANDSCAPES), nargs="*")
    args = ap.parse_args(argv)
    lines = ["## Maps against the synthetic truth", "",
             f"Landscapes at {args.size} px per side (second: 4/3 of it), 10 m; explanations off.", ""]
    for name in args.only or list(LANDSCAPES):
        lines += run_landscape(name, args.size, LANDSCAPES[name])
        print("\n".join(lines[-12:]), file=sys.stderr, flush=True)
    text = "\n".join(lines)
    print(text)
    if args.out:
        args.out.write_text(text + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
