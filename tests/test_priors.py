"""Class-prior estimation and adjustment (Saerens, Latinne & Decaestecker 2002).

Outside checks: the EM of the paper as implemented in QuaPy (Moreo, Esuli & Sebastiani 2021, "QuaPy: A
Python-based framework for quantification", arXiv:2106.11057; ``EMQ.EM``), and the paper's own claim that
under a pure prior shift the EM recovers the new priors: on data drawn from known class-conditional
densities the exact posteriors are known, so the recovered priors must lie within sampling error of the
priors the data were drawn with.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import multivariate_normal

from wetlandflow.errors import ModelError, ParameterError
from wetlandflow.models.calibration import expected_calibration_error
from wetlandflow.models.priors import PriorAdjustedClassifier, adjust_to_priors, em_priors, training_priors

MEANS = np.array([[0.0, 0.0], [1.6, 0.4], [0.3, 1.8]])  # three overlapping Gaussian classes, unit covariance


def _draw(priors, n, rng):
    """Labels drawn with ``priors``; features from the class-conditional densities; exact posteriors under
    the *training* priors (equal shares), i.e. what a perfect classifier fitted on balanced data outputs."""
    y = rng.choice(len(priors), size=n, p=priors)
    x = MEANS[y] + rng.normal(size=(n, 2))
    dens = np.column_stack([multivariate_normal(m, np.eye(2)).pdf(x) for m in MEANS])
    return y, dens / dens.sum(axis=1, keepdims=True)


@pytest.mark.reference
def test_em_recovers_the_priors_the_data_were_drawn_with():
    # Saerens et al. (2002), Neural Computation 14(1), section 2.2: under a change of priors alone the EM
    # estimate is the maximum-likelihood estimate of the new priors, consistent as n grows.
    rng = np.random.default_rng(7)
    true = np.array([0.70, 0.22, 0.08])
    n = 20_000
    _, post = _draw(true, n, rng)
    est = em_priors(post, [1 / 3, 1 / 3, 1 / 3])
    assert est.converged
    se = np.sqrt(true * (1 - true) / n)  # the binomial SE of the shares themselves: EM cannot beat it
    assert np.all(np.abs(est.estimated - true) < 6 * se), (est.estimated, true)
    # the classify-and-count shares are biased towards the balanced training priors, the EM's are not
    counted = np.bincount(post.argmax(axis=1), minlength=3) / n
    assert np.abs(counted - true).max() > 5 * np.abs(est.estimated - true).max()
    # and the paper's likelihood-ratio statistic is far beyond the chi-squared(2) 0.999 quantile (13.8)
    assert est.log_likelihood_ratio > 13.8


@pytest.mark.reference
def test_em_matches_quapy():
    # Moreo, Esuli & Sebastiani (2021), QuaPy, arXiv:2106.11057: EMQ.EM(tr_prev, posteriors) implements the
    # same EM (Saerens et al. 2002); it stops on a mean absolute change below epsilon after >10 iterations.
    aggregative = pytest.importorskip("quapy.method.aggregative")
    rng = np.random.default_rng(3)
    post = rng.dirichlet([0.6, 1.0, 2.0, 0.8], size=4000)
    train = np.array([0.4, 0.3, 0.2, 0.1])
    theirs, theirs_post = aggregative.EMQ.EM(train, post, epsilon=1e-10)
    ours = em_priors(post, train, tol=1e-12)
    np.testing.assert_allclose(ours.estimated, theirs, atol=1e-6)
    np.testing.assert_allclose(adjust_to_priors(post, train, ours.estimated), theirs_post, atol=1e-5)


@pytest.mark.reference
def test_adjusted_probabilities_are_calibrated_on_the_shifted_data():
    # Saerens et al. (2002), eq. 2.4: re-weighting exact posteriors by the prior ratio gives the exact
    # posteriors under the new priors, so reliability on data drawn with the new priors must be restored.
    # ECE as in Guo et al. (2017), On calibration of modern neural networks, ICML, PMLR 70.
    rng = np.random.default_rng(11)
    true = np.array([0.75, 0.2, 0.05])
    y, post = _draw(true, 30_000, rng)
    names = ["a", "b", "c"]
    labels = np.array(names)[y]
    before = expected_calibration_error(labels, post, names)
    after = expected_calibration_error(labels, adjust_to_priors(post, np.full(3, 1 / 3), true), names)
    est = em_priors(post, np.full(3, 1 / 3))
    after_em = expected_calibration_error(labels, adjust_to_priors(post, np.full(3, 1 / 3), est.estimated),
                                          names)
    assert after < before / 3 and after_em < before / 3
    # calibration in the large: the mean adjusted probability of each class is its observed share
    observed = np.bincount(y, minlength=3) / y.size
    adjusted = adjust_to_priors(post, np.full(3, 1 / 3), est.estimated)
    np.testing.assert_allclose(adjusted.mean(axis=0), observed, atol=0.01)
    assert np.abs(post.mean(axis=0) - observed).max() > 0.1
    # accuracy cannot drop: the adjusted argmax is the Bayes rule under the new priors
    acc = lambda p: float(np.mean(p.argmax(axis=1) == y))  # noqa: E731
    assert acc(adjust_to_priors(post, np.full(3, 1 / 3), est.estimated)) > acc(post)


def test_training_priors_follow_the_weights():
    y = np.array(["a"] * 6 + ["b"] * 3 + ["c"])
    np.testing.assert_allclose(training_priors(y, ["a", "b", "c"]), [0.6, 0.3, 0.1])
    np.testing.assert_allclose(training_priors(y, ["a", "b", "c", "d"], balanced=True), [1 / 3] * 3 + [0])
    w = np.r_[np.full(6, 0.5), np.full(3, 1.0), 3.0]
    np.testing.assert_allclose(training_priors(y, ["a", "b", "c"], w), [3 / 9, 3 / 9, 3 / 9])


def test_absent_class_keeps_zero_and_bad_priors_are_refused():
    post = np.array([[0.5, 0.5, 0.0], [0.2, 0.8, 0.0]])
    adj = adjust_to_priors(post, [0.5, 0.5, 0.0], [0.2, 0.3, 0.5])
    assert np.all(adj[:, 2] == 0) and np.allclose(adj.sum(axis=1), 1)
    with pytest.raises(ParameterError, match="new priors"):
        adjust_to_priors(post, [0.5, 0.5, 0], [0.5, -0.1, 0.6])
    with pytest.raises(ModelError, match="finite"):
        em_priors(np.full((3, 3), np.nan), [1 / 3] * 3)


def test_wrapper_keeps_the_scheme_and_refuses_refit():
    from wetlandflow.models.classifier import WetlandClassifier

    rng = np.random.default_rng(0)
    X = rng.normal(size=(120, 3)).astype(np.float32)
    y = np.array(["upland", "bog", "fen"])[(X[:, 0] > 0).astype(int) + (X[:, 1] > 1).astype(int)]
    base = WetlandClassifier(classes=("upland", "bog", "fen"), n_estimators=10).fit(X, y)
    wrapped = PriorAdjustedClassifier(base, [1 / 3] * 3, [0.8, 0.1, 0.1])
    p = wrapped.predict_scheme_proba(X)
    np.testing.assert_allclose(p, adjust_to_priors(base.predict_scheme_proba(X), [1 / 3] * 3, [0.8, 0.1, 0.1]))
    assert list(wrapped.scheme_) == ["upland", "bog", "fen"]
    sorted_p = wrapped.predict_proba(X)
    assert np.allclose(sorted_p[:, list(wrapped.classes_).index("bog")], p[:, 1])
    assert set(wrapped.predict(X)) <= {"upland", "bog", "fen"}
    with pytest.raises(ModelError, match="not refitted"):
        wrapped.fit(X, y)


def _project(tmp_path, priors):
    from own_data import make_project

    return make_project(tmp_path, dem=False, extra={"features": {"select": ["ndvi", "ndwi"]}, "priors": priors})


def test_run_adjusts_the_map_to_the_estimated_priors(tmp_path):
    import json

    import pandas as pd
    import rasterio

    from wetlandflow.pipeline.run import run_project

    pf = _project(tmp_path, {"adjust": "em", "sample_pixels": 1000})
    result = run_project(pf, progress=False)
    rec = result.manifest["steps"]["mapping"]["priors"]
    table = pd.read_csv(result.run_dir / "maps" / "priors.csv")
    assert list(table["class"]) == list(rec["priors"])
    assert np.isclose(table["area_prior"].sum(), 1) and np.isclose(table["training_prior"].sum(), 1)
    assert rec["n_pixels"] == 1000 and rec["converged"]
    with rasterio.open(result.run_dir / "maps" / "probability.tif") as src:
        p = src.read()
    with rasterio.open(result.run_dir / "maps" / "class.tif") as src:
        codes = src.read(1)
    ok = codes > 0
    assert np.array_equal(np.argmax(p[:, ok], axis=0) + 1, codes[ok])  # the class map follows the adjusted p
    summary = result.summary()
    assert "class priors" in summary and "Saerens" in summary
    json.dumps(rec)  # the record is plain JSON
    from wetlandflow.report.appendix import write_report

    md = write_report(result.run_dir)["markdown"].read_text()
    assert "Class priors: training and area" in md and "Saerens, M., Latinne, P., Decaestecker, C. (2002)" in md


def test_given_shares_must_cover_the_scheme(tmp_path):
    from wetlandflow.errors import ProjectFileError
    from wetlandflow.inputs.project import load_project

    pf = _project(tmp_path, {"adjust": "given", "shares": {"upland": 0.9, "marsh": 0.1}})
    with pytest.raises(ProjectFileError, match="priors.shares") as err:
        load_project(pf)
    assert "lacks" in str(err.value)


def test_given_shares_reach_the_map(tmp_path):
    import pandas as pd

    from wetlandflow.pipeline.run import run_project

    pf = _project(tmp_path, {"adjust": "given", "shares": {"upland": 6, "open_water": 1, "marsh": 3}})
    result = run_project(pf, progress=False)
    table = pd.read_csv(result.run_dir / "maps" / "priors.csv").set_index("class")
    np.testing.assert_allclose(table["area_prior"], [0.6, 0.1, 0.3])
