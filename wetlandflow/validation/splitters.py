"""Spatially honest cross-validation designs for plot-labelled samples.

Pixel samples taken from the same plot, or from plots a few pixels apart, are
not independent: a random split over pixels puts near-copies of each test pixel
in the training set and reports an accuracy the map will not reach.  This module
provides splitters that keep whole plots, whole spatial blocks, or a distance
buffer between training and test data.

How coordinates reach a splitter
--------------------------------
scikit-learn passes only ``X``, ``y`` and ``groups`` to ``split``.  Spatial
splitters here therefore take the sample coordinates **at construction**, as an
``(n_samples, 2)`` array ``coords`` aligned row for row with the ``X`` that will
be split (``samples[["x", "y"]].to_numpy()``).  ``split`` checks that ``X`` has
as many rows as ``coords``.  For an inner loop on a subset, use
:func:`subset_splitter`, which returns a copy whose coordinates follow the
subset; :func:`spatial_grid_search` does this for you.  ``groups`` are plot ids.

Where things live
-----------------
Splitters, fold assignment and fold checks are defined here.  Distance
matching (NNDM, kNNDM) and the distance diagnostics live in
:mod:`wetlandflow.validation.nndm`, the variogram block-size suggestion in
:mod:`wetlandflow.validation.variogram`, and nested tuning in :mod:`wetlandflow.validation.nested`;
all are re-exported here, so ``from wetlandflow.validation.splitters import ...`` keeps
one entry point for every design.

All splitters follow scikit-learn's protocol: ``__init__`` stores its arguments
unchanged, ``split(X, y=None, groups=None)`` validates them and yields
``(train_idx, test_idx)`` integer arrays, and ``get_n_splits`` gives the count,
so they work in ``cross_val_score``, ``cross_val_predict`` and ``GridSearchCV``.

References
----------
Roberts, D. R., et al. (2017). Cross-validation strategies for data with
temporal, spatial, hierarchical, or phylogenetic structure. Ecography 40(8),
913-929. doi:10.1111/ecog.02881
"""

from __future__ import annotations

import warnings
from collections.abc import Iterable
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from scipy.spatial import cKDTree
from sklearn.model_selection import BaseCrossValidator, GroupKFold, KFold, StratifiedGroupKFold

from ..errors import ValidationDesignError
from .nested import NestedCVResult, spatial_early_stopping, spatial_grid_search, subset_splitter
from .nndm import (
    KNNDM,
    NNDM,
    _as_coords,
    _check_aligned,
    _n_rows,
    cv_distance_diagnostics,
    knndm_folds,
    nn_distances,
    nndm_train_sets,
    plot_distance_ecdf,
    plot_folds,
    wasserstein_w,
)
from .variogram import BlockSizeSuggestion, suggest_block_size, variogram

__all__ = [
    "KNNDM",
    "NNDM",
    "BlockSizeSuggestion",
    "BufferedSplitter",
    "FewPlotsWarning",
    "GroupKFold",
    "NestedCVResult",
    "SpatialBlockKFold",
    "StratifiedGroupKFold",
    "assign_folds",
    "block_ids",
    "check_folds",
    "check_splits",
    "cv_distance_diagnostics",
    "fold_class_counts",
    "knndm_folds",
    "nn_distances",
    "nndm_train_sets",
    "plot_distance_ecdf",
    "plot_folds",
    "random_pixel_kfold",
    "require_testable_folds",
    "spatial_early_stopping",
    "spatial_grid_search",
    "subset_splitter",
    "suggest_block_size",
    "variogram",
    "wasserstein_w",
]

_POLICIES = ("raise", "warn", "ignore")


class FewPlotsWarning(UserWarning):
    """A class has fewer plots than folds, so some test folds cannot contain it."""


# --------------------------------------------------------------------------- helpers


def _check_param(owner: str, name: str, value: Any, ok: bool, expected: str) -> None:
    """One uniform message for bad constructor arguments (checked in ``split``)."""
    if not ok:
        raise ValidationDesignError(f"The {name!r} parameter of {owner} must be {expected}; got {value!r}.")


def _groups_or_rows(groups: ArrayLike | None, n: int) -> np.ndarray:
    """Plot ids, or one pseudo-plot per sample when no groups are given."""
    if groups is None:
        return np.arange(n)
    g = np.asarray(groups)
    if g.shape != (n,):
        raise ValidationDesignError(
            f"groups must have one plot id per sample ({n}); received shape {g.shape}."
        )
    return g


