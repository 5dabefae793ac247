"""Exact TreeSHAP explanations of a fitted :class:`~wetlandflow.models.classifier.WetlandClassifier`.

XGBoost models are explained with the booster's own exact TreeSHAP
(``pred_contribs=True``); random forests with ``shap.TreeExplainer``
(tree-path-dependent).  Both give, per sample, feature and class, the
contribution to the model output, with local accuracy
``f(x) = base_value + sum_i phi_i(x)`` (Lundberg et al. 2020).  XGBoost
contributions are on the raw margin (log-odds) scale, forest contributions on
the probability scale; ``attrs["output_scale"]`` says which.

A :class:`~wetlandflow.models.hierarchy.HierarchicalClassifier` is explained per
level (exact TreeSHAP of each level's classifier, :func:`hierarchical_shap_values`)
and as a whole (:func:`combined_shap_values`): the leaf probabilities
``P(leaf) = P(parent) x P(leaf | parent)`` are a product of two models, which no
tree explainer sees as one, so their attributions are computed model-agnostically
with shap's permutation (or, for few features, exact) explainer against a
background sample, on the probability scale.

Summaries (global, per domain, per correlation cluster, ranking stability
across seeds) are plain DataFrames; figures live in :mod:`wetlandflow.explain.plots`.

References
----------
Lundberg, S. M., Erion, G., Chen, H., et al. (2020). From local explanations to
global understanding with explainable AI for trees. Nature Machine Intelligence
2(1), 56-67.

Chen, T., Guestrin, C. (2016). XGBoost: A Scalable Tree Boosting System.
Proc. 22nd ACM SIGKDD, 785-794.

Lundberg, S. M., Lee, S.-I. (2017). A unified approach to interpreting model
predictions. Advances in Neural Information Processing Systems 30, 4765-4774.

Strumbelj, E., Kononenko, I. (2014). Explaining prediction models and individual
predictions with feature contributions. Knowledge and Information Systems 41(3),
647-665.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .._provenance import DOMAINS, with_attrs
from ..errors import BudgetError, ModelError, ParameterError
from ..models.classifier import WetlandClassifier, scheme_proba

REFERENCE = ("Lundberg et al. (2020) From local explanations to global understanding with explainable AI "
             "for trees, Nature Machine Intelligence 2, 56-67")
CLUSTER_NOTE = ("Correlated predictors share credit unpredictably: TreeSHAP splits a signal among correlated "
                "features according to which one the trees happened to split on, so member ranks within a "
                "cluster can swap between seeds or resamples. Read the cluster totals, not the member ranks.")
COMBINED_REFERENCE = ("Lundberg & Lee (2017) A unified approach to interpreting model predictions, "
                      "NeurIPS 30; Strumbelj & Kononenko (2014) Explaining prediction models and individual "
                      "predictions with feature contributions, Knowledge and Information Systems 41, 647-665")
_DEFAULT_CHUNK_ROWS = 50_000
EXACT_MAX_FEATURES = 10  # method="auto": exact enumeration (2^F coalitions per row) up to this many features

__all__ = [
    "CLUSTER_NOTE", "cluster_importance", "combined_shap_values", "domain_importance", "explain_budget",
    "global_importance", "contribution_map", "hierarchical_shap_values", "model_levels", "model_shap_values",
    "ranking_stability", "shap_interactions", "shap_map", "shap_values", "stratified_subsample",
    "window_contributions", "write_shap_map",
]


# --------------------------------------------------------------------------- inputs


def _as_matrix(X: pd.DataFrame | np.ndarray, features: Sequence[str], model: WetlandClassifier
               ) -> tuple[np.ndarray, np.ndarray]:
    """Rows as float32 (n, F) in ``features`` order, plus the sample labels."""
    features = list(features)
    if len(features) != getattr(model, "n_features_in_", len(features)):
        raise ModelError(f"features lists {len(features)} names but the model was trained on "
                         f"{model.n_features_in_} features; pass the training feature list in training order")
    if isinstance(X, pd.DataFrame):
        missing = [f for f in features if f not in X.columns]
        if missing:
            raise ModelError(f"X lacks the feature column(s) {missing[:8]}; expected all of {features[:8]}...")
        return np.ascontiguousarray(X[features].to_numpy(np.float32)), X.index.to_numpy()
    arr = np.asarray(X, dtype=np.float32)
    if arr.ndim != 2 or arr.shape[1] != len(features):
        raise ModelError(f"X must be 2-D with {len(features)} columns (one per feature); got shape {arr.shape}")
    return np.ascontiguousarray(arr), np.arange(arr.shape[0])


def _scheme(model: Any) -> np.ndarray:
    """The classes in the model's scheme order (``scheme_``), else its ``classes_``."""
    return getattr(model, "scheme_", model.classes_)


def _scheme_index(model: WetlandClassifier) -> np.ndarray:
    """Position in the class scheme of each trained (present) class."""
    scheme = list(_scheme(model))
    return np.array([scheme.index(c) for c in model.present_], dtype=np.int64)


# --------------------------------------------------------------------------- layouts


