"""Two-level classifier: chain rule, gate bound, scikit-learn compatibility."""

from __future__ import annotations

import copy

import numpy as np
import pandas as pd
import pytest
from sklearn.base import clone
from sklearn.model_selection import GroupKFold, cross_val_predict

from wetlandflow.errors import ModelError
from wetlandflow.models.hierarchy import HierarchicalClassifier
from wetlandflow.validation.splitters import SpatialBlockKFold

CLASSES = ("upland", "open_water", "marsh", "swamp", "fen", "bog")
PARENTS = {"wetland": ("marsh", "swamp", "fen", "bog")}
BASE = {"kind": "xgboost", "n_estimators": 30, "max_depth": 3, "n_threads": 1}


def data(n_plots=60, per_plot=8, seed=0):
    """Plots of one class each; f0 separates the top level, f1 the wetland classes."""
    rng = np.random.default_rng(seed)
    plot_class = rng.choice(CLASSES, n_plots)
    y = np.repeat(plot_class, per_plot)
    groups = np.repeat(np.arange(n_plots), per_plot)
    top = {"upland": 0.0, "open_water": 3.0}
    f0 = np.array([top.get(c, 6.0) for c in y]) + rng.normal(0, 0.6, y.size)
    sub = {"marsh": 0.0, "swamp": 2.0, "fen": 4.0, "bog": 6.0}
    f1 = np.array([sub.get(c, 3.0) for c in y]) + rng.normal(0, 0.8, y.size)
    xy = rng.uniform(0, 5000, (n_plots, 2))[groups] + rng.normal(0, 20, (y.size, 2))
    X = pd.DataFrame({"f0": f0, "f1": f1, "noise": rng.normal(size=y.size)})
    return X, y, groups, xy


def model(gate=0.0):
    return HierarchicalClassifier(CLASSES, PARENTS, base_params=BASE, gate_threshold=gate)


@pytest.fixture(scope="module")
def fitted():
    X, y, _, _ = data()
    return model().fit(X, y), X, y


@pytest.mark.reference
def test_leaf_probabilities_follow_the_chain_rule(fitted):
    """Closed form (definition of conditional probability): P(leaf) = P(parent) P(leaf | parent);
    law of total probability: the leaves of a group sum to the group's top-level probability."""
    m, X, _ = fitted
    levels = m.predict_proba_levels(X)
    leaf, top, cond = levels["leaf"], levels["top"], levels["wetland"]
    assert list(leaf.columns) == list(CLASSES)
    assert list(top.columns) == ["upland", "open_water", "wetland"]
    np.testing.assert_allclose(leaf.sum(axis=1), 1.0, atol=1e-6)
    np.testing.assert_allclose(leaf[list(PARENTS["wetland"])].to_numpy(),
                               top[["wetland"]].to_numpy() * cond.to_numpy(), atol=1e-12)
    np.testing.assert_allclose(leaf[list(PARENTS["wetland"])].sum(axis=1), top["wetland"], atol=1e-12)
    np.testing.assert_allclose(leaf[["upland", "open_water"]], top[["upland", "open_water"]], atol=1e-12)
    np.testing.assert_array_equal(m.predict_scheme_proba(X), leaf.to_numpy())
    # scikit-learn's contract: predict_proba follows the sorted classes_, the same numbers by name
    assert list(m.classes_) == sorted(CLASSES) and list(m.scheme_) == list(CLASSES)
    np.testing.assert_array_equal(m.predict_proba(X), leaf[list(m.classes_)].to_numpy())
    assert leaf.index.equals(X.index)


def test_child_model_sees_only_its_parents_samples(fitted):
    m, X, y = fitted
    child = m.child_models_["wetland"]
    assert list(child.scheme_) == list(PARENTS["wetland"])
    wet = np.isin(y, PARENTS["wetland"])
    np.testing.assert_allclose(m.priors_["wetland"],
                               [np.mean(y[wet] == c) for c in PARENTS["wetland"]])
    assert (m.predict(X) == y).mean() > 0.8


@pytest.mark.reference
def test_gate_error_is_bounded_by_the_parent_probability():
    """Analytic bound (derived in the class Notes; follows from the law of total probability, no external
    source needed): |P_gated - P_full| <= P(parent) <= threshold."""
    X, y, _, _ = data()
    threshold = 0.3
    full = model(0.0).fit(X, y).predict_proba_levels(X)
    gated = model(threshold).fit(X, y).predict_proba_levels(X)
    p_parent = full["top"]["wetland"].to_numpy()
    closed = p_parent <= threshold
    assert closed.any() and (~closed).any()
    err = np.abs(gated["leaf"].to_numpy() - full["leaf"].to_numpy())
    assert (err[closed] <= p_parent[closed, None] + 1e-12).all()
    assert err.max() <= threshold + 1e-12
    assert err[closed].max() > 0  # the gate changed something, so the bound was exercised
    np.testing.assert_array_equal(err[~closed], 0.0)
    np.testing.assert_allclose(gated["leaf"].sum(axis=1), 1.0, atol=1e-6)


def test_works_in_cross_val_predict_with_groups():
    X, y, groups, xy = data()
    m = model()
    assert clone(m).get_params() == m.get_params()
    for cv in (GroupKFold(4), SpatialBlockKFold(4, block_size_m=1000, random_state=0, coords=xy,
                                                on_class_missing="ignore")):
        pred = cross_val_predict(m, X, y, groups=groups, cv=cv)
        assert set(pred) <= set(CLASSES)
        assert (pred == y).mean() > 0.7