# --------------------------------------------------------------------------- blocks


def block_ids(
    x: ArrayLike, y: ArrayLike, block_size_m: float, origin: tuple[float, float] | None = None
) -> np.ndarray:
    """Label each point with the square grid block that contains it.

    Parameters
    ----------
    x, y : array-like of shape (n,)
        Coordinates in metres (projected CRS).
    block_size_m : float
        Side of the square blocks in metres.
    origin : (float, float), optional
        Lower-left corner of the block grid; defaults to ``(min(x), min(y))``.
        Fix it to make block ids comparable across data sets.

    Returns
    -------
    numpy.ndarray of int64
        ``row * n_cols + col`` of the block, rows counted upward from the origin.

    Examples
    --------
    >>> block_ids([0, 150, 250], [0, 0, 120], 100.0).tolist()
    [0, 1, 5]
    """
    xs, ys = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    if not (np.isfinite(block_size_m) and block_size_m > 0):
        raise ValidationDesignError(
            f"block_size_m must be a positive number of metres; got {block_size_m!r}."
        )
    if xs.shape != ys.shape or not (np.isfinite(xs).all() and np.isfinite(ys).all()):
        raise ValidationDesignError(
            "x and y must be finite and of equal length; drop samples without a location."
        )
    if xs.size == 0:
        return np.zeros(0, dtype=np.int64)
    x0, y0 = (xs.min(), ys.min()) if origin is None else origin
    col = np.floor((xs - x0) / block_size_m).astype(np.int64)
    row = np.floor((ys - y0) / block_size_m).astype(np.int64)
    col -= min(col.min(), 0)  # an origin inside the data would give negative indices
    row -= min(row.min(), 0)
    return row * (int(col.max()) + 1) + col


def _plot_blocks(blocks: np.ndarray, plots: np.ndarray) -> np.ndarray:
    """Per sample, the block holding most of its plot's samples (ties: lowest id)."""
    df = pd.DataFrame({"plot": plots, "block": blocks})
    counts = df.groupby(["plot", "block"]).size().rename("n").reset_index()
    counts = counts.sort_values(["plot", "n", "block"], ascending=[True, False, True])
    major = counts.drop_duplicates("plot").set_index("plot")["block"]
    return major.loc[plots].to_numpy()


def _unit_tables(units: np.ndarray, plots: np.ndarray, y: np.ndarray | None):
    """Per unit (block): plot counts per class and sample counts."""
    codes, unit_idx = np.unique(units, return_inverse=True)
    sizes = np.bincount(unit_idx, minlength=codes.size).astype(float)
    labels = np.zeros(plots.size, dtype=int) if y is None else np.unique(y, return_inverse=True)[1]
    pairs = pd.DataFrame({"u": unit_idx, "p": plots, "c": labels}).drop_duplicates(["p", "c"])
    plot_counts = np.zeros((codes.size, labels.max() + 1))
    np.add.at(plot_counts, (pairs["u"].to_numpy(), pairs["c"].to_numpy()), 1.0)
    return unit_idx, plot_counts, sizes


def _imbalance(load: np.ndarray, size: np.ndarray, class_w: float) -> float:
    """Squared departure of per-class plot shares and sample shares from 1/k."""
    k = size.size
    share = load / np.maximum(load.sum(axis=0), 1.0)
    score = class_w * float(((share - 1.0 / k) ** 2).sum(axis=0).mean())
    score += 0.5 * float(((size / size.sum() - 1.0 / k) ** 2).sum())
    # A class whose plots all sit in one fold is absent from that fold's training side.
    stuck = ((load > 0).sum(axis=0) == 1) & (load.sum(axis=0) >= 2)
    return score + 10.0 * float(stuck.sum())


def _greedy_assign(order, counts, sizes, k, class_w, rng) -> np.ndarray:
    """Put each block, in the given order, into the fold it unbalances least."""
    n_c = np.maximum(counts.sum(axis=0), 1.0)
    load = np.zeros((k, counts.shape[1]))
    size = np.zeros(k)
    fold_of = np.empty(counts.shape[0], dtype=int)
    for b in order:
        # Increment of the sum of squared shares; the size term makes empty folds strictly cheapest.
        cost = class_w * (load @ (counts[b] / n_c**2)) + 0.5 * size * sizes[b] / sizes.sum() ** 2
        f = int(np.argmin(cost + 1e-12 * rng.random(k)))
        fold_of[b] = f
        load[f] += counts[b]
        size[f] += sizes[b]
    return fold_of


