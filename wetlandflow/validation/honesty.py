"""Is a validation design honest?  Random-pixel CV, spatial CV and the map's true accuracy.

Where a wall-to-wall truth raster exists (the synthetic demo writes one), the
accuracy a cross-validation design reports can be compared with the accuracy
the map really has.  Random K-fold over pixels puts pixels of the same plot,
and of neighbouring plots, on both sides of every split and reports an
accuracy the map does not reach; a spatial design (blocks, buffers, distance
matching) should come much closer (Roberts et al. 2017; Ploton et al. 2020).

Spatial CV serves to choose models and predictors.  The accuracy and the
class areas of an inventory come from an independent probability sample
(:mod:`wetlandflow.accuracy.estimators`), not from any cross-validation.

References
----------
Roberts, D. R., et al. (2017). Cross-validation strategies for data with
temporal, spatial, hierarchical, or phylogenetic structure. Ecography 40(8),
913-929. doi:10.1111/ecog.02881

Ploton, P., et al. (2020). Spatial validation reveals poor predictive
performance of large-scale ecological mapping models. Nature Communications
11, 4540. doi:10.1038/s41467-020-18321-y
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from sklearn.base import clone

from ..errors import GridMismatchError, ParameterError
from ..inputs.grid import Grid
from .splitters import random_pixel_kfold

__all__ = ["cv_honesty", "map_accuracy_against_truth", "map_error_matrix_against_truth",
           "random_pixel_cv_predictions"]


def random_pixel_cv_predictions(
    estimator: Any,
    X: ArrayLike,
    y: ArrayLike,
    *,
    n_splits: int = 5,
    random_state: int | None = 0,
    sample_weight: ArrayLike | None = None,
    allow_random_pixels: bool = False,
) -> np.ndarray:
    """Out-of-fold predictions of the leaky random-pixel K-fold (a contrast, never the design).

    Each fold refits a clone of ``estimator`` on the other folds; with
    ``sample_weight`` the training rows keep their weights.

    Parameters
    ----------
    estimator : classifier
        Any scikit-learn classifier; it is cloned, never modified.
    X, y : array-like
        Features and labels, one row per pixel sample.
    n_splits, random_state
        Passed to :func:`~wetlandflow.validation.splitters.random_pixel_kfold`.
    sample_weight : array-like of shape (n,), optional
        Training weights per sample.
    allow_random_pixels : bool, default False
        Must be True: the leaky split is refused unless asked for explicitly.

    Returns
    -------
    numpy.ndarray
        ``estimator.predict`` output for every sample, from the fold that held it out.
    """
    cv = random_pixel_kfold(n_splits, random_state=random_state, allow_random_pixels=allow_random_pixels)
    X_arr, y_arr = np.asarray(X), np.asarray(y)
    w = None if sample_weight is None else np.asarray(sample_weight, dtype=float)
    pred = np.empty_like(y_arr)
    for train, test in cv.split(X_arr):
        fit_kw = {} if w is None else {"sample_weight": w[train]}
        pred[test] = clone(estimator).fit(X_arr[train], y_arr[train], **fit_kw).predict(X_arr[test])
    return pred


def _read_codes(path: Any) -> tuple[np.ndarray, Grid]:
    import rasterio

    with rasterio.open(path) as src:
        return src.read(1), Grid(src.crs.to_string(), src.transform, src.width, src.height)


def _truth_on_map_grid(truth: np.ndarray, tgrid: Grid, mgrid: Grid) -> np.ndarray:
    """The truth codes at the map's pixel centres (0 where the truth does not reach)."""
    if mgrid.pyproj_crs != tgrid.pyproj_crs or not np.isclose(mgrid.resolution, tgrid.resolution):
        raise GridMismatchError(
            f"the truth raster ({tgrid.crs}, {tgrid.resolution} m) is not on the map's grid "
            f"({mgrid.crs}, {mgrid.resolution} m); resample the truth onto the map grid (nearest) first."
        )
    x, y = mgrid.xy_coords()
    cols = tgrid.rowcol(x, np.full_like(x, y[0]))[1]
    rows = tgrid.rowcol(np.full_like(y, x[0]), y)[0]
    in_c, in_r = (cols >= 0) & (cols < tgrid.width), (rows >= 0) & (rows < tgrid.height)
    out = np.zeros(mgrid.shape, dtype=truth.dtype)
    out[np.ix_(in_r, in_c)] = truth[np.ix_(rows[in_r], cols[in_c])]
    return out