def _xgb_contribs_layout(raw: np.ndarray, n: int, k: int, f: int) -> np.ndarray:
    """Bring xgboost's ``pred_contribs`` output to (n, K, F + 1) whatever the version.

    Recent versions return (n, K, F+1) for multi-class and (n, F+1) for one output;
    older ones returned a flat (n, K * (F+1)).  The bias is the last feature column.
    """
    raw = np.asarray(raw)
    if raw.ndim == 3 and raw.shape == (n, k, f + 1):
        return raw
    if raw.ndim == 3 and raw.shape == (n, f + 1, k):
        return raw.transpose(0, 2, 1)
    if raw.ndim == 2 and raw.shape == (n, k * (f + 1)):
        return raw.reshape(n, k, f + 1)
    if raw.ndim == 2 and raw.shape == (n, f + 1) and k == 1:
        return raw[:, None, :]
    raise ModelError(f"unexpected pred_contribs shape {raw.shape}; expected (n={n}, K={k}, F+1={f + 1}) or a "
                     "known older layout; check the xgboost version")


def _shap_layout(values: Any, n: int, k: int, f: int) -> np.ndarray:
    """Bring ``shap.TreeExplainer.shap_values`` output to (n, F, K) across shap versions.

    Older shap returned a list of K (n, F) arrays; newer ones one (n, F, K) array.
    """
    if isinstance(values, list):
        values = np.stack([np.asarray(v) for v in values], axis=-1)
    values = np.asarray(values)
    if values.ndim == 2 and values.shape == (n, f):
        values = values[:, :, None]
    if values.shape == (n, f, k):
        return values
    if values.shape == (k, n, f):
        return values.transpose(1, 2, 0)
    if k == 2 and values.shape == (n, f, 1):  # some versions explain only the positive class of a binary forest
        return np.concatenate([-values, values], axis=-1)
    raise ModelError(f"unexpected shap_values shape {values.shape}; expected (n={n}, F={f}, K={k})")


def _expected_layout(expected: Any, k: int) -> np.ndarray:
    e = np.atleast_1d(np.asarray(expected, dtype=np.float64)).ravel()
    if e.size == 1 and k == 2:  # positive-class-only binary layout; probabilities sum to one
        e = np.array([1.0 - e[0], e[0]])
    if e.size != k:
        raise ModelError(f"unexpected expected_value of size {e.size}; expected {k} (one per trained class)")
    return e


# --------------------------------------------------------------------------- exact TreeSHAP


def _xgb_chunk(booster: Any, X: np.ndarray, **kwargs: Any) -> np.ndarray:
    from xgboost import DMatrix

    return booster.predict(DMatrix(X), **kwargs)


def _xgb_base(booster: Any, k: int, f: int) -> np.ndarray:
    """The bias column does not depend on x, so one all-missing row gives it (also for n = 0)."""
    row = np.full((1, f), np.nan, np.float32)
    return _xgb_contribs_layout(_xgb_chunk(booster, row, pred_contribs=True), 1, k, f)[0, :, -1]


def _xgb_values(model: WetlandClassifier, X: np.ndarray, chunk_rows: int) -> tuple[np.ndarray, np.ndarray]:
    """(n, F, K_present) contributions and (K_present,) bias on the margin scale."""
    booster = model.model_.get_booster()
    n, f = X.shape
    k = len(model.present_)
    out = np.empty((n, f, k), np.float32)
    for start in range(0, n, chunk_rows):
        stop = min(start + chunk_rows, n)
        raw = _xgb_chunk(booster, X[start:stop], pred_contribs=True)
        out[start:stop] = _xgb_contribs_layout(raw, stop - start, k, f)[:, :, :-1].transpose(0, 2, 1)
    return out, _xgb_base(booster, k, f).astype(np.float64)


def _rf_explainer(model: WetlandClassifier) -> Any:
    try:
        import shap
    except ImportError as exc:  # pragma: no cover - shap is a declared dependency
        raise ModelError("explaining a random forest needs the 'shap' package; pip install shap") from exc
    return shap.TreeExplainer(model.model_)


def _rf_values(model: WetlandClassifier, X: np.ndarray, chunk_rows: int) -> tuple[np.ndarray, np.ndarray]:
    """(n, F, K_present) contributions and (K_present,) base value on the probability scale."""
    explainer = _rf_explainer(model)
    n, f = X.shape
    k = len(model.present_)
    out = np.empty((n, f, k), np.float32)
    for start in range(0, n, chunk_rows):
        stop = min(start + chunk_rows, n)
        out[start:stop] = _shap_layout(explainer.shap_values(X[start:stop]), stop - start, k, f)
    return out, _expected_layout(explainer.expected_value, k)


def _output_scale(model: WetlandClassifier) -> str:
    if model.kind == "xgboost":
        return "margin"
    if model.kind == "random_forest":
        return "probability"
    raise ModelError(f"cannot explain model kind {model.kind!r}; expected 'xgboost' or 'random_forest'")