def _best_block_folds(counts, sizes, k, n_trials, class_w, rng) -> np.ndarray:
    best, best_score = None, np.inf
    for _ in range(max(int(n_trials), 1)):
        fold_of = _greedy_assign(rng.permutation(counts.shape[0]), counts, sizes, k, class_w, rng)
        load = np.zeros((k, counts.shape[1]))
        np.add.at(load, fold_of, counts)
        size = np.bincount(fold_of, weights=sizes, minlength=k)
        if (size == 0).any():
            continue
        score = _imbalance(load, size, class_w)
        if score < best_score:
            best, best_score = fold_of, score
    return best


class SpatialBlockKFold(BaseCrossValidator):
    """K-fold cross-validation over square spatial blocks, plots kept whole.

    Samples are binned into square blocks of side ``block_size_m``; a plot that
    straddles blocks goes with the block holding most of its samples.  Whole
    blocks are then assigned to folds: ``n_trials`` random block orders are each
    assigned greedily and the assignment with the smallest imbalance of
    per-class plot counts (and of fold sizes) across folds is kept.

    Parameters
    ----------
    n_splits : int, default 5
        Number of folds (at least 2).
    block_size_m : float, default 1000
        Block side in metres.  Roberts et al. (2017) advise blocks larger than
        the autocorrelation range of the model residuals; see
        :func:`suggest_block_size`.
    random_state : int or None, default None
        Seed for the block orders; an int makes the folds reproducible.
    balance_classes : bool, default True
        Balance per-class plot counts across folds; if False only fold sizes
        (sample counts) are balanced.
    n_trials : int, default 50
        Number of random block orders tried.
    coords : array-like of shape (n_samples, 2)
        Sample x, y in metres aligned with ``X`` (see the module notes).
    origin : (float, float), optional
        Block grid origin; defaults to the lower-left sample.
    on_class_missing : {"raise", "warn", "ignore"}, default "raise"
        What to do when a class is missing from a fold (see :func:`check_splits`).

    Notes
    -----
    The imbalance score is ``mean_c sum_f (n_cf / n_c - 1/k)^2 + 0.5 sum_f
    (m_f / m - 1/k)^2 + 10 * (classes confined to one fold)``, with ``n_cf``
    plots of class ``c`` in fold ``f`` and ``m_f`` samples in fold ``f``; the
    weights are a design choice (common practice, no source).

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> xy = rng.uniform(0, 5000, size=(200, 2))
    >>> y = np.where(xy[:, 0] + rng.normal(0, 900, 200) > 2500, "marsh", "bog")
    >>> cv = SpatialBlockKFold(n_splits=4, block_size_m=1000, random_state=0, coords=xy)
    >>> sum(len(test) for _, test in cv.split(xy, y))
    200
    """

    __metadata_request__split = {"groups": True}

    def __init__(
        self,
        n_splits: int = 5,
        block_size_m: float = 1000,
        random_state: int | None = None,
        balance_classes: bool = True,
        n_trials: int = 50,
        *,
        coords: ArrayLike | None = None,
        origin: tuple[float, float] | None = None,
        on_class_missing: str = "raise",
    ):
        self.n_splits = n_splits
        self.block_size_m = block_size_m
        self.random_state = random_state
        self.balance_classes = balance_classes
        self.n_trials = n_trials
        self.coords = coords
        self.origin = origin
        self.on_class_missing = on_class_missing

    def get_n_splits(self, X: Any = None, y: Any = None, groups: Any = None) -> int:
        """Return the number of folds, ``n_splits``."""
        return self.n_splits

    def _validate(self) -> None:
        owner = type(self).__name__
        k = self.n_splits
        _check_param(owner, "n_splits", k, isinstance(k, (int, np.integer)) and k >= 2, "an int >= 2")
        b = self.block_size_m
        _check_param(
            owner, "block_size_m", b, np.isscalar(b) and np.isfinite(b) and b > 0, "a positive float"
        )
        t = self.n_trials
        _check_param(owner, "n_trials", t, isinstance(t, (int, np.integer)) and t >= 1, "an int >= 1")
        p = self.on_class_missing
        _check_param(owner, "on_class_missing", p, p in _POLICIES, f"one of {_POLICIES}")

    def fold_ids(self, X: Any, y: ArrayLike | None = None, groups: ArrayLike | None = None) -> np.ndarray:
        """Test-fold id (0 .. n_splits-1) for every sample."""
        self._validate()
        xy = _as_coords(self.coords, type(self).__name__, X)
        _check_aligned(_n_rows(X), xy, type(self).__name__)
        plots = _groups_or_rows(groups, xy.shape[0])
        units = _plot_blocks(block_ids(xy[:, 0], xy[:, 1], self.block_size_m, self.origin), plots)
        y_arr = None if y is None else np.asarray(y)
        unit_idx, counts, sizes = _unit_tables(units, plots, y_arr)
        if counts.shape[0] < self.n_splits:
            raise ValidationDesignError(
                f"{type(self).__name__}: the samples fall in {counts.shape[0]} block(s) of "
                f"{self.block_size_m} m, "
                f"fewer than n_splits={self.n_splits}. Use smaller blocks or fewer folds."
            )
        rng = np.random.default_rng(self.random_state)
        class_w = 1.0 if (self.balance_classes and y is not None) else 0.0
        fold_of = _best_block_folds(counts, sizes, self.n_splits, self.n_trials, class_w, rng)
        return fold_of[unit_idx]

    def split(self, X: Any, y: ArrayLike | None = None, groups: ArrayLike | None = None):
        """Yield ``(train_idx, test_idx)`` for each fold; checks class coverage if ``y`` is given."""
        folds = self.fold_ids(X, y, groups)
        splits = _splits_from_folds(folds, self.n_splits)
        if y is not None:
            check_splits(y, splits, groups, on_missing=self.on_class_missing)
        yield from splits