def _recode(codes: np.ndarray, from_names: list[str], to_names: list[str]) -> np.ndarray:
    """Codes ``1..K`` of ``from_names`` as codes of ``to_names`` (0 stays 0)."""
    top = int(codes.max()) if codes.size else 0
    unknown = [n for n in from_names if n not in to_names]
    if top > len(from_names) or unknown:
        raise ParameterError(
            f"truth codes run to {top} for truth classes {from_names}; classes {unknown} are not in the "
            f"map's scheme {to_names}. Pass truth_classes naming truth codes 1..K in order."
        )
    lut = np.array([0] + [to_names.index(n) + 1 for n in from_names], dtype=np.int64)
    return lut[codes]


def map_accuracy_against_truth(
    class_map: Any, truth: Any, *, map_classes: ArrayLike, truth_classes: ArrayLike | None = None
) -> dict[str, float]:
    """Overall accuracy of a class map against a wall-to-wall truth raster.

    Every pixel that both rasters cover counts once, so classes weigh by their
    area: the map's accuracy as a census.  Reads both rasters into memory.

    Parameters
    ----------
    class_map, truth : path-like
        Single-band rasters of class codes ``1..K`` (0 = no data).  The truth
        is read at the map's pixel centres; both must share CRS and pixel size.
    map_classes : sequence of str
        Class names of map codes ``1..K``.
    truth_classes : sequence of str, optional
        Class names of truth codes ``1..K'``; defaults to ``map_classes``.

    Returns
    -------
    dict
        ``overall_accuracy`` and ``n_pixels``.
    """
    m, t_codes, both, names = _paired_codes(class_map, truth, map_classes, truth_classes)
    return {"overall_accuracy": float((m[both] == t_codes[both]).mean()), "n_pixels": int(both.sum())}


def map_error_matrix_against_truth(
    class_map: Any, truth: Any, *, map_classes: ArrayLike, truth_classes: ArrayLike | None = None
) -> pd.DataFrame:
    """The census error matrix of a class map against a wall-to-wall truth raster (pixel counts).

    Rows are map classes, columns truth classes (the layout of
    :func:`wetlandflow.accuracy.estimators.error_matrix`); every pixel both rasters cover counts once,
    so :func:`~wetlandflow.accuracy.estimators.accuracy_measures` on it gives the map's census overall,
    user's and producer's accuracies (their intervals are meaningless: nothing is sampled).
    """
    m, t_codes, both, names = _paired_codes(class_map, truth, map_classes, truth_classes)
    k = len(names)
    counts = np.bincount((m[both].astype(np.int64) - 1) * k + (t_codes[both] - 1), minlength=k * k)
    return pd.DataFrame(counts.reshape(k, k), index=pd.Index(names, name="map"),
                        columns=pd.Index(names, name="reference"))


def _paired_codes(class_map: Any, truth: Any, map_classes: ArrayLike, truth_classes: ArrayLike | None):
    """Map codes, truth codes recoded to the map's scheme on the map's grid, their common valid mask, names."""
    m, mgrid = _read_codes(class_map)
    t, tgrid = _read_codes(truth)
    names = [str(c) for c in np.asarray(map_classes)]
    t_names = names if truth_classes is None else [str(c) for c in np.asarray(truth_classes)]
    t_codes = _recode(_truth_on_map_grid(t, tgrid, mgrid), t_names, names)
    both = (m > 0) & (t_codes > 0)
    if not both.any():
        raise GridMismatchError("the class map and the truth raster have no valid pixel in common; "
                                "check that they cover the same area.")
    return m, t_codes, both, names


