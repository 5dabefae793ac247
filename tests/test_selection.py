"""Forward selection and recursive elimination under grouped / spatial CV."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure
from sklearn.model_selection import GroupKFold, cross_val_score

from wetlandflow.errors import ParameterError
from wetlandflow.models import WetlandClassifier
from wetlandflow.selection import forward_feature_selection, recursive_elimination, write_selection
from wetlandflow.validation import SpatialBlockKFold

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