def _splits_from_folds(folds: np.ndarray, k: int) -> list[tuple[np.ndarray, np.ndarray]]:
    idx = np.arange(folds.size)
    return [(idx[folds != f], idx[folds == f]) for f in range(k)]


def assign_folds(
    splitter: Any, X: Any, y: ArrayLike | None = None, groups: ArrayLike | None = None
) -> np.ndarray:
    """Test-fold id per sample from any splitter (-1 for samples never tested).

    Raises
    ------
    ValidationDesignError
        If a sample falls in two test sets (the splitter is not a partition,
        e.g. ShuffleSplit), so that one fold id per sample does not exist.
    """
    folds = np.full(_n_rows(X), -1, dtype=int)
    with warnings.catch_warnings():
        # KFold (the random design) takes no groups and says so; the caller gave them for the other designs
        warnings.filterwarnings("ignore", message="The groups parameter is ignored")
        splits = list(splitter.split(X, y, groups))
    for f, (_, test) in enumerate(splits):
        if (folds[test] >= 0).any():
            raise ValidationDesignError(
                f"{splitter!r} tests some samples more than once (fold {f}); assign_folds needs test sets "
                f"that partition the samples. Use the splits directly instead."
            )
        folds[test] = f
    return folds


# --------------------------------------------------------------------------- fold checks


def _policy(on_missing: str, message: str, category: type[Warning] = UserWarning) -> None:
    if on_missing == "raise":
        raise ValidationDesignError(message)
    if on_missing == "warn":
        warnings.warn(message, category, stacklevel=4)


def check_splits(
    y: ArrayLike,
    splits: Iterable[tuple[ArrayLike, ArrayLike]],
    groups: ArrayLike | None = None,
    *,
    on_missing: str = "raise",
) -> None:
    """Check that every class reaches every fold's training and test sides.

    A class missing from a fold's training side cannot be predicted in that
    fold; a class with at least as many plots as folds but missing from a test
    side points at a poor assignment.  Both follow ``on_missing``.  A class with
    fewer plots than folds cannot reach every test fold: that is reported with a
    :class:`FewPlotsWarning` instead.
    """
    if on_missing not in _POLICIES:
        raise ValidationDesignError(f"on_missing must be one of {_POLICIES}; got {on_missing!r}.")
    y_arr = np.asarray(y)
    plots = _groups_or_rows(groups, y_arr.size)
    splits = list(splits)
    n_plots = pd.Series(plots).groupby(y_arr).nunique()
    tested = {cls: [f for f, (_, test) in enumerate(splits)
                    if (y_arr[np.asarray(test, dtype=int)] == cls).any()] for cls in n_plots.index}
    # warn only when the folds in use really leave the class out of a test side (a random pixel design
    # puts a one-plot class in every test fold: no warning is due there)
    few = n_plots[[n < len(splits) and len(tested[cls]) < len(splits) for cls, n in n_plots.items()]]
    for cls, n in few.items():
        absent = [f for f in range(len(splits)) if f not in tested[cls]]
        warnings.warn(
            f"class {cls!r} has {n} plot(s) but there are {len(splits)} folds, so it is absent from the "
            f"test side of fold(s) {absent}. Collect more plots, merge it with a similar class, or use fewer "
            "folds (validation.n_folds in the project file).",
            FewPlotsWarning,
            stacklevel=3,
        )
    for f, (train, test) in enumerate(splits):
        for side, idx in (("training", train), ("test", test)):
            missing = set(n_plots.index) - set(np.unique(y_arr[np.asarray(idx, dtype=int)]))
            if side == "test":
                missing -= set(few.index)
            for cls in sorted(missing, key=str):
                _policy(on_missing, _missing_message(cls, n_plots[cls], side, f, len(splits)))