def _run_model(run: Path) -> tuple[Any, list[str], list[str]]:
    """The run's classifier settings (unfitted), its features and class names, from ``model/bundle.json``."""
    from ..models.classifier import WetlandClassifier

    bundle = json.loads((run / "model" / "bundle.json").read_text())
    allowed = WetlandClassifier().get_params()
    params = {k: v for k, v in bundle["params"].items() if k in allowed}
    params["classes"] = tuple(params["classes"])
    return WetlandClassifier(**params), list(bundle["features"]), list(bundle["scheme"]["names"])


def cv_honesty(
    run_dir: Any,
    truth_path: Any,
    *,
    truth_classes: ArrayLike | None = None,
    n_splits: int | None = None,
    random_state: int | None = None,
    sample_weight: ArrayLike | None = None,
) -> pd.DataFrame:
    """Random-pixel CV, the run's spatial CV and the map's true accuracy, side by side.

    Random-pixel K-fold is refitted over the run's samples with the run's own
    model settings (``model/bundle.json``); the spatial estimate is the one
    the run wrote (``validation/metrics.json``); the truth is the map
    (``maps/class.tif``) against the truth raster.  An honest design has a
    spatial estimate close to the truth; the random-pixel estimate is
    typically well above both.

    Parameters
    ----------
    run_dir : path-like
        A run folder with ``samples.parquet``, ``manifest.json``,
        ``model/bundle.json``, ``validation/metrics.json`` and ``maps/class.tif``.
    truth_path : path-like
        Truth raster of class codes (0 = no data), in the map's CRS and pixel size.
    truth_classes : sequence of str, optional
        Class names of truth codes ``1..K``; defaults to the run's class scheme.
    n_splits : int, optional
        Folds of the random-pixel CV; defaults to the run's number of folds.
    random_state : int, optional
        Seed of the random folds; defaults to the run's seed.
    sample_weight : array-like, optional
        Weights per row of ``samples.parquet``, if the run fitted with weights.

    Returns
    -------
    pandas.DataFrame
        One row per estimate (``random-pixel CV``, ``spatial CV (<design>)``,
        ``map vs truth``) with ``overall_accuracy``, ``n`` (samples or
        pixels), ``minus_truth`` (estimate minus the map's true accuracy) and
        ``what`` (a plain-language description).

    Notes
    -----
    Refits the model ``n_splits`` times, about as long as the run's
    validation step.  The samples' pixels are part of the truth comparison
    (about 1 % of the demo's area), which does not change the picture.

    Examples
    --------
    >>> cv_honesty("demo/runs/demo", "demo/truth.tif")  # doctest: +SKIP
    """
    run = Path(run_dir)
    model, features, names = _run_model(run)
    metrics = json.loads((run / "validation" / "metrics.json").read_text())
    seed = json.loads((run / "manifest.json").read_text()).get("seed")
    samples = pd.read_parquet(run / "samples.parquet")
    y = samples["class"].to_numpy()
    pred = random_pixel_cv_predictions(
        model, samples[features].to_numpy(np.float32), y, n_splits=int(n_splits or metrics["n_folds"]),
        random_state=seed if random_state is None else random_state, sample_weight=sample_weight,
        allow_random_pixels=True,  # built on purpose, as the leaky contrast
    )
    truth = map_accuracy_against_truth(run / "maps" / "class.tif", truth_path, map_classes=names,
                                       truth_classes=truth_classes)
    rows = [
        ("random-pixel CV", float(np.mean(pred == y)), len(samples),
         "random K-fold over pixels; pixels of one plot fall on both sides (leaks)"),
        (f"spatial CV ({metrics.get('design', '?')})", float(metrics["overall_accuracy"]), int(metrics["n"]),
         "the run's own validation design, from validation/metrics.json"),
        ("map vs truth", truth["overall_accuracy"], truth["n_pixels"],
         "the map against the truth raster, every pixel once"),
    ]
    table = pd.DataFrame(rows, columns=["estimate", "overall_accuracy", "n", "what"])
    table.insert(3, "minus_truth", table["overall_accuracy"] - truth["overall_accuracy"])
    return table