def test_parent_with_one_child_in_training_uses_its_prior():
    X, y, _, _ = data()
    keep = ~np.isin(y, ["swamp", "fen", "bog"])
    m = model().fit(X[keep], y[keep])
    cond = m.predict_proba_levels(X)["wetland"]
    np.testing.assert_allclose(cond.to_numpy(), np.tile([1.0, 0, 0, 0], (len(X), 1)))
    np.testing.assert_allclose(m.predict_proba(X).sum(axis=1), 1.0, atol=1e-6)


def test_bad_tree_is_rejected_with_the_fix():
    X, y, _, _ = data()
    with pytest.raises(ModelError, match="not in the class scheme"):
        HierarchicalClassifier(CLASSES, {"wetland": ("marsh", "peatland")}, base_params=BASE).fit(X, y)
    with pytest.raises(ModelError, match="under two parents"):
        HierarchicalClassifier(CLASSES, {"a": ("marsh",), "b": ("marsh",)}, base_params=BASE).fit(X, y)
    with pytest.raises(ModelError, match="gate_threshold"):
        model(1.5).fit(X, y)


def gated_copy(m, gate):
    """The fitted model with another gate (the gate is read at predict time; the fit is shared)."""
    return copy.deepcopy(m).set_params(gate_threshold=gate)


def test_gate_zero_is_the_plain_chain_rule(fitted):
    """gate 0 (the default) runs the child model on every row: top x child, assembled here by hand."""
    m, X, _ = fitted
    Xa = X.to_numpy(np.float32)
    top = m.top_model_.predict_scheme_proba(Xa).astype(np.float64)
    top /= top.sum(axis=1, keepdims=True)
    child = m.child_models_["wetland"].predict_scheme_proba(Xa).astype(np.float64)
    child /= child.sum(axis=1, keepdims=True)
    wet = list(m.top_classes_).index("wetland")
    expected = np.zeros((len(X), len(CLASSES)))
    for k, c in enumerate(PARENTS["wetland"]):
        expected[:, CLASSES.index(c)] = top[:, wet] * child[:, k]
    for c in ("upland", "open_water"):
        expected[:, CLASSES.index(c)] = top[:, list(m.top_classes_).index(c)]
    np.testing.assert_allclose(m.predict_scheme_proba(X), expected, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(gated_copy(m, 0.0).predict_proba(X), m.predict_proba(X))


@pytest.mark.reference
@pytest.mark.parametrize("gate", [0.03, 0.1, 0.5])
def test_every_gate_keeps_rows_summing_to_one_within_the_bound(fitted, gate):
    """Analytic (law of total probability, no external source needed): the children of a parent sum to
    P(parent), so on a gated row each exact child probability is <= P(parent) <= gate, and so is the
    gated estimate; every child probability then moves by at most ``gate``, all other columns not at all."""
    m, X, _ = fitted
    full = m.predict_proba_levels(X)
    gated = gated_copy(m, gate).predict_scheme_proba(X)
    p_parent = full["top"]["wetland"].to_numpy()
    closed = p_parent <= gate
    assert closed.any()
    kids = [CLASSES.index(c) for c in PARENTS["wetland"]]
    exact = full["leaf"].to_numpy()
    assert (exact[closed][:, kids] <= p_parent[closed, None] + 1e-12).all()
    err = np.abs(gated - exact)
    assert err.max() <= gate + 1e-12
    assert err[closed].max() > 0  # priors differ from the child model there: the bound is exercised
    others = [i for i in range(len(CLASSES)) if i not in kids]
    np.testing.assert_array_equal(err[:, others], 0.0)
    np.testing.assert_allclose(gated.sum(axis=1), 1.0, atol=1e-9)
    np.testing.assert_allclose(gated[:, kids].sum(axis=1), p_parent, atol=1e-12)


class CountingModel:
    """Wraps a child model and keeps every matrix it is asked to predict."""

    def __init__(self, inner):
        self.inner = inner
        self.calls: list[np.ndarray] = []

    def predict_scheme_proba(self, X):
        self.calls.append(np.array(X, copy=True))
        return self.inner.predict_scheme_proba(X)


def test_child_model_runs_only_on_open_rows(fitted):
    m, X, _ = fitted
    gate = 0.05
    g = gated_copy(m, gate)
    spy = CountingModel(g.child_models_["wetland"])
    g.child_models_["wetland"] = spy
    p_parent = g.predict_proba_levels(X)["top"]["wetland"].to_numpy()
    opened = p_parent > gate
    assert opened.any() and (~opened).any()
    assert len(spy.calls) == 1
    np.testing.assert_array_equal(spy.calls[0], X.to_numpy(np.float32)[opened])
    spy.calls.clear()
    g.predict_proba(X[~opened])  # every row closed: the child model is never asked
    assert spy.calls == []


def test_gate_is_checked_again_at_predict_time(fitted):
    m, X, _ = fitted
    for bad in (1.0, -0.1, "0.1"):
        with pytest.raises(ModelError, match=r"gate_threshold.*\[0, 1\)"):
            gated_copy(m, bad).predict_proba(X)
