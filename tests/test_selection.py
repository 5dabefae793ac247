"""Forward selection and recursive elimination under grouped / spatial CV."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from sklearn.model_selection import GroupKFold, cross_val_score

from wetlandflow.errors import ModelError, ParameterError
from wetlandflow.models.classifier import WetlandClassifier
from wetlandflow.models.selection import (
    forward_feature_selection,
    forward_selection_within_folds,
    importance_ranking,
    read_selected_features,
    recursive_elimination,
    write_selection,
)
from wetlandflow.validation.splitters import SpatialBlockKFold

INFORMATIVE = ["f1", "f2"]
NOISE = ["pixel_noise", "plot_noise_a", "plot_noise_b"]


def data(n_plots=60, per_plot=6, seed=1):
    """Labels from f1 and f2 (both needed); noise per pixel and noise constant within a plot.

    The plot-level noise identifies plots, which a random split would reward; grouped CV must not.
    """
    rng = np.random.default_rng(seed)
    groups = np.repeat(np.arange(n_plots), per_plot)
    n = groups.size
    a, b = rng.normal(size=n_plots)[groups], rng.normal(size=n_plots)[groups]
    y = np.where(a > 0.3, "bog", np.where(b > 0, "fen", "marsh"))
    X = pd.DataFrame({
        "f1": a + rng.normal(0, 0.15, n), "pixel_noise": rng.normal(size=n),
        "f2": b + rng.normal(0, 0.15, n),
        "plot_noise_a": rng.normal(size=n_plots)[groups] + rng.normal(0, 0.05, n),
        "plot_noise_b": rng.normal(size=n_plots)[groups] + rng.normal(0, 0.05, n),
    })
    xy = rng.uniform(0, 4000, (n_plots, 2))[groups] + rng.normal(0, 15, (n, 2))
    return X, y, groups, xy


def clf():
    return WetlandClassifier(classes=("marsh", "fen", "bog"), n_estimators=30, max_depth=3, n_threads=1)


@pytest.fixture(scope="module")
def forward():
    X, y, groups, _ = data()
    return forward_feature_selection(clf(), X, y, groups, GroupKFold(4), tol=0.01), (X, y, groups)


@pytest.mark.reference
def test_forward_selection_drops_noise_and_keeps_the_score(forward):
    """Scores checked against scikit-learn's cross_val_score on the same GroupKFold folds."""
    res, (X, y, groups) = forward
    assert set(res.selected) == set(INFORMATIVE)
    assert not set(res.selected) & set(NOISE)
    cv = GroupKFold(4)
    sel = cross_val_score(clf(), X[res.selected].to_numpy(), y, groups=groups, cv=cv).mean()
    full = cross_val_score(clf(), X.to_numpy(), y, groups=groups, cv=cv).mean()
    assert sel >= full - 0.02
    # The recorded score is the grouped-CV score (sklearn), so the groups were honoured.
    last = res.history.iloc[-1]
    assert last["score"] == pytest.approx(sel, abs=1e-12)


def test_forward_history_and_candidates(forward):
    res, _ = forward
    h = res.history
    assert list(h.columns) == ["step", "n_features", "added", "removed", "score", "score_sd", "features"]
    assert h["n_features"].iloc[0] == 2
    assert (h["score"].diff().dropna() > 0.01).all()  # each accepted step gained more than tol
    assert (res.candidates["step"] == 0).sum() == 10  # all C(5, 2) starting pairs were scored
    fig = res.plot()
    assert isinstance(fig, Figure)


def test_screen_when_pairs_exceed_the_budget():
    X, y, groups, _ = data()
    res = forward_feature_selection(clf(), X, y, groups, GroupKFold(4), tol=0.01, max_pairs=1, max_features=2)
    cand = res.candidates
    assert (cand["n_features"] == 1).sum() == X.shape[1]  # single-feature screen ran
    assert (cand["step"] == 0).sum() == 1  # one pair: the top 2 singles
    assert len(res.selected) == 2 and not set(res.selected) & set(NOISE)