def shap_values(model: WetlandClassifier, X: pd.DataFrame | np.ndarray, *, features: list[str],
                chunk_rows: int = _DEFAULT_CHUNK_ROWS) -> xr.Dataset:
    """Exact TreeSHAP contributions per sample, feature and class, in the class scheme's order.

    Parameters
    ----------
    model : WetlandClassifier
        A fitted classifier (XGBoost or random forest).
    X : DataFrame or ndarray of shape (n, F)
        Rows to explain.  A DataFrame is read by column name; an array must
        hold the features in ``features`` order.
    features : list of str
        Feature names, in the order the model was trained on.
    chunk_rows : int
        Rows per TreeSHAP call; bounds the temporary memory beside the result.

    Returns
    -------
    xarray.Dataset
        ``values`` (sample, feature, class), float32, and ``base_value`` (class),
        with a boolean ``present`` coordinate on ``class``.  For XGBoost both are
        on the raw margin (log-odds) scale, so ``base_value + values.sum("feature")``
        equals ``predict(..., output_margin=True)``; for a random forest they are
        on the probability scale and sum to ``predict_proba``.
        ``attrs["output_scale"]`` is ``"margin"`` or ``"probability"``.
        Classes of the scheme absent from training get all-zero contributions;
        their base value is ``-inf`` for XGBoost (a class never modelled has
        zero probability, i.e. margin minus infinity) and ``0`` for a forest.

    Notes
    -----
    Computed in memory (the model needs whole rows); memory is about
    n x F x K x 4 bytes, see :func:`explain_budget`.

    References
    ----------
    Lundberg et al. (2020) From local explanations to global understanding with
    explainable AI for trees. Nature Machine Intelligence 2, 56-67.
    """
    scale = _output_scale(model)
    if chunk_rows < 1:
        raise ParameterError(f"chunk_rows must be a positive integer; got {chunk_rows!r}")
    Xm, sample = _as_matrix(X, features, model)
    vals, base = (_xgb_values if scale == "margin" else _rf_values)(model, Xm, chunk_rows)
    return _assemble(model, vals, base, sample, features, scale)


def _assemble(model: WetlandClassifier, vals: np.ndarray, base: np.ndarray, sample: np.ndarray,
              features: Sequence[str], scale: str) -> xr.Dataset:
    """Scatter present-class columns into scheme order (absent classes: zeros)."""
    idx = _scheme_index(model)
    k_all = len(_scheme(model))
    if len(idx) == k_all:
        full = vals
    else:
        full = np.zeros((*vals.shape[:-1], k_all), np.float32)
        full[..., idx] = vals
    full_base = np.full(k_all, -np.inf if scale == "margin" else 0.0)
    full_base[idx] = base
    present = np.isin(np.asarray(_scheme(model)), np.asarray(model.present_))
    coords = {"sample": sample, "feature": list(features), "class": list(_scheme(model)),
              "present": ("class", present)}
    attrs = {"output_scale": scale, "model_kind": model.kind, "method": "exact TreeSHAP (tree-path-dependent)",
             "reference": REFERENCE}
    return xr.Dataset({"values": (("sample", "feature", "class"), full), "base_value": (("class",), full_base)},
                      coords=coords, attrs=attrs)


# --------------------------------------------------------------------------- hierarchical models


def _is_hierarchical(model: Any) -> bool:
    from ..models.hierarchy import HierarchicalClassifier

    return isinstance(model, HierarchicalClassifier)


def model_levels(model: Any) -> dict[str, WetlandClassifier]:
    """The fitted classifiers of a hierarchical model by level name: ``"top"``, then each parent with a model.

    A parent with fewer than two children in training has no classifier (its priors are its conditional
    probabilities) and is left out.
    """
    if not hasattr(model, "top_model_"):
        raise ModelError("model_levels needs a fitted HierarchicalClassifier; call fit(X, y) first")
    levels = {"top": model.top_model_}
    levels |= {p: m for p, m in model.child_models_.items() if isinstance(m, WetlandClassifier)}
    return levels


def _background(Xm: np.ndarray, background: Any, features: Sequence[str], model: Any, n_background: int,
                seed: int) -> np.ndarray:
    if background is not None:
        return _as_matrix(background, features, model)[0]
    if n_background < 1:
        raise ParameterError(f"n_background must be a positive number of rows; got {n_background!r}")
    if Xm.shape[0] == 0:
        raise ParameterError("no rows to explain and no background given; pass rows, or background=")
    if Xm.shape[0] <= n_background:
        return Xm
    pick = np.sort(np.random.default_rng(seed).choice(Xm.shape[0], size=n_background, replace=False))
    return Xm[pick]


