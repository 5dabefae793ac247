"""The heavy steps a panel runs, composed from the library with cancel points.

* :func:`cross_validate_folds` and :func:`tune` fit one fold at a time and check
  for cancel between folds; a cancel hands back what was finished
  (``Cancelled.partial``).  :func:`select_features` wraps the library's forward
  selection, which has no cancel point, and runs to its end.
* :func:`run_with_control` runs :func:`~wetlandflow.pipeline.run.run_project` and checks
  for cancel before every dask task of the run (chunks of the feature cube,
  prediction windows): the manifest then records the interrupted step as failed
  and every earlier one as done; a rerun in the same folder reuses those and
  resumes prediction at the first window not written.  Model fitting, the polygon
  inventory and the explanations hold no dask task, so a cancel pressed during
  them takes effect at the next step's first task; with a ``dask.distributed``
  scheduler no task passes through this process and a run cannot be cancelled.
"""

from __future__ import annotations

import dataclasses
import json
import threading
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ...errors import OutputError, ParameterError
from ...inputs.project import CV_DESIGNS, Project
from .tasks import Cancelled, TaskControl


@dataclass
class CVResult:
    """Out-of-fold probabilities of the folds finished so far (``NaN`` rows for folds not run)."""

    design: str
    classes: tuple[str, ...]
    folds: np.ndarray
    oof: np.ndarray
    per_fold: pd.DataFrame
    n_folds: int

    @property
    def complete(self) -> bool:
        return len(self.per_fold) == self.n_folds

    @property
    def tested(self) -> np.ndarray:
        return np.isfinite(self.oof).all(axis=1)

    def overall_accuracy(self, y: np.ndarray) -> float:
        """Pooled accuracy of the tested samples (labels ``y`` in sample order)."""
        pred = np.asarray(self.classes)[np.argmax(np.nan_to_num(self.oof[self.tested], nan=-1.0), axis=1)]
        return float(np.mean(pred == np.asarray(y)[self.tested])) if pred.size else float("nan")


def with_settings(project: Project, section: str, **changes: Any) -> Project:
    """``project`` with fields of one section replaced: ``with_settings(p, "model", max_depth=3)``."""
    return dataclasses.replace(
        project, **{section: dataclasses.replace(getattr(project, section), **changes)}
    )


def _cv_loop(
    project: Project,
    samples: pd.DataFrame,
    features: list[str],
    folds: np.ndarray,
    control: TaskControl,
    *,
    label: str,
    offset: int,
    total: int,
) -> CVResult:
    from ...models.classifier import scheme_proba
    from ...pipeline.run import make_model

    X = samples[features].to_numpy(np.float32)
    y = samples["class"].to_numpy()
    names = tuple(project.classes.names)
    oof = np.full((len(samples), len(names)), np.nan, np.float32)
    rows = []
    ids = [int(k) for k in np.unique(folds) if k >= 0]
    for i, k in enumerate(ids):
        if control.cancelled:
            stopped = Cancelled(
                f"cancelled after {i} of {len(ids)} folds of the {label} design; the finished "
                "folds keep their out-of-fold predictions"
            )
            stopped.partial = CVResult(label, names, folds, oof, pd.DataFrame(rows), len(ids))
            raise stopped
        control.report(f"{label}: fold {i + 1} of {len(ids)}", offset + i, total)
        t0 = time.perf_counter()
        test = folds == k
        oof[test] = scheme_proba(make_model(project).fit(X[~test], y[~test]), X[test])
        acc = float(np.mean(np.asarray(names)[np.argmax(oof[test], axis=1)] == y[test]))
        rows.append(
            {
                "design": label,
                "fold": k,
                "n_test": int(test.sum()),
                "accuracy": round(acc, 4),
                "seconds": round(time.perf_counter() - t0, 2),
            }
        )
        control.report(done=offset + i + 1)
    return CVResult(label, names, folds, oof, pd.DataFrame(rows), len(ids))


def design_folds(project: Project, samples: pd.DataFrame) -> np.ndarray:
    """Test fold of every sample under the project's validation design.

    Plot ids go to the splitter as groups, except for random pixel folds, which ignore them by design.
    """
    from ...pipeline.run import make_splitter
    from ...validation.splitters import assign_folds

    splitter = make_splitter(project, samples[["x", "y"]].to_numpy())
    return assign_folds(
        splitter,
        samples[features_of(samples)].to_numpy(np.float32),
        samples["class"].to_numpy(),
        None if project.validation.design == "random" else samples["plot_id"].to_numpy(),
    )


def features_of(samples: pd.DataFrame) -> list[str]:
    """Feature columns of a samples table (everything but plot_id, class, x, y)."""
    from ...pipeline.run import feature_names

    return feature_names(samples)


