"""Suspect training labels: the consensus and majority filters of Brodley & Friedl (1999).

Outside checks: open datasets shipped with scikit-learn (the wine data of Forina et al., UCI Machine
Learning Repository; Fisher's iris data), with a known 10 % of labels flipped at random, and the paper's
findings (Brodley & Friedl 1999, "Identifying mislabeled training data", JAIR 11, 131-167, arXiv:1106.0219,
sections 3-4): consensus filters are conservative (they flag a subset of what majority filters flag and
throw away less good data), majority filters find more of the bad data.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_iris, load_wine
from sklearn.model_selection import KFold
from sklearn.tree import DecisionTreeClassifier

from wetlandflow.errors import ParameterError
from wetlandflow.validation.suspects import default_filters, label_filter


def _noisy(loader, seed):
    X, y = loader(return_X_y=True)
    y = y.astype(str)
    rng = np.random.default_rng(seed)
    flip = rng.choice(len(y), size=len(y) // 10, replace=False)
    noisy = y.copy()
    classes = np.unique(y)
    for i in flip:
        noisy[i] = rng.choice([c for c in classes if c != y[i]])
    folds = np.empty(len(y), int)
    for f, (_, test) in enumerate(KFold(5, shuffle=True, random_state=seed).split(X)):
        folds[test] = f
    return X, noisy, folds, classes, set(flip.tolist())


@pytest.mark.reference
@pytest.mark.parametrize("loader", [load_wine, load_iris])
def test_consensus_is_conservative_and_majority_finds_more(loader):
    # Brodley & Friedl (1999): three filters of different bias (a decision tree, nearest neighbours, a
    # linear classifier) over m-fold cross-validation.
    filters = {**default_filters(), "tree": DecisionTreeClassifier(random_state=0)}
    for seed in range(2):
        X, noisy, folds, classes, flipped = _noisy(loader, seed)
        ids = np.arange(len(noisy))
        found = {}
        for rule in ("consensus", "majority"):
            t = label_filter(X, noisy, ids, folds, classes, filters=filters, rule=rule)
            found[rule] = set(t.loc[t["suspect"], "plot_id"].tolist())
        cons, maj = found["consensus"], found["majority"]
        assert cons <= maj
        precision = {r: len(s & flipped) / len(s) for r, s in found.items()}
        recall = {r: len(s & flipped) / len(flipped) for r, s in found.items()}
        assert precision["consensus"] >= precision["majority"]
        assert recall["majority"] >= recall["consensus"]
        # on these well-separated data most flipped labels are found, and most flags are flipped labels
        assert recall["consensus"] > 0.5 and precision["consensus"] > 0.5


def test_plots_are_judged_as_a_whole_and_precomputed_probabilities_count():
    rng = np.random.default_rng(0)
    n_plots, per = 40, 5
    plots = np.repeat(np.arange(n_plots), per)
    truth = np.where(np.arange(n_plots) % 2 == 0, "bog", "fen")
    X = rng.normal(size=(n_plots * per, 2)) + np.where(truth == "bog", 0.0, 4.0)[plots, None]
    labels = truth.copy()
    labels[[3, 8]] = ["bog", "fen"]  # two plots mislabelled
    y = labels[plots]
    folds = plots % 4
    perfect = np.column_stack([truth[plots] == "bog", truth[plots] == "fen"]).astype(float)
    t = label_filter(X, y, plots, folds, ["bog", "fen"], precomputed={"model": perfect})
    assert set(t.loc[t["suspect"], "plot_id"]) == {3, 8}
    assert t["n_pixels"].eq(per).all() and len(t) == n_plots
    row = t.set_index("plot_id").loc[3]
    assert row["model_p_label"] == 0.0 and row["model_class"] == "fen" and row["n_reject"] == 3
    with pytest.raises(ParameterError, match="rule"):
        label_filter(X, y, plots, folds, ["bog", "fen"], rule="unanimous")


def test_run_flags_mislabelled_plots_and_refits_without_them(tmp_path):
    import json

    import geopandas as gpd
    import pandas as pd
    from own_data import make_project

    from wetlandflow.pipeline.run import run_project

    pf = make_project(tmp_path, dem=False, extra={"features": {"select": ["ndvi", "ndwi"]},
                                                   "validation": {"suspect_labels": "refit"}})
    plots = gpd.read_file(tmp_path / "plots.gpkg")
    water = plots.index[plots["label"] == "open_water"][:2]
    plots.loc[water, "label"] = "upland"  # two water plots labelled upland
    plots.to_file(tmp_path / "plots.gpkg")
    result = run_project(pf, progress=False)
    table = pd.read_csv(result.run_dir / "validation" / "suspect_plots.csv")
    suspects = table.loc[table["suspect"]]
    assert len(suspects) >= 2 and (suspects["label"] == "upland").sum() >= 2
    assert {"model_class", "knn_class", "lda_class", "x", "y"} <= set(table.columns)
    metrics = json.loads((result.run_dir / "validation" / "metrics.json").read_text())
    sus = metrics["suspect_labels"]
    assert sus["n_suspect"] == len(suspects)
    assert sus["without_suspects"]["overall_accuracy"] >= metrics["overall_accuracy"]
    left_out = result.manifest["steps"]["model"]["suspect_plots_left_out"]
    assert sorted(left_out) == sorted(str(p) for p in suspects["plot_id"])
    assert "Suspect training labels" in result.summary()
    from wetlandflow.report.appendix import write_report

    md = write_report(result.run_dir)["markdown"].read_text()
    section = md.split("Suspect training labels", 1)[1]
    assert "Brodley & Friedl" in section and "suspect_plots.png" in section
    assert "Brodley, C. E., Friedl, M. A. (1999)" in md  # in the references
