"""BACI: paired differences (Welch) and the OLS interaction, against scipy and statsmodels; design rules."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from wetlandflow.errors import MonitoringDesignError, ParameterError
from wetlandflow.monitoring.baci_analysis import TABLE_COLUMNS, BaciResult, baci, baci_figure, baci_table


def _pair(effect=0.15, n_before=8, n_after=7, seed=0, start=2000):
    """Control: a shared year-to-year signal plus noise; impact: the same plus a planted step at the event."""
    rng = np.random.default_rng(seed)
    years = np.arange(start, start + n_before + n_after)
    shared = 0.4 + 0.05 * rng.normal(size=years.size)
    control = pd.Series(shared + 0.02 * rng.normal(size=years.size), index=years)
    step = effect * (years >= start + n_before)
    impact = pd.Series(shared + 0.05 + step + 0.02 * rng.normal(size=years.size), index=years)
    return impact, control, start + n_before


@pytest.mark.reference
def test_paired_difference_matches_scipy_welch():
    """Reference: scipy.stats.ttest_ind(equal_var=False) on the after and before differences
    (Stewart-Oaten, Murdoch & Parker 1986, Ecology 67(4): the paired-series BACI design)."""
    impact, control, event = _pair(seed=1)
    res = baci(impact, control, event, alpha=0.1)
    d = impact - control
    ref = stats.ttest_ind(d[d.index >= event], d[d.index < event], equal_var=False)
    ci = ref.confidence_interval(confidence_level=0.9)
    assert res.p == pytest.approx(ref.pvalue, rel=1e-10)
    assert res.t == pytest.approx(ref.statistic, rel=1e-10)
    assert res.df == pytest.approx(ref.df, rel=1e-10)
    assert (res.effect_lo, res.effect_hi) == pytest.approx((ci.low, ci.high), rel=1e-10)
    assert res.mean_diff_before == pytest.approx(d[d.index < event].mean())


@pytest.mark.reference
def test_interaction_matches_statsmodels_ols():
    """Reference: statsmodels.formula.api.ols('y ~ period + site + period:site') on the stacked data
    (Green 1979; Underwood 1992, J. Exp. Mar. Biol. Ecol. 161: the BACI interaction)."""
    smf = pytest.importorskip("statsmodels.formula.api")
    impact, control, event = _pair(seed=2)
    res = baci(impact, control, event)
    stacked = pd.DataFrame({
        "y": np.r_[impact.to_numpy(), control.to_numpy()],
        "period": np.r_[impact.index >= event, control.index >= event].astype(int),
        "site": np.r_[np.ones(len(impact)), np.zeros(len(control))].astype(int)})
    fit = smf.ols("y ~ period + site + period:site", data=stacked).fit()
    lo, hi = fit.conf_int(alpha=0.05).loc["period:site"]
    assert res.interaction == pytest.approx(fit.params["period:site"], rel=1e-9)
    assert res.interaction_se == pytest.approx(fit.bse["period:site"], rel=1e-9)
    assert res.interaction_p == pytest.approx(fit.pvalues["period:site"], rel=1e-8)
    assert (res.interaction_lo, res.interaction_hi) == pytest.approx((lo, hi), rel=1e-9)


def test_planted_effect_has_the_right_sign_and_lies_in_both_intervals():
    for effect in (0.15, -0.12):
        res = baci(*_pair(effect=effect, seed=3))
        assert np.sign(res.effect) == np.sign(effect)
        assert res.effect_lo <= effect <= res.effect_hi
        assert res.interaction_lo <= effect <= res.interaction_hi
        assert res.p < 0.05
        # the cell-means interaction equals the difference of mean differences
        assert res.interaction == pytest.approx(res.effect)


def test_unpaired_dates_are_dropped_and_counted():
    impact, control, event = _pair(seed=4)
    impact = impact.drop(impact.index[1])
    control = control.copy()
    control.iloc[-1] = np.nan
    res = baci(impact, control, event)
    assert res.n_dropped == 2
    assert res.n_before + res.n_after == len(control) - 2


def test_event_date_counts_as_after_and_dates_work():
    impact, control, _ = _pair(seed=5)
    dates = pd.date_range("2020-01-01", periods=len(impact), freq="MS")
    impact.index, control.index = dates, dates
    res = baci(impact, control, dates[8])
    assert (res.n_before, res.n_after) == (8, 7)


def test_too_few_dates_refused_with_the_minimum_named():
    impact, control, _ = _pair(n_before=2, n_after=6, seed=6)
    named = r"at least 3 paired dates before.*received 2 before.*common practice, no source"
    with pytest.raises(MonitoringDesignError, match=named):
        baci(impact, control, 2002)
    with pytest.raises(MonitoringDesignError, match="at least 5 paired dates before"):
        baci(*_pair(n_before=4, seed=6), min_before=5)


def test_bad_alpha_and_minimum_are_refused():
    with pytest.raises(ParameterError, match="alpha=1.5"):
        baci(*_pair(seed=6), alpha=1.5)
    with pytest.raises(ParameterError, match="min_after=1 is below 2"):
        baci(*_pair(seed=6), min_after=1)


def test_result_is_frozen_and_gives_a_row():
    res = baci(*_pair(seed=7))
    assert isinstance(res, BaciResult)
    with pytest.raises(AttributeError):
        res.effect = 0.0
    assert res.as_row()["n_before"] == 8


def _long_table():
    rows = []
    for site, effect in (("imp_a", 0.2), ("imp_b", 0.0), ("ctl_1", 0.0), ("ctl_2", 0.0)):
        impact, _, _ = _pair(effect=effect, seed=8)
        noise = np.random.default_rng(ord(site[0]) + ord(site[-1])).normal(0, 0.01, len(impact))
        rows.append(pd.DataFrame({"polygon": site, "year": impact.index, "water": impact.to_numpy() + noise,
                                  "ndvi": 1 - impact.to_numpy() - noise}))
    return pd.concat(rows, ignore_index=True)


def test_table_has_one_row_per_impact_and_metric_with_the_listed_columns():
    table = _long_table()
    out = baci_table(table, id_col="polygon", date_col="year", metrics=["water", "ndvi"],
                     impact=["imp_a", "imp_b"], control=["ctl_1", "ctl_2"], event=2008)
    assert list(out.columns) == TABLE_COLUMNS
    assert len(out) == 4
    row = out.set_index(["impact", "metric"]).loc[("imp_a", "water")]
    assert row["effect"] == pytest.approx(0.2, abs=0.05)
    assert row["control"] == "ctl_1+ctl_2"
    # the control is the per-date mean of the control polygons
    ctl = table[table.polygon.str.startswith("ctl")].groupby("year")["water"].mean()
    imp = table[table.polygon == "imp_a"].set_index("year")["water"]
    assert row["effect"] == pytest.approx(baci(imp, ctl, 2008).effect)
    assert "Stewart-Oaten" in out.attrs["reference"]


def test_constant_differences_give_nan_tests_not_warnings():
    years = np.arange(2000, 2010)
    control = pd.Series(np.arange(10) * 0.25, index=years)  # exact in binary, so the differences are constant
    with np.errstate(all="raise"):
        res = baci(control + 0.5, control, 2005)
    assert res.effect == pytest.approx(0.0, abs=1e-12) and np.isnan(res.p)


def test_figure_marks_the_event():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    impact, control, event = _pair(seed=9)
    fig = baci_figure(impact, control, event, metric="water share")
    assert len(fig.axes) == 2
    dotted = [line for line in fig.axes[1].get_lines() if line.get_linestyle() == ":"]
    assert any(line.get_xdata()[0] == event for line in dotted)
    plt.close(fig)
