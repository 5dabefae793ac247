"""Tests for wetlandflow.training.weights: class balance, the per-plot cap, and the effect on class priors."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import norm
from sklearn.linear_model import LogisticRegression
from sklearn.utils.class_weight import compute_sample_weight

from wetlandflow.errors import ParameterError, SamplesError
from wetlandflow.training.weights import (
    PlotCapWarning,
    adjust_priors,
    sample_weights,
    weight_summary,
    weighted_priors,
)


def plot_table(sizes, classes):
    """Per-sample labels and plot ids from plot sizes and plot classes."""
    plots = np.repeat([f"p{i}" for i in range(len(sizes))], sizes)
    y = np.repeat(np.asarray(classes), sizes)
    return y, plots


def totals_by(keys, w):
    u, inv = np.unique(keys, return_inverse=True)
    return dict(zip(u.tolist(), np.bincount(inv, weights=w).tolist(), strict=True))


# --------------------------------------------------------------------------- reference and closed form


@pytest.mark.reference
def test_without_cap_equals_scikit_learn_balanced_weights():
    """Reference library: scikit-learn's compute_sample_weight("balanced", y) = n / (K n_c), the weights of
    King & Zeng (2001), Logistic regression in rare events data (as cited by scikit-learn's docs)."""
    y, plots = plot_table([50, 3, 7, 12, 1, 30], ["bog", "bog", "fen", "fen", "marsh", "marsh"])
    w = sample_weights(y, plots, max_plot_share=None)
    np.testing.assert_allclose(w, compute_sample_weight("balanced", y), rtol=1e-12)


def test_water_filling_closed_form():
    """Closed form (derived from the definition): plot sizes 4, 1, 1 with share s = 1/2 solve
    t = s (1 + 1 + min(4, t)), so t = 2 and the plot totals are 2, 1, 1."""
    y, plots = plot_table([4, 1, 1, 1, 1], ["bog", "bog", "bog", "fen", "fen"])
    w = sample_weights(y, plots, max_plot_share=0.5)
    t = totals_by(plots, w)
    assert t == pytest.approx({"p0": 2.0, "p1": 1.0, "p2": 1.0, "p3": 2.0, "p4": 2.0})
    assert w.sum() == pytest.approx(len(y))


def test_class_keeps_its_total_without_balancing_and_cap_only_redistributes():
    y, plots = plot_table([100, 5, 5, 5, 5, 10, 10], ["bog"] * 5 + ["fen"] * 2)
    w = sample_weights(y, plots, balance_classes=False, max_plot_share=0.3, on_infeasible="ignore")
    assert totals_by(y, w) == pytest.approx({"bog": 120.0, "fen": 20.0})
    t = totals_by(plots, w)
    assert t["p0"] == pytest.approx(0.3 * 120.0)  # the big plot sits exactly at the cap
    assert len({round(t[f"p{i}"], 9) for i in range(1, 5)}) == 1  # the small plots still weigh alike


def test_weights_do_not_change_a_class_already_within_the_cap():
    y, plots = plot_table([10, 10, 10, 10, 40], ["bog"] * 4 + ["fen"])
    w = sample_weights(y, plots, max_plot_share=0.25, on_infeasible="ignore")
    np.testing.assert_allclose(w[y == "bog"], w[y == "bog"][0])


# --------------------------------------------------------------------------- properties


@st.composite
def plot_sets(draw):
    n_plots = draw(st.integers(1, 30))
    sizes = draw(st.lists(st.integers(1, 300), min_size=n_plots, max_size=n_plots))
    classes = draw(st.lists(st.sampled_from(["bog", "fen", "marsh", "upland"]), min_size=n_plots,
                            max_size=n_plots))
    share = draw(st.floats(0.02, 1.0))
    balance = draw(st.booleans())
    perm_seed = draw(st.integers(0, 2**16))
    return sizes, classes, share, balance, perm_seed


@given(plot_sets())
@settings(max_examples=150, deadline=None)
def test_property_sum_class_totals_and_cap(case):
    sizes, classes, share, balance, perm_seed = case
    y, plots = plot_table(sizes, classes)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PlotCapWarning)
        w = sample_weights(y, plots, balance_classes=balance, max_plot_share=share)
        again = sample_weights(y, plots, balance_classes=balance, max_plot_share=share)
        perm = np.random.default_rng(perm_seed).permutation(y.size)
        shuffled = sample_weights(y[perm], plots[perm], balance_classes=balance, max_plot_share=share)
    np.testing.assert_array_equal(w, again)  # deterministic
    np.testing.assert_allclose(shuffled, w[perm], rtol=1e-9)  # a function of the samples, not their order
    assert (w > 0).all() and w.sum() == pytest.approx(y.size, rel=1e-9)
    cls_tot = totals_by(y, w)
    for c, tot in cls_tot.items():
        expected = y.size / len(cls_tot) if balance else float((y == c).sum())
        assert tot == pytest.approx(expected, rel=1e-9)
    plot_tot = totals_by(plots, w)
    for i, c in enumerate(classes):
        m = classes.count(c)
        px = w[plots == f"p{i}"]
        np.testing.assert_allclose(px, px[0], rtol=1e-12)  # pixels of one plot share its weight
        cap = max(share, 1.0 / m)  # below 1/m the cap cannot be met; equal plots is the most even split
        assert plot_tot[f"p{i}"] / cls_tot[c] <= cap * (1 + 1e-9)
    for c in set(classes):
        idx = [i for i, k in enumerate(classes) if k == c]
        shares = np.array([plot_tot[f"p{i}"] for i in idx]) / cls_tot[c]
        per_px = shares / np.array([sizes[i] for i in idx])
        under = shares < min(share, 1.0) * (1 - 1e-9)
        if len(idx) * share > 1 + 1e-9 and under.any():
            # optimality of water filling: every plot under the cap has the same per-pixel weight, and no
            # capped plot has a lower per-pixel weight than those (it was only cut down)
            np.testing.assert_allclose(per_px[under], per_px[under][0], rtol=1e-9)
            assert (per_px[~under] <= per_px[under][0] * (1 + 1e-9)).all()