def cross_validate_folds(
    project: Project,
    samples: pd.DataFrame,
    features: list[str] | None = None,
    *,
    control: TaskControl | None = None,
    designs: Sequence[str] | None = None,
) -> dict[str, CVResult]:
    """Cross-validate the project's model under one or more designs, fold by fold, cancellable between folds.

    Parameters
    ----------
    project : Project
        Its ``[model]`` and ``[validation]`` sections set the model and the design.
    samples : pandas.DataFrame
        A run's ``samples.parquet``.
    features : list of str, optional
        Default: every feature column.
    control : TaskControl, optional
        Progress and cancel; a cancel stops before the next fold and raises :class:`Cancelled`, whose
        ``partial`` attribute holds the results so far (finished folds keep their predictions).
    designs : sequence of {"blocks", "group", "random"}, optional
        Default: the project's design.  ``"random"`` (pixels at random, leaky) is run for comparison only.

    Returns
    -------
    dict of str to CVResult
    """
    control = control or TaskControl()
    features = list(features or features_of(samples))
    designs = list(designs or [project.validation.design])
    bad = [d for d in designs if d not in CV_DESIGNS]
    if bad:
        raise ParameterError(f"unknown design(s) {bad}; choose from {list(CV_DESIGNS)}")
    variants = {
        d: with_settings(project, "validation", design=d, allow_random_pixels=d == "random") for d in designs
    }
    folds = {d: design_folds(p, samples) for d, p in variants.items()}
    total = sum(len(np.unique(f[f >= 0])) for f in folds.values())
    results: dict[str, CVResult] = {}
    offset = 0
    for d, p in variants.items():
        try:
            results[d] = _cv_loop(
                p, samples, features, folds[d], control, label=d, offset=offset, total=total
            )
        except Cancelled as exc:
            if exc.partial is not None and len(exc.partial.per_fold):
                results[d] = exc.partial
            exc.partial = results
            raise
        offset += results[d].n_folds
    return results


def cv_table(results: Mapping[str, CVResult], samples: pd.DataFrame) -> pd.DataFrame:
    """One row per design: folds run, samples tested, pooled accuracy of the tested samples."""
    y = samples["class"].to_numpy()
    return pd.DataFrame(
        [
            {
                "design": d,
                "folds_done": len(r.per_fold),
                "n_folds": r.n_folds,
                "tested_samples": int(r.tested.sum()),
                "overall_accuracy": round(r.overall_accuracy(y), 4),
            }
            for d, r in results.items()
        ]
    )


def tune(
    project: Project,
    samples: pd.DataFrame,
    grid: Mapping[str, Sequence[Any]],
    *,
    features: list[str] | None = None,
    control: TaskControl | None = None,
) -> pd.DataFrame:
    """Spatial-CV accuracy of each model setting in ``grid`` (``{"max_depth": [3, 6]}``), on the same folds.

    Settings are combined one field at a time (not a full product): each row changes one ``[model]`` field
    from the project's value, so the table reads as the effect of that field.  Cancellable between folds
    (``Cancelled.partial`` holds the rows finished).

    Returns
    -------
    pandas.DataFrame
        ``field, value, overall_accuracy`` (pooled over folds), ``fold_sd`` (spread of fold accuracies).
    """
    control = control or TaskControl()
    features = list(features or features_of(samples))
    folds = design_folds(project, samples)
    runs = [(f, v) for f, values in grid.items() for v in values]
    k = len(np.unique(folds[folds >= 0]))
    rows: list[dict[str, Any]] = []
    for i, (field, value) in enumerate(runs):
        p = with_settings(project, "model", **{field: value})
        try:
            r = _cv_loop(
                p,
                samples,
                features,
                folds,
                control,
                label=f"{field}={value}",
                offset=i * k,
                total=len(runs) * k,
            )
        except Cancelled as exc:
            exc.partial = pd.DataFrame(rows)  # the settings scored before the cancel
            raise
        rows.append(
            {
                "field": field,
                "value": value,
                "overall_accuracy": round(r.overall_accuracy(samples["class"].to_numpy()), 4),
                "fold_sd": round(float(r.per_fold["accuracy"].std(ddof=0)), 4),
            }
        )
    return pd.DataFrame(rows)


# -- jobs: a whole run with cancel points at its dask tasks --------------------------------------------------
def run_steps(project: Project) -> list[str]:
    """The steps :func:`~wetlandflow.pipeline.run.run_project` runs for this project, in order."""
    steps = ["inputs", "features", "samples", "validation", "model", "mapping", "inventory"]
    return steps + (["explain"] if project.output.explain else [])


