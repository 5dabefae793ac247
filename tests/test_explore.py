"""Tests for wetlandflow.training.explore (class separability, predictor redundancy)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats

from wetlandflow.errors import SamplesError
from wetlandflow.training.explore import (
    bhattacharyya_gaussian,
    class_separability,
    divergence_gaussian,
    hard_pairs,
    jeffries_matusita_gaussian,
    m_statistic,
    plot_class_distributions,
    plot_correlation,
    plot_separability,
    predictor_correlation,
    redundant_predictors,
    separability_by_feature,
    separability_summary,
    transformed_divergence_gaussian,
)

MU1, S1 = np.array([0.0, 0.0]), np.array([[1.0, 0.3], [0.3, 2.0]])
MU2, S2 = np.array([1.0, 2.0]), np.array([[2.0, -0.4], [-0.4, 1.0]])


def gaussian_samples(n=20_000, seed=0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    a = rng.multivariate_normal(MU1, S1, n)
    b = rng.multivariate_normal(MU2, S2, n)
    xy = rng.uniform(0, 1000, (2 * n, 2))
    return pd.DataFrame(
        {
            "plot_id": np.arange(2 * n) // 10,
            "class": ["fen"] * n + ["bog"] * n,
            "x": xy[:, 0],
            "y": xy[:, 1],
            "b1": np.r_[a[:, 0], b[:, 0]],
            "b2": np.r_[a[:, 1], b[:, 1]],
        }
    )


# --------------------------------------------------------------------------- closed forms


@pytest.mark.reference
def test_one_dimensional_closed_forms():
    """DERIVED values for N(0,1) vs N(1,1) from the closed forms (Bhattacharyya distance and JM as in
    Swain & Davis 1978, Remote Sensing: The Quantitative Approach, formulas from memory; M statistic of
    Kaufman & Remer 1994, IEEE TGRS 32(3), 672-683, from memory)."""
    assert bhattacharyya_gaussian(0.0, 1.0, 1.0, 1.0) == pytest.approx(0.125, abs=1e-12)
    assert jeffries_matusita_gaussian(0.0, 1.0, 1.0, 1.0) == pytest.approx(0.2350062, abs=1e-7)
    assert jeffries_matusita_gaussian(0.0, 1.0, 1.0, 1.0, jm_scale="0-sqrt2") == pytest.approx(
        0.4847744, abs=1e-7
    )
    assert divergence_gaussian(0.0, 1.0, 1.0, 1.0) == pytest.approx(1.0, abs=1e-12)
    assert transformed_divergence_gaussian(0.0, 1.0, 1.0, 1.0) == pytest.approx(235.0062, abs=1e-4)
    assert m_statistic(0.0, 1.0, 1.0, 1.0) == pytest.approx(0.5)


@pytest.mark.reference
def test_two_dimensional_closed_forms():
    """DERIVED 2-D example (means (0,0), (1,2); covariances [[1,.3],[.3,2]], [[2,-.4],[-.4,1]]) from the
    Bhattacharyya / divergence closed forms (Swain & Davis 1978, formulas from memory)."""
    assert bhattacharyya_gaussian(MU1, S1, MU2, S2) == pytest.approx(0.5189457, abs=1e-7)
    assert jeffries_matusita_gaussian(MU1, S1, MU2, S2) == pytest.approx(0.8097046, abs=1e-7)
    assert divergence_gaussian(MU1, S1, MU2, S2) == pytest.approx(4.9326201, abs=1e-7)
    assert transformed_divergence_gaussian(MU1, S1, MU2, S2) == pytest.approx(920.4226, abs=1e-4)
    assert bhattacharyya_gaussian(MU2, S2, MU1, S1) == pytest.approx(bhattacharyya_gaussian(MU1, S1, MU2, S2))


@pytest.mark.reference
@settings(max_examples=25, deadline=None)
@given(st.floats(-3, 3), st.floats(0.3, 3), st.floats(-3, 3), st.floats(0.3, 3))
def test_closed_forms_match_numerical_integrals(m1, s1, m2, s2):
    """Definitions integrated with scipy.integrate.quad (independent of the closed forms):
    B = -ln int sqrt(p q) dx (Bhattacharyya coefficient); D = int (p - q) ln(p / q) dx (symmetric
    Kullback-Leibler divergence, the divergence of Swain & Davis 1978)."""
    p, q = stats.norm(m1, s1), stats.norm(m2, s2)
    lo, hi = min(m1 - 12 * s1, m2 - 12 * s2), max(m1 + 12 * s1, m2 + 12 * s2)
    bc = integrate.quad(lambda x: np.sqrt(p.pdf(x) * q.pdf(x)), lo, hi, limit=200)[0]
    d = integrate.quad(lambda x: (p.pdf(x) - q.pdf(x)) * (p.logpdf(x) - q.logpdf(x)), lo, hi, limit=200)[0]
    assert bhattacharyya_gaussian(m1, s1**2, m2, s2**2) == pytest.approx(-np.log(bc), rel=1e-6, abs=1e-9)
    assert divergence_gaussian(m1, s1**2, m2, s2**2) == pytest.approx(d, rel=1e-6, abs=1e-8)


# --------------------------------------------------------------------------- from samples


@pytest.mark.reference
def test_sample_estimates_approach_closed_forms():
    """Large Gaussian samples of the DERIVED 2-D example recover B, JM and TD (loose tolerance)."""
    s = gaussian_samples()
    b = class_separability(s, ["b1", "b2"], measure="bhattacharyya")
    assert b.loc["fen", "bog"] == pytest.approx(0.5189457, rel=0.03)
    jm = class_separability(s, ["b1", "b2"])
    assert jm.loc["bog", "fen"] == pytest.approx(0.8097046, rel=0.03)
    td = class_separability(s, ["b1", "b2"], measure="td")
    assert td.loc["bog", "fen"] == pytest.approx(920.4226, rel=0.03)
    m = class_separability(s, "b1", measure="m")  # |0 - 1| / (1 + sqrt 2)
    assert m.loc["bog", "fen"] == pytest.approx(1 / (1 + np.sqrt(2)), rel=0.03)
    assert jm.attrs["measure"] == "jm" and jm.attrs["upper_bound"] == 2.0
    np.testing.assert_allclose(np.diag(jm.to_numpy()), 0.0)
    np.testing.assert_allclose(jm.to_numpy(), jm.to_numpy().T)


def test_ridge_keeps_singular_sets_finite_and_nans_are_dropped():
    s = gaussian_samples(2000)
    s["b1_copy"] = s["b1"]  # exactly collinear: singular covariance without the ridge
    s.loc[s.index[:50], "b2"] = np.nan
    jm = class_separability(s, ["b1", "b1_copy", "b2"])
    assert np.isfinite(jm.to_numpy()).all() and 0 < jm.loc["bog", "fen"] <= 2.0
    jm_sqrt = class_separability(s, ["b1", "b2"], jm_scale="0-sqrt2")
    assert jm_sqrt.loc["bog", "fen"] < np.sqrt(2) and jm_sqrt.attrs["upper_bound"] == pytest.approx(
        np.sqrt(2)
    )


def test_bad_arguments_are_reported():
    s = gaussian_samples(200)
    with pytest.raises(ValueError, match="M statistic is defined for one feature"):
        class_separability(s, ["b1", "b2"], measure="m")
    with pytest.raises(ValueError, match="measure must be one of"):
        class_separability(s, "b1", measure="kappa")
    with pytest.raises(SamplesError, match="not columns"):
        class_separability(s, ["nope"])
    s.loc[len(s)] = [0, "marsh", 0.0, 0.0, 1.0, 1.0]  # a class with one sample
    with pytest.warns(UserWarning, match="fewer than 2"):
        jm = class_separability(s, ["b1", "b2"])
    assert np.isnan(jm.loc["marsh", "bog"])
    assert "could not be assessed" in separability_summary(jm)


def test_hard_pairs_and_summary():
    rng = np.random.default_rng(1)
    n = 3000
    cls = np.repeat(["open_water", "marsh", "fen"], n)
    v = np.r_[rng.normal(-5, 0.3, n), rng.normal(0, 1, n), rng.normal(0.3, 1, n)]
    s = pd.DataFrame({"class": cls, "ndwi": v})
    jm = class_separability(s, "ndwi")
    pairs = hard_pairs(jm)
    assert [(a, b) for a, b, _ in pairs] == [("fen", "marsh")]  # index is sorted: fen, marsh, open_water
    assert (
        hard_pairs(jm, threshold=2.1)[0][:2] == ("fen", "marsh") and len(hard_pairs(jm, threshold=2.1)) == 3
    )
    text = separability_summary(jm)
    assert "fen vs marsh" in text and "1 of 3" in text and "Jeffries-Matusita" in text
    td = class_separability(s, "ndwi", measure="td")
    assert [(a, b) for a, b, _ in hard_pairs(td)] == [("fen", "marsh")]
    by_feature = separability_by_feature(s.assign(other=v * 2), ["ndwi", "other"])
    assert len(by_feature) == 6
    np.testing.assert_allclose(by_feature["value"].iloc[:3], by_feature["value"].iloc[3:])  # M is scale free


# --------------------------------------------------------------------------- redundancy


def correlated_features(n=500, seed=0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    a = rng.normal(size=n)
    return pd.DataFrame(
        {
            "ndvi": a,
            "evi": 2 * a + 0.05 * rng.normal(size=n),
            "neg": -a + 0.05 * rng.normal(size=n),
            "twi": rng.normal(size=n),
            "slope": rng.normal(size=n),
        }
    )


@pytest.mark.reference
def test_predictor_correlation_matches_scipy():
    """Spearman correlation against scipy.stats.spearmanr (reference library),
    with NaN rows pairwise-dropped."""
    s = correlated_features()
    corr = predictor_correlation(s, list(s.columns))
    np.testing.assert_allclose(corr.to_numpy(), stats.spearmanr(s.to_numpy()).statistic, atol=1e-12)
    s.loc[:9, "twi"] = np.nan
    corr = predictor_correlation(s, ["ndvi", "twi"])
    ok = s["twi"].notna()
    assert corr.loc["ndvi", "twi"] == pytest.approx(
        stats.spearmanr(s.loc[ok, "ndvi"], s.loc[ok, "twi"]).statistic
    )


def test_redundant_predictors_groups_correlated_features():
    s = correlated_features()
    corr = predictor_correlation(s, list(s.columns))
    res = redundant_predictors(corr, threshold=0.9)
    assert res.clusters == [["ndvi", "evi", "neg"]]
    assert res.table.loc["ndvi", "keep"] and res.table.loc["evi", "redundant"]
    assert (res.table.loc[["evi", "neg"], "kept_member"] == "ndvi").all()
    assert not res.table.loc[["twi", "slope"], "redundant"].any()


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 10_000), st.floats(0.5, 0.95))
def test_redundancy_clusters_hold_the_threshold(seed, threshold):
    rng = np.random.default_rng(seed)
    base = rng.normal(size=(200, 3))
    mix = base @ rng.normal(size=(3, 7)) + rng.uniform(0, 1.5) * rng.normal(size=(200, 7))
    corr = pd.DataFrame(mix, columns=[f"f{i}" for i in range(7)]).corr()
    res = redundant_predictors(corr, threshold=threshold)
    for members in res.clusters:  # complete linkage: every pair inside a cluster reaches the threshold
        sub = corr.loc[members, members].abs().to_numpy()
        assert sub.min() >= threshold - 1e-12
    assert res.table["keep"].sum() == res.table["cluster"].nunique()


# --------------------------------------------------------------------------- figures


def test_figures_are_returned_not_shown():
    s = gaussian_samples(500)
    fig = plot_separability(class_separability(s, ["b1", "b2"]))
    assert len(fig.axes) == 2 and len(fig.axes[0].texts) == 4
    fig = plot_class_distributions(s, "b1", kind="box")
    assert [t.get_text().split("\n")[0] for t in fig.axes[0].get_xticklabels()] == ["bog", "fen"]
    assert plot_class_distributions(s, "b2").axes[0].get_ylabel() == "b2"
    corr = predictor_correlation(correlated_features(), ["ndvi", "twi", "evi", "slope"])
    fig = plot_correlation(corr)
    labels = [t.get_text() for t in fig.axes[1].get_xticklabels()]
    assert sorted(labels) == ["evi", "ndvi", "slope", "twi"]
    assert abs(labels.index("ndvi") - labels.index("evi")) == 1  # dendrogram order keeps the pair adjacent