def test_recursive_elimination_under_spatial_blocks(tmp_path):
    X, y, groups, xy = data()
    cv = SpatialBlockKFold(4, block_size_m=800, random_state=0, coords=xy, on_class_missing="ignore")
    res = recursive_elimination(clf(), X, y, groups, cv, scoring="f1_macro", min_features=2, tol=0.01)
    h = res.history
    assert h["n_features"].tolist() == [5, 4, 3, 2]
    assert h["removed"].iloc[0] == "" and set(h["removed"].iloc[1:]) == set(NOISE)
    assert set(h["features"].iloc[-1].split(";")) == set(INFORMATIVE)
    assert not set(res.selected) & set(NOISE)
    out = write_selection(res, tmp_path)
    doc = json.loads(out["selected"].read_text())
    assert doc["selected"] == res.selected and doc["method"] == "recursive_elimination"
    back = pd.read_csv(out["history"], keep_default_na=False)
    np.testing.assert_allclose(back["score"], h["score"])


def test_bad_arguments_are_named():
    X, y, groups, _ = data(n_plots=10)
    with pytest.raises(ParameterError, match="scoring"):
        forward_feature_selection(clf(), X, y, groups, GroupKFold(2), scoring="auc")
    with pytest.raises(ParameterError, match="DataFrame"):
        forward_feature_selection(clf(), X.to_numpy(), y, groups, GroupKFold(2))


def test_selection_within_folds_never_sees_the_held_out_fold():
    """Scrambling the features and labels of fold k leaves fold k's selection unchanged
    (it is made from the other folds only), while the other folds' selections may move."""
    X, y, groups, _ = data()
    X = X[["f1", "pixel_noise", "f2"]]
    folds = groups % 4
    opts = {"tol": 0.01}
    base = forward_selection_within_folds(clf(), X, y, folds, **opts)
    assert sorted(base) == [0, 1, 2, 3]
    rng = np.random.default_rng(5)
    held = folds == 0
    X2, y2 = X.copy(), y.copy()
    X2.loc[held, :] = rng.normal(size=(held.sum(), X.shape[1]))
    y2[held] = rng.permutation(y[held])
    moved = forward_selection_within_folds(clf(), X2, y2, folds, **opts)
    assert moved[0].selected == base[0].selected
    pd.testing.assert_frame_equal(moved[0].history, base[0].history)
    assert any(not moved[k].history.equals(base[k].history) for k in (1, 2, 3))  # the scramble did reach them
    for r in base.values():
        assert set(r.selected) == set(INFORMATIVE)


def test_importance_pool_screens_before_the_search():
    X, y, groups, _ = data()
    rank = importance_ranking(clf(), X, y)
    assert set(rank.index[:2]) == set(INFORMATIVE) and rank.is_monotonic_decreasing
    res = forward_feature_selection(clf(), X, y, groups, GroupKFold(4), pool=3, tol=0.01)
    assert set(res.pool) == set(rank.index[:3]) and len(res.pool) == 3
    assert set(res.candidates["features"].str.split(";").explode()) <= set(res.pool)
    with pytest.raises(ParameterError, match="pool"):
        forward_feature_selection(clf(), X, y, groups, GroupKFold(4), pool=1)


def test_selected_features_text_round_trip(forward, tmp_path):
    res, _ = forward
    out = write_selection(res, tmp_path)
    assert out["text"].read_text().splitlines() == res.selected
    assert read_selected_features(out["text"]) == res.selected
    (tmp_path / "empty.txt").write_text("# nothing\n\n")
    with pytest.raises(ModelError, match="no feature names"):
        read_selected_features(tmp_path / "empty.txt")
    two_folds = pd.DataFrame({"a": [0.0] * 4, "b": [1.0] * 4})
    with pytest.raises(ParameterError, match="at least 3 folds"):
        forward_selection_within_folds(clf(), two_folds, ["fen"] * 4, np.array([0, 0, 1, 1]))