def combined_shap_values(model: Any, X: pd.DataFrame | np.ndarray, *, features: list[str],
                         background: pd.DataFrame | np.ndarray | None = None, n_background: int = 50,
                         method: str = "auto", n_permutations: int = 2, seed: int = 0) -> xr.Dataset:
    """SHAP values of the leaf probabilities of a whole hierarchical model (any model with ``predict_proba``).

    The explained function is ``predict_proba``: for a
    :class:`~wetlandflow.models.hierarchy.HierarchicalClassifier` the leaf probabilities
    ``P(parent) x P(leaf | parent)`` of the composed model, gate included.  A
    feature left out of a coalition takes the values of the background rows
    (the interventional, or marginal, value function of Lundberg & Lee 2017),
    and the model output is averaged over them.

    Parameters
    ----------
    model : fitted classifier with ``predict_proba`` and ``classes_`` (explained in its scheme order,
        ``scheme_``, when it has one)
    X : DataFrame or ndarray of shape (n, F)
        Rows to explain, read as in :func:`shap_values`.
    features : list of str
        Feature names in training order.
    background : DataFrame or ndarray, optional
        Rows that stand in for a missing feature (a sample of the training
        data).  Default: ``n_background`` rows of ``X`` drawn with ``seed``.
    n_background : int, default 50
        Background size when ``background`` is not given.  The cost grows
        linearly with it (every coalition is evaluated on every background row).
    method : {"auto", "exact", "permutation"}
        ``"exact"`` enumerates all 2^F coalitions (shap's ``ExactExplainer``):
        the exact Shapley values for this background.  ``"permutation"`` uses
        shap's ``PermutationExplainer``: the Shapley values estimated from
        ``n_permutations`` random feature orders (permutation sampling,
        Strumbelj & Kononenko 2014), each order walked forward and backward
        (shap's antithetic variant).  ``"auto"`` is exact up to
        :data:`EXACT_MAX_FEATURES` features, permutation above.
    n_permutations : int, default 2
        Permutations per row for ``"permutation"`` (each costs 2F + 1 model
        evaluations on the background); more gives less sampling noise.
    seed : int
        Seeds the background draw and the permutations (the global NumPy
        random state that shap uses is restored afterwards).

    Returns
    -------
    xarray.Dataset
        As :func:`shap_values`: ``values`` (sample, feature, class) and
        ``base_value`` (class), with ``present`` on ``class``, in the model's
        class order; ``attrs["output_scale"]`` is ``"probability"``.  Local
        accuracy holds for both methods (the permutation walk telescopes from
        the all-background output to the row's output):
        ``base_value + values.sum("feature")`` equals the scheme-order probabilities of ``X``, and
        ``base_value`` is the mean predicted probability over the background.

    Notes
    -----
    These values differ from TreeSHAP's even for a single tree model: TreeSHAP
    (tree-path-dependent) takes the expectation over the training data that
    reached each tree node, this function over the background rows; and
    permutation values are a sampled estimate (``attrs["method"]``), exact
    only in their sum.  Cost: about ``n x n_permutations x (2F + 1) x
    n_background`` rows through ``predict_proba`` (``2^F x n_background`` per
    row for the exact method).
    """
    try:
        import shap
    except ImportError as exc:  # pragma: no cover - shap is a declared dependency
        raise ModelError("combined SHAP values need the 'shap' package; pip install shap") from exc
    if method not in ("auto", "exact", "permutation"):
        raise ParameterError(f"method must be 'auto', 'exact' or 'permutation'; got {method!r}")
    if int(n_permutations) < 1:
        raise ParameterError(f"n_permutations must be a positive integer; got {n_permutations!r}")
    Xm, sample = _as_matrix(X, features, model)
    bg = _background(Xm, background, features, model, n_background, seed)
    f = len(features)
    chosen = ("exact" if f <= EXACT_MAX_FEATURES else "permutation") if method == "auto" else method
    classes = [str(c) for c in _scheme(model)]
    k = len(classes)

    def leaf_proba(Z: np.ndarray) -> np.ndarray:
        return np.asarray(scheme_proba(model, np.asarray(Z, dtype=np.float32)), dtype=np.float64)

    masker = shap.maskers.Independent(bg, max_samples=len(bg))
    state = np.random.get_state()  # noqa: NPY002 - shap seeds and draws from NumPy's global generator
    try:
        if chosen == "exact":
            explainer = shap.explainers.Exact(leaf_proba, masker)
            kwargs: dict[str, Any] = {"max_evals": max(2 ** f, 2)}
        else:
            explainer = shap.explainers.Permutation(leaf_proba, masker, seed=int(seed))
            kwargs = {"max_evals": int(n_permutations) * (2 * f + 1)}
        if Xm.shape[0]:
            exp = explainer(Xm, silent=True, **kwargs)
            vals = np.asarray(exp.values, dtype=np.float64).reshape(Xm.shape[0], f, k)
            base = np.asarray(exp.base_values, dtype=np.float64).reshape(Xm.shape[0], k)[0]
        else:
            vals, base = np.zeros((0, f, k)), leaf_proba(bg).mean(axis=0)
    finally:
        np.random.set_state(state)  # noqa: NPY002 - leave the caller's global generator as it was
    present = (np.isin(classes, model.present_leaves()) if hasattr(model, "present_leaves")
               else np.isin(classes, [str(c) for c in getattr(model, "present_", classes)]))
    how = ("exact Shapley values, all 2^F coalitions (shap ExactExplainer)" if chosen == "exact" else
           f"permutation estimate, {int(n_permutations)} antithetic permutation(s) per row (shap "
           "PermutationExplainer)")
    attrs = {"output_scale": "probability", "level": "combined",
             "model_kind": f"hierarchical ({(model.base_params or {}).get('kind', 'xgboost')})"
             if _is_hierarchical(model) else str(getattr(model, "kind", type(model).__name__)),
             "method": f"{how} of predict_proba, interventional value function over {len(bg)} background "
                       "rows",
             "explainer": chosen, "n_background": int(len(bg)), "n_permutations": int(n_permutations)
             if chosen == "permutation" else 0, "seed": int(seed), "reference": COMBINED_REFERENCE}
    return xr.Dataset({"values": (("sample", "feature", "class"), vals.astype(np.float32)),
                       "base_value": (("class",), base)},
                      coords={"sample": sample, "feature": list(features), "class": classes,
                              "present": ("class", present)}, attrs=attrs)