# --------------------------------------------------------------------------- messages and policies


def test_too_few_plots_warns_and_raises_on_request():
    y, plots = plot_table([30, 2, 5, 5, 5, 5], ["bog", "bog", "fen", "fen", "fen", "fen"])
    with pytest.warns(PlotCapWarning, match=r"class 'bog' has 2 plot\(s\).*at least 4"):
        w = sample_weights(y, plots, max_plot_share=0.25)
    assert totals_by(plots, w)["p0"] == pytest.approx(totals_by(plots, w)["p1"])
    with pytest.raises(SamplesError, match="class 'bog'"):
        sample_weights(y, plots, max_plot_share=0.25, on_infeasible="raise")


def test_bad_inputs_are_named():
    with pytest.raises(ParameterError, match="max_plot_share.*got 0"):
        sample_weights(["a"], ["p"], max_plot_share=0)
    with pytest.raises(ParameterError, match="on_infeasible"):
        sample_weights(["a"], ["p"], on_infeasible="skip")
    with pytest.raises(SamplesError, match=r"one plot id per sample \(2\)"):
        sample_weights(["a", "b"], ["p"])
    with pytest.raises(SamplesError, match=r"\['p'\] carry more than one class"):
        sample_weights(["a", "b"], ["p", "p"])
    assert sample_weights([], []).shape == (0,)


def test_no_groups_means_one_plot_per_sample():
    y = np.array(["bog"] * 3 + ["fen"])
    np.testing.assert_allclose(sample_weights(y, None, max_plot_share=None), [2 / 3, 2 / 3, 2 / 3, 2.0])


def test_weight_summary_reports_shares_and_effective_plots():
    y, plots = plot_table([100, 10, 10, 10, 10, 10, 10], ["bog"] * 4 + ["fen"] * 3)
    w = sample_weights(y, plots, max_plot_share=0.4)
    s = weight_summary(y, plots, w).set_index("class")
    assert s.loc["bog", "max_plot_share"] == pytest.approx(0.4)
    assert s.loc["fen", "effective_plots"] == pytest.approx(3.0)  # equal plots: Kish's n_eff = n
    assert s.loc["bog", "effective_plots"] < 4.0
    assert s["weight_share"].sum() == pytest.approx(1.0) and s.loc["bog", "samples"] == 130


# --------------------------------------------------------------------------- effect on class priors


@pytest.mark.reference
def test_weighted_logistic_regression_mean_probability_equals_weighted_priors():
    """Analytic: for a multinomial logistic regression with intercepts fitted by (weighted) maximum
    likelihood, the score equation of each intercept is sum_i w_i (y_ic - p_ic) = 0, so the weighted mean
    predicted probability of class c equals its weighted prior (score equations of GLMs with canonical link,
    McCullagh & Nelder 1989, Generalized Linear Models; from memory).  Balanced weights therefore raise the
    average predicted probability of a rare class above its share of the samples."""
    rng = np.random.default_rng(0)
    counts = {"upland": 700, "marsh": 200, "fen": 100}
    y = np.repeat(list(counts), list(counts.values()))
    means = {"upland": 0.0, "marsh": 1.0, "fen": 2.0}
    X = np.array([means[c] for c in y])[:, None] + rng.normal(0, 1.0, (y.size, 1))
    plots = np.arange(y.size) // 5
    w = sample_weights(y, plots, max_plot_share=None)
    model = LogisticRegression(C=np.inf, tol=1e-10, max_iter=5000).fit(X, y, sample_weight=w)
    p = model.predict_proba(X)
    priors = weighted_priors(y, w)
    for i, c in enumerate(model.classes_):
        assert np.average(p[:, i], weights=w) == pytest.approx(priors[c], abs=1e-4)
        assert priors[c] == pytest.approx(1 / 3)
    fen = list(model.classes_).index("fen")
    assert p[:, fen].mean() > 1.5 * counts["fen"] / y.size  # rare class inflated in the unweighted mean


@pytest.mark.reference
def test_adjust_priors_matches_bayes_posterior_of_two_gaussians():
    """Analytic (Bayes' theorem): for classes N(0, 1) and N(2, 1) with priors pi, the posterior is
    pi_a f_a / (pi_a f_a + pi_b f_b).  Moving the equal-prior posterior to priors (0.9, 0.1) must give the
    closed form under (0.9, 0.1) (the prior-shift rule of Saerens et al. 2002, Neural Computation)."""
    x = np.linspace(-3, 5, 41)
    fa, fb = norm.pdf(x, 0, 1), norm.pdf(x, 2, 1)

    def posterior(pa):
        return np.column_stack([pa * fa, (1 - pa) * fb]) / (pa * fa + (1 - pa) * fb)[:, None]

    out = adjust_priors(posterior(0.5), ["a", "b"], {"a": 0.5, "b": 0.5}, {"a": 0.9, "b": 0.1})
    np.testing.assert_allclose(out, posterior(0.9), rtol=1e-12)
    with pytest.raises(ParameterError, match=r"positive for every class.*\['b'\]"):
        adjust_priors(posterior(0.5), ["a", "b"], {"a": 0.5, "b": 0.5}, {"a": 1.0})