class _ManifestProgress:
    """Steps finished and the step running, read from the run's manifest (rewritten after every step)."""

    def __init__(self, run_dir: Path, steps: list[str]) -> None:
        self.path, self.steps = run_dir / "manifest.json", steps
        self._mtime, self.done, self.current = None, 0, steps[0]
        self._start = time.time()

    def refresh(self) -> tuple[int, str]:
        try:
            mtime = self.path.stat().st_mtime
            if mtime != self._mtime and mtime >= self._start - 1:
                self._mtime = mtime
                recs = json.loads(self.path.read_text()).get("steps", {})
                self.done = sum(recs.get(s, {}).get("status") == "done" for s in self.steps)
                running = [s for s in self.steps if recs.get(s, {}).get("status") == "running"]
                self.current = running[0] if running else self.steps[min(self.done, len(self.steps) - 1)]
        except (OSError, ValueError):  # not written yet, or being replaced this instant
            pass
        return self.done, self.current


def _cancel_callback(control: TaskControl, progress: _ManifestProgress, n_steps: int):
    """A dask callback that reports progress and checks for cancel before each task of *this* thread's
    computations (other threads' dask work, e.g. the notebook's own, passes untouched)."""
    from dask.callbacks import Callback

    owner = threading.get_ident()
    armed: set[int] = set()

    class _Cancel(Callback):
        def _start_state(self, dsk, state):
            if threading.get_ident() == owner:
                armed.add(id(state))
                done, step = progress.refresh()
                control.report(f"step {step}", done, n_steps)

        def _pretask(self, key, dsk, state):
            if id(state) in armed:
                control.check()

        def _finish(self, dsk, state, failed):
            armed.discard(id(state))

    return _Cancel()


def run_with_control(project: Project | str | Path, control: TaskControl | None = None):
    """:func:`~wetlandflow.pipeline.run.run_project` with progress by step and cancel points at every dask task.

    Returns the :class:`~wetlandflow.pipeline.run.RunResult`; a cancel raises :class:`Cancelled` after the manifest
    recorded the interrupted step (earlier steps stay done and are reused by the next run).
    """
    from ...inputs.project import load_project
    from ...pipeline.run import run_project

    control = control or TaskControl()
    project = project if isinstance(project, Project) else load_project(project)
    steps = run_steps(project)
    progress = _ManifestProgress(project.run_dir, steps)
    control.report("starting", 0, len(steps))
    control.check()
    with _cancel_callback(control, progress, len(steps)):
        result = run_project(project, progress=False, control=control)
    control.report("finished", len(steps), len(steps))
    return result


def manifest_steps(run_dir: str | Path) -> pd.DataFrame:
    """The steps recorded in a run's manifest: status, seconds, reused, error."""
    path = Path(run_dir) / "manifest.json"
    recs = json.loads(path.read_text()).get("steps", {}) if path.exists() else {}
    return pd.DataFrame(
        [
            {
                "step": k,
                "status": v.get("status"),
                "seconds": v.get("seconds"),
                "reused": bool(v.get("reused", False)),
                "error": v.get("error", ""),
            }
            for k, v in recs.items()
        ],
        columns=["step", "status", "seconds", "reused", "error"],
    )


def select_features(
    project: Project,
    samples: pd.DataFrame,
    *,
    features: list[str] | None = None,
    max_features: int = 6,
    pool: int | None = 10,
    scoring: str = "f1_macro",
) -> Any:
    """Forward feature selection (Meyer et al. 2018) under the project's validation design.

    A composition of :func:`~wetlandflow.models.selection.forward_feature_selection` with the project's model
    and splitter; the score of the chosen set is optimistic (the same folds chose it), see
    :func:`~wetlandflow.models.compare.compare_models` for the nested estimate.

    Returns
    -------
    SelectionResult
    """
    from ...models.selection import forward_feature_selection
    from ...pipeline.run import make_model, make_splitter

    features = list(features or features_of(samples))
    cv = make_splitter(project, samples[["x", "y"]].to_numpy())
    return forward_feature_selection(
        make_model(project),
        samples[features],
        samples["class"].to_numpy(),
        samples["plot_id"].to_numpy(),
        cv,
        scoring=scoring,
        max_features=max_features,
        pool=pool,
    )


def require_run(project: Project, run_dir: str | Path = "", *, run_if_missing: bool = False) -> Path:
    """The run folder a notebook reads (default: the project's ``output_dir``), checked to be complete.

    With ``run_if_missing`` an incomplete folder is completed by :func:`~wetlandflow.pipeline.run.run_project`
    here, in the foreground (steps already done are reused); otherwise the error says how to make it.
    """
    from ...pipeline.run import run_project

    folder = Path(run_dir) if run_dir else project.run_dir
    needed = [folder / "manifest.json", folder / "samples.parquet", folder / "maps" / "class_final.tif"]
    if all(p.exists() for p in needed):
        return folder
    if run_if_missing:
        return run_project(project, progress=True).run_dir
    missing = [str(p.relative_to(folder)) for p in needed if not p.exists()]
    raise OutputError(
        f"the run folder {folder} lacks {missing}; run the project first (the run panel of "
        "notebook 01, or `wetlandflow run PROJECT.toml`), or set run_if_missing = True"
    )