def hierarchical_shap_values(model: Any, X: pd.DataFrame | np.ndarray, *, features: list[str],
                             combined: bool = True, background: pd.DataFrame | np.ndarray | None = None,
                             n_background: int = 50, method: str = "auto", n_permutations: int = 2,
                             seed: int = 0, chunk_rows: int = _DEFAULT_CHUNK_ROWS) -> dict[str, xr.Dataset]:
    """SHAP values of a hierarchical model, per level and combined.

    Parameters
    ----------
    model : HierarchicalClassifier
        Fitted.
    X, features, chunk_rows
        As for :func:`shap_values`.
    combined : bool, default True
        Also compute the combined values (:func:`combined_shap_values`, the
        costly part); ``background``, ``n_background``, ``method``,
        ``n_permutations`` and ``seed`` are passed to it.

    Returns
    -------
    dict of str to xarray.Dataset
        ``"top"`` and one entry per parent with a fitted model: exact TreeSHAP
        of that level's :class:`~wetlandflow.models.classifier.WetlandClassifier`
        (:func:`shap_values`: classes are the level's classes, e.g. upland,
        open_water, wetland for the top level, the parent's children for a
        child model, on that level's margin scale for XGBoost or probability
        scale for a forest; a child model explains ``P(leaf | parent)`` and was
        trained on the parent's rows only, but is evaluated here on every row).
        ``"combined"``: the leaf probabilities of the whole model, on the
        probability scale, an exact or sampled Shapley estimate against a
        background (see :func:`combined_shap_values`).  Each dataset has
        ``attrs["level"]``.
    """
    if not _is_hierarchical(model):
        raise ModelError(f"hierarchical_shap_values needs a HierarchicalClassifier; got "
                         f"{type(model).__name__}. Explain a flat WetlandClassifier with shap_values")
    out = {}
    for name, level in model_levels(model).items():
        sv = shap_values(level, X, features=features, chunk_rows=chunk_rows)
        sv.attrs["level"] = name
        out[name] = sv
    if combined:
        out["combined"] = combined_shap_values(model, X, features=features, background=background,
                                               n_background=n_background, method=method,
                                               n_permutations=n_permutations, seed=seed)
    return out


def model_shap_values(model: Any, X: pd.DataFrame | np.ndarray, *, features: list[str],
                      **combined_options: Any) -> xr.Dataset:
    """SHAP values per class of the model's own output: :func:`shap_values` for a flat classifier,
    :func:`combined_shap_values` (options passed on) for a hierarchical one."""
    if _is_hierarchical(model):
        return combined_shap_values(model, X, features=features, **combined_options)
    return shap_values(model, X, features=features)


# --------------------------------------------------------------------------- budget and interactions