def _missing_message(cls: Any, n: int, side: str, fold: int, k: int, design: str = "") -> str:
    where = f" (validation.design = {design!r})" if design else ""
    return (f"class {cls!r} ({n} plot(s) in total) is missing from the {side} side of fold {fold}{where}. "
            f"Expected every class on both sides of every fold. Merge {cls!r} with a similar class, collect "
            f"more plots of it, or use fewer folds (validation.n_folds, now {k}).")


def require_testable_folds(
    y: ArrayLike, folds: ArrayLike, groups: ArrayLike | None = None, *, design: str = ""
) -> None:
    """Refuse folds whose cross-validated accuracy would be a silently wrong number, whatever the design.

    Refused (:class:`~wetlandflow.errors.ValidationDesignError`), the same way for every design:

    * a class missing from the training side of a fold that tests it: its test samples are scored by a
      model that cannot predict them (a one-plot class under plot-grouped folds always is);
    * a class that no test fold holds: the accuracy never tests it;
    * fewer than two classes tested: an overall accuracy over one class says nothing about the map.

    What remains (a class absent from some test folds) is warned by :func:`check_splits`.
    """
    y_arr = np.asarray(y)
    folds = np.asarray(folds)
    plots = _groups_or_rows(groups, y_arr.size)
    n_plots = pd.Series(plots).groupby(y_arr).nunique()
    ids = np.unique(folds[folds >= 0])
    k = len(ids)
    for f in ids:
        train, test = folds != f, folds == f
        for cls in sorted(set(y_arr[test]) - set(y_arr[train]), key=str):
            raise ValidationDesignError(_missing_message(cls, n_plots[cls], "training", int(f), k, design))
    never = sorted(set(y_arr) - set(y_arr[folds >= 0]), key=str)
    if never:
        raise ValidationDesignError(
            f"class {never[0]!r} ({n_plots[never[0]]} plot(s) in total) is in no test fold "
            f"(validation.design = {design!r}), so the cross-validated accuracy would never test it. Collect "
            "more plots of it, or use fewer folds (validation.n_folds)")
    n_tested = len(set(y_arr[folds >= 0]))
    if n_tested < 2:
        raise ValidationDesignError(
            f"the test folds hold {n_tested} class(es) (validation.design = {design!r}): an "
            "overall accuracy over fewer than two classes says nothing about the map. Collect plots of more "
            "classes, or use fewer folds (validation.n_folds)")
    idx = np.arange(folds.size)
    check_splits(y_arr, [(idx[folds != f], idx[folds == f]) for f in ids], plots, on_missing="warn")


def check_folds(
    y: ArrayLike, folds: ArrayLike, groups: ArrayLike | None = None, *, on_missing: str = "raise"
) -> pd.DataFrame:
    """Check a fold-id vector (see :func:`check_splits`) and return its class table.

    Returns
    -------
    pandas.DataFrame
        :func:`fold_class_counts` of the folds.
    """
    folds = np.asarray(folds)
    ids = np.unique(folds[folds >= 0])
    idx = np.arange(folds.size)
    check_splits(y, [(idx[(folds != f)], idx[folds == f]) for f in ids], groups, on_missing=on_missing)
    return fold_class_counts(y, folds, groups)