def explain_budget(model: WetlandClassifier, n_rows: int, *, interactions: bool = False,
                   memory_budget_mb: float = 2000.0) -> dict[str, Any]:
    """Estimate the memory of an explanation before computing it.

    Parameters
    ----------
    model : WetlandClassifier
        The fitted classifier.
    n_rows : int
        Rows to explain.
    interactions : bool
        Estimate SHAP interaction values (n x F x F x K) instead of SHAP values (n x F x K).
    memory_budget_mb : float
        The budget to compare with.

    Returns
    -------
    dict
        ``n_rows, n_features, n_classes, interactions, bytes, mb, budget_mb, fits``
        and ``chunk_rows``: rows per chunk so that one chunk's temporary buffer
        uses at most a tenth of the budget.  Estimates count float32 result
        cells (4 bytes each) only.
    """
    f, k = int(model.n_features_in_), len(_scheme(model))
    per_row = 4 * f * k * (f if interactions else 1)
    total = per_row * int(n_rows)
    mb = total / 2**20
    chunk = max(1, int(memory_budget_mb * 2**20 / 10 // max(per_row, 1)))
    return {"n_rows": int(n_rows), "n_features": f, "n_classes": k, "interactions": interactions,
            "bytes": total, "mb": mb, "budget_mb": float(memory_budget_mb), "fits": mb <= memory_budget_mb,
            "chunk_rows": min(chunk, max(int(n_rows), 1))}


def _interaction_chunk(model: WetlandClassifier, explainer: Any, X: np.ndarray) -> np.ndarray:
    """(n, F, F, K_present) interaction values for one chunk of rows."""
    n, f = X.shape
    k = len(model.present_)
    if model.kind == "xgboost":
        raw = np.asarray(_xgb_chunk(model.model_.get_booster(), X, pred_interactions=True))
        if raw.ndim == 3:  # one output: (n, F+1, F+1)
            raw = raw[:, None]
        if raw.shape != (n, k, f + 1, f + 1):
            raise ModelError(f"unexpected pred_interactions shape {raw.shape}; expected ({n}, {k}, {f + 1}, {f + 1})")
        return raw[:, :, :-1, :-1].transpose(0, 2, 3, 1)
    vals = explainer.shap_interaction_values(X)
    if isinstance(vals, list):
        vals = np.stack([np.asarray(v) for v in vals], axis=-1)
    vals = np.asarray(vals)
    return vals[..., None] if vals.ndim == 3 else vals


def shap_interactions(model: WetlandClassifier, X: pd.DataFrame | np.ndarray, *, features: list[str],
                      memory_budget_mb: float = 2000.0) -> xr.DataArray:
    """SHAP interaction values per sample, feature pair and class, computed in chunks of rows.

    Parameters
    ----------
    model, X, features
        As for :func:`shap_values`.
    memory_budget_mb : float
        Refuse (``BudgetError``) when the n x F x F x K float32 result would exceed it.

    Returns
    -------
    xarray.DataArray
        Dims ("sample", "feature", "feature_2", "class"); same scale as
        :func:`shap_values` (margin for XGBoost, probability for a forest);
        absent classes are zero.  The diagonal holds main effects.

    Raises
    ------
    BudgetError
        With the estimated size in MB and how to reduce it.
    """
    scale = _output_scale(model)
    Xm, sample = _as_matrix(X, features, model)
    plan = explain_budget(model, Xm.shape[0], interactions=True, memory_budget_mb=memory_budget_mb)
    if not plan["fits"]:
        raise BudgetError(
            f"SHAP interaction values for {plan['n_rows']} rows x {plan['n_features']}^2 features x "
            f"{plan['n_classes']} classes need an estimated {plan['mb']:.0f} MB, over the budget of "
            f"{memory_budget_mb:.0f} MB; explain fewer rows (stratified_subsample) or raise memory_budget_mb")
    explainer = _rf_explainer(model) if scale == "probability" else None
    n, f = Xm.shape
    vals = np.empty((n, f, f, len(model.present_)), np.float32)
    for start in range(0, n, plan["chunk_rows"]):
        stop = min(start + plan["chunk_rows"], n)
        vals[start:stop] = _interaction_chunk(model, explainer, Xm[start:stop])
    full = np.zeros((n, f, f, len(_scheme(model))), np.float32)
    full[..., _scheme_index(model)] = vals
    return xr.DataArray(full, dims=("sample", "feature", "feature_2", "class"), name="shap_interactions",
                        coords={"sample": sample, "feature": list(features), "feature_2": list(features),
                                "class": list(_scheme(model))},
                        attrs={"output_scale": scale, "method": "exact TreeSHAP interaction values",
                               "reference": REFERENCE})


# --------------------------------------------------------------------------- subsampling


def _equal_allocation(sizes: np.ndarray, n: int) -> np.ndarray:
    """Split ``n`` as equally as the group sizes allow (water-filling; small groups taken whole)."""
    sizes = np.asarray(sizes, dtype=np.int64)
    alloc = np.zeros_like(sizes)
    remaining = int(min(n, sizes.sum()))
    order = np.argsort(sizes, kind="stable")
    for j, i in enumerate(order):  # a loop over strata, not pixels
        alloc[i] = min(sizes[i], remaining // (len(sizes) - j))
        remaining -= alloc[i]
    return alloc


def _allocate(frame: pd.DataFrame, by: Sequence[str], n: int, rng: np.random.Generator) -> list[np.ndarray]:
    """Recursive equal allocation over the levels of ``by``; returns chosen row positions."""
    if not by:
        pos = frame["_pos"].to_numpy()
        return [np.sort(rng.choice(pos, size=n, replace=False))] if n < len(pos) else [pos]
    groups = [g for _, g in frame.groupby(by[0], sort=True)]
    alloc = _equal_allocation(np.array([len(g) for g in groups]), n)
    picked: list[np.ndarray] = []
    for g, m in zip(groups, alloc, strict=True):
        if m:
            picked += _allocate(g, by[1:], int(m), rng)
    return picked


def stratified_subsample(samples: pd.DataFrame, *, n: int, seed: int, by: Sequence[str] = ("class", "block"),
                         block_size_m: float = 1000.0) -> pd.DataFrame:
    """Spatially stratified subsample for explanation: equal shares per class, then per block.

    Parameters
    ----------
    samples : DataFrame
        Needs the columns named in ``by``; a ``block`` level missing from the
        table is made from ``x`` and ``y`` with :func:`wetlandflow.validation.splitters.block_ids`.
    n : int
        Rows wanted (all rows are returned when the table is smaller).
    seed : int
        Seed of the random choice within strata.
    by : sequence of str
        Stratification levels, outermost first.  ``n`` is split as equally as
        the strata sizes allow at each level (small strata are taken whole and
        their remainder goes to the others), so rare classes and sparsely
        sampled blocks are represented.
    block_size_m : float
        Side of the square blocks in metres.

    Returns
    -------
    DataFrame
        The chosen rows in their original order, with a ``block`` column when one was made.
    """
    if n < 1:
        raise ParameterError(f"n must be a positive number of rows; got {n!r}")
    frame = samples.copy()
    if "block" in by and "block" not in frame.columns:
        from ..validation.splitters import block_ids

        frame["block"] = block_ids(frame["x"].to_numpy(), frame["y"].to_numpy(), block_size_m)
    missing = [c for c in by if c not in frame.columns]
    if missing:
        raise ParameterError(f"stratification column(s) {missing} not in samples; available: {list(frame.columns)}")
    frame["_pos"] = np.arange(len(frame))
    picked = _allocate(frame, list(by), int(n), np.random.default_rng(seed))
    pos = np.sort(np.concatenate(picked)) if picked else np.zeros(0, np.int64)
    return frame.drop(columns="_pos").iloc[pos]


# --------------------------------------------------------------------------- summaries


def _values(sv: xr.Dataset | xr.DataArray) -> xr.DataArray:
    da = sv["values"] if isinstance(sv, xr.Dataset) else sv
    if set(da.dims) != {"sample", "feature", "class"}:
        raise ParameterError(f"expected SHAP values with dims ('sample', 'feature', 'class'); got {da.dims}")
    return da


def global_importance(sv: xr.Dataset | xr.DataArray) -> pd.DataFrame:
    """Mean |SHAP| per feature and class, plus ``overall`` (the mean over classes, each class weighted equally).

    Rows are features, sorted by ``overall`` (largest first).
    """
    mean_abs = np.abs(_values(sv)).mean("sample").transpose("feature", "class")
    table = pd.DataFrame(mean_abs.values, index=pd.Index(mean_abs["feature"].values, name="feature"),
                         columns=list(mean_abs["class"].values))
    table["overall"] = table.mean(axis=1)
    return table.sort_values("overall", ascending=False)


def _grouped_importance(sv: xr.Dataset | xr.DataArray, groups: Mapping[str, Any], label: str) -> pd.DataFrame:
    da = _values(sv)
    feats = [str(f) for f in da["feature"].values]
    missing = [f for f in feats if f not in groups]
    if missing:
        raise ParameterError(f"no {label} given for feature(s) {missing[:8]}; the mapping must cover every "
                             f"feature explained ({len(feats)}), e.g. {{'{missing[0]}': ...}}")
    key = xr.DataArray([groups[f] for f in feats], dims="feature", name=label)
    per = np.abs(da).groupby(key).sum("feature").mean("sample")  # sum of |SHAP| within group, mean over samples
    table = per.to_dataframe(name="mean_abs_shap").reset_index()[[label, "class", "mean_abs_shap"]]
    totals = table.groupby("class")["mean_abs_shap"].transform("sum")
    table["share"] = np.where(totals > 0, table["mean_abs_shap"] / totals.where(totals > 0, 1.0), 0.0)
    return table


def domain_importance(sv: xr.Dataset | xr.DataArray, domains: Mapping[str, str]) -> pd.DataFrame:
    """Sum of |SHAP| per domain (optical, sar, terrain, ...) and class, and each domain's share per class.

    Returns a long table with columns ``domain, class, mean_abs_shap, share``
    (``mean_abs_shap`` is the mean over samples of the domain's summed |SHAP|;
    shares sum to one within a class with any non-zero contribution).
    """
    return _grouped_importance(sv, domains, "domain")


def cluster_importance(sv: xr.Dataset | xr.DataArray, corr_clusters: Mapping[str, Any]) -> pd.DataFrame:
    """Sum of |SHAP| per correlation cluster and class, with shares.

    Columns ``cluster, class, mean_abs_shap, share``; ``attrs["note"]`` holds
    :data:`CLUSTER_NOTE` (correlated predictors share credit unpredictably).
    """
    table = _grouped_importance(sv, corr_clusters, "cluster")
    table.attrs["note"] = CLUSTER_NOTE
    return table


def ranking_stability(fit_fn: Callable[[Any, Any, int], WetlandClassifier], X: pd.DataFrame, y: Any,
                      seeds: Sequence[int], *, explain: Callable[..., xr.Dataset] | None = None,
                      known: Mapping[int, pd.Series] | None = None) -> pd.DataFrame:
    """Spearman rank correlation of overall importance rankings between models fitted with different seeds.

    Parameters
    ----------
    fit_fn : callable
        ``fit_fn(X, y, seed)`` returns a fitted WetlandClassifier.
    X : DataFrame
        Training features (column names are the feature names); also the rows explained.
    y : array-like
        Labels.
    seeds : sequence of int
        At least two seeds.
    explain : callable, optional
        ``explain(model, X, features=...)`` returning SHAP values as :func:`shap_values`
        does; default :func:`shap_values` (e.g. :func:`model_shap_values` for hierarchical models).
    known : mapping of int to Series, optional
        Overall importance (the ``"overall"`` column of :func:`global_importance`) already computed for
        some seeds, e.g. the final model's; those seeds are neither refitted nor explained again.

    Returns
    -------
    DataFrame
        Seeds x seeds matrix of Spearman's rho; ``attrs["mean_rho"]`` is the mean off-diagonal value.
    """
    from scipy.stats import spearmanr

    if len(seeds) < 2:
        raise ParameterError(f"ranking_stability needs at least two seeds; got {list(seeds)}")
    features = [str(c) for c in X.columns]
    explain = explain or shap_values
    known = dict(known or {})
    imp = pd.DataFrame({s: known[s] if s in known else
                        global_importance(explain(fit_fn(X, y, s), X, features=features))["overall"]
                        for s in seeds}).loc[features]
    stat = spearmanr(imp.to_numpy()).statistic
    # two seeds: scipy returns the single coefficient, not the 2 x 2 matrix
    rho = np.array([[1.0, stat], [stat, 1.0]]) if np.ndim(stat) == 0 else np.asarray(stat)
    out = pd.DataFrame(rho, index=pd.Index(list(seeds), name="seed"), columns=list(seeds))
    off = rho[~np.eye(len(seeds), dtype=bool)]
    out.attrs["mean_rho"] = float(np.nanmean(off))
    return out


# --------------------------------------------------------------------------- maps


def _window_matrix(cube: xr.Dataset, features: list[str], window: tuple[slice, slice]
                   ) -> tuple[xr.DataArray, np.ndarray, np.ndarray]:
    """The window as (feature, y, x), its rows as (n, F) and the mask of pixels with any finite feature."""
    rows, cols = window
    missing = [f for f in features if f not in cube.data_vars]
    if missing:
        raise ModelError(f"the cube lacks feature(s) {missing[:8]}; rebuild it with the model's features")
    block = cube[features].isel(y=rows, x=cols).to_dataarray("feature").transpose("feature", "y", "x")
    arr = np.asarray(block.values, dtype=np.float32)
    X = arr.reshape(len(features), -1).T
    return block, X, np.isfinite(X).any(axis=1)


def _map_domain(cube: xr.Dataset, feature: str | None, domain: str | None) -> str:
    if domain is not None:
        return domain if domain in DOMAINS else "user"
    d = cube[feature].attrs.get("domain", "user") if feature is not None else "user"
    return d if d in DOMAINS else "user"


def window_contributions(model: WetlandClassifier, cube: xr.Dataset, features: list[str], *,
                         window: tuple[slice, slice]) -> xr.DataArray:
    """SHAP contributions of every feature to every class for each pixel of a grid window.

    Parameters
    ----------
    model : WetlandClassifier
    cube : xarray.Dataset
        Feature cube, one (y, x) variable per feature.
    features : list of str
        The model's features in training order.
    window : (slice, slice)
        Row and column index slices of the grid (like a raster window).

    Returns
    -------
    xarray.DataArray
        (feature, class, y, x), float32, NaN where every feature is missing;
        same scale as :func:`shap_values` (``attrs["output_scale"]``).  Maps of
        several features, domains or classes are slices of this one
        computation (:func:`contribution_map`).

    Notes
    -----
    Computed in memory for the window (the model needs whole pixels); choose
    the window size with :func:`explain_budget`.
    """
    block, X, ok = _window_matrix(cube, features, window)
    k = len(_scheme(model))
    contrib = np.full((X.shape[0], len(features), k), np.nan, np.float32)
    if ok.any():
        contrib[ok] = shap_values(model, X[ok], features=features)["values"].values
    ny, nx = block.sizes["y"], block.sizes["x"]
    out = xr.DataArray(contrib.transpose(1, 2, 0).reshape(len(features), k, ny, nx),
                       dims=("feature", "class", "y", "x"),
                       coords={"feature": list(features), "class": [str(c) for c in _scheme(model)],
                               "y": block["y"].values, "x": block["x"].values})
    out.attrs["output_scale"] = _output_scale(model)
    return out


def contribution_map(contrib: xr.DataArray, cube: xr.Dataset, class_name: str, *, feature: str | None = None,
                     domain: str | None = None, domains: Mapping[str, str] | None = None) -> xr.DataArray:
    """One feature's (or one domain's summed) contribution to one class, from :func:`window_contributions`."""
    if (feature is None) == (domain is None):
        raise ParameterError("give exactly one of feature= or domain= (with domains=)")
    classes = [str(c) for c in contrib["class"].values]
    if class_name not in classes:
        raise ParameterError(f"class_name {class_name!r} is not in the scheme {classes}")
    features = [str(f) for f in contrib["feature"].values]
    if domain is not None:
        chosen = [f for f in features if (domains or {}).get(f) == domain]
        if not chosen:
            raise ParameterError(f"no feature maps to domain {domain!r}; domains= must map features to domains")
    else:
        if feature not in features:
            raise ParameterError(f"feature {feature!r} is not one of the model's features {features[:8]}...")
        chosen = [feature]
    part = contrib.sel(feature=chosen, **{"class": class_name})
    out = part.sum("feature", min_count=1).drop_vars("class")
    scale = contrib.attrs.get("output_scale", "margin")
    what = feature if feature is not None else f"{domain} domain"
    out = with_attrs(out, f"shap_{feature or domain}_{class_name}",
                     long_name=f"SHAP contribution of {what} to {class_name}",
                     units="log-odds" if scale == "margin" else "probability",
                     domain=_map_domain(cube, feature, domain), method="exact TreeSHAP (tree-path-dependent)",
                     reference=REFERENCE, parameters={"class": class_name, "features": chosen,
                                                      "output_scale": scale})
    return _copy_crs(cube, out)


def shap_map(model: WetlandClassifier, cube: xr.Dataset, features: list[str], class_name: str, *,
             window: tuple[slice, slice], feature: str | None = None, domain: str | None = None,
             domains: Mapping[str, str] | None = None) -> xr.DataArray:
    """Per-pixel SHAP contribution of one feature (or a domain's features summed) to one class.

    Parameters
    ----------
    model, cube, features, window
        See :func:`window_contributions`.
    class_name : str
        Class of the scheme to explain.
    feature : str, optional
        The feature to map; or give ``domain`` and ``domains`` to sum a domain.
    domain : str, optional
        Domain whose features' contributions are summed.
    domains : dict, optional
        Feature -> domain mapping used with ``domain``.

    Returns
    -------
    xarray.DataArray
        (y, x) on the window's coordinates, NaN where every feature is missing;
        the cube's CRS is written when it has one.  Same scale as
        :func:`shap_values` (see ``attrs["units"]``).  For several maps of one
        window, compute :func:`window_contributions` once and slice it with
        :func:`contribution_map`.
    """
    if (feature is None) == (domain is None):
        raise ParameterError("give exactly one of feature= or domain= (with domains=) to shap_map")
    if class_name not in list(_scheme(model)):
        raise ParameterError(f"class_name {class_name!r} is not in the scheme {list(_scheme(model))}")
    if feature is not None and feature not in features:
        raise ParameterError(f"feature {feature!r} is not one of the model's features {features[:8]}...")
    contrib = window_contributions(model, cube, features, window=window)
    return contribution_map(contrib, cube, class_name, feature=feature, domain=domain, domains=domains)


def _copy_crs(cube: xr.Dataset, out: xr.DataArray) -> xr.DataArray:
    try:
        import rioxarray  # noqa: F401  (registers the .rio accessor)
    except ImportError:
        return out
    crs = cube.rio.crs
    return out.rio.write_crs(crs) if crs is not None else out


def write_shap_map(da: xr.DataArray, path: str | Path) -> Path:
    """Write a :func:`shap_map` result as a single-band float32 GeoTIFF (NaN = nodata), atomically."""
    try:
        import rioxarray  # noqa: F401
    except ImportError as exc:  # pragma: no cover
        raise ModelError("writing a SHAP map needs rioxarray; pip install rioxarray") from exc
    from ..inputs.io import atomic_path

    path = Path(path)
    with atomic_path(path) as tmp:
        da.astype(np.float32).rio.write_nodata(np.nan, encoded=False).rio.to_raster(tmp, driver="GTiff")
    return path