def fold_class_counts(y: ArrayLike, folds: ArrayLike, groups: ArrayLike | None = None) -> pd.DataFrame:
    """Samples and plots per class (rows) per test fold (columns).

    Returns
    -------
    pandas.DataFrame
        Columns are a MultiIndex ``(measure, fold)`` with measure ``"samples"``
        or ``"plots"``; missing combinations are 0.
    """
    y_arr = np.asarray(y)
    df = pd.DataFrame(
        {"class": y_arr, "fold": np.asarray(folds), "plot": _groups_or_rows(groups, y_arr.size)}
    )
    grouped = df.groupby(["class", "fold"])
    table = pd.concat({"samples": grouped.size(), "plots": grouped["plot"].nunique()}, axis=1)
    return table.unstack("fold", fill_value=0).astype(int)


# --------------------------------------------------------------------------- buffer and baselines


class BufferedSplitter(BaseCrossValidator):
    """Drop training samples within ``buffer_m`` of any test sample.

    Parameters
    ----------
    base_splitter : cross-validator
        Any splitter with ``split(X, y, groups)``, e.g. :class:`SpatialBlockKFold`
        or scikit-learn's ``GroupKFold``.
    buffer_m : float
        Exclusion distance in metres; training samples at distance <= buffer_m
        from the nearest test sample are removed.
    coords : array-like of shape (n_samples, 2), optional
        Sample coordinates; defaults to ``base_splitter.coords``.
    on_class_missing : {"raise", "warn", "ignore"}, default "warn"
        Policy when the buffer removes a class from a training side.

    References
    ----------
    Ploton, P., et al. (2020). Spatial validation reveals poor predictive
    performance of large-scale ecological mapping models. Nature
    Communications 11, 4540 (buffered leave-out validation).
    """

    __metadata_request__split = {"groups": True}

    def __init__(
        self,
        base_splitter: Any,
        buffer_m: float,
        *,
        coords: ArrayLike | None = None,
        on_class_missing: str = "warn",
    ):
        self.base_splitter = base_splitter
        self.buffer_m = buffer_m
        self.coords = coords
        self.on_class_missing = on_class_missing

    def get_n_splits(self, X: Any = None, y: Any = None, groups: Any = None) -> int:
        """Number of splits of the base splitter."""
        return self.base_splitter.get_n_splits(X, y, groups)

    def split(self, X: Any, y: ArrayLike | None = None, groups: ArrayLike | None = None):
        """Yield the base splits with buffered training sets."""
        owner = type(self).__name__
        b = self.buffer_m
        _check_param(
            owner, "buffer_m", b, np.isscalar(b) and np.isfinite(b) and b >= 0, "a float >= 0 (metres)"
        )
        coords = self.coords if self.coords is not None else getattr(self.base_splitter, "coords", None)
        xy = _as_coords(coords, owner, X)
        _check_aligned(_n_rows(X), xy, owner)
        out = []
        for f, (train, test) in enumerate(self.base_splitter.split(X, y, groups)):
            d, _ = cKDTree(xy[test]).query(xy[train], k=1)
            kept = np.asarray(train)[d > b]
            if kept.size == 0:
                raise ValidationDesignError(
                    f"{owner}: a buffer of {b} m removes every training sample of fold {f}. "
                    "Use a smaller buffer."
                )
            out.append((kept, np.asarray(test)))
        if y is not None:
            check_splits(y, out, groups, on_missing=self.on_class_missing)
        yield from out


def random_pixel_kfold(
    n_splits: int = 5,
    *,
    shuffle: bool = True,
    random_state: int | None = None,
    allow_random_pixels: bool = False,
) -> KFold:
    """Plain random K-fold over pixels, refused unless explicitly allowed.

    Random pixel folds place pixels of the same plot, and of neighbouring
    plots, on both sides of the split, so the score measures how well the model
    recalls its own plots rather than how well it maps new ground.  Offered
    only as a contrast to the spatial designs (Roberts et al. 2017; Ploton
    et al. 2020).

    Raises
    ------
    ValidationDesignError
        Unless ``allow_random_pixels=True``.
    """
    if not allow_random_pixels:
        raise ValidationDesignError(
            "random pixel K-fold leaks information: pixels of one plot (and of nearby plots) land in both "
            "training and test folds, which inflates accuracy. Received "
            "allow_random_pixels=False; expected a "
            "plot- or block-based design. Use SpatialBlockKFold or GroupKFold with groups=plot_id, or pass "
            "allow_random_pixels=True to build the leaky baseline on purpose for comparison."
        )
    return KFold(n_splits=n_splits, shuffle=shuffle, random_state=random_state if shuffle else None)
