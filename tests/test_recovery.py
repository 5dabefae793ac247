"""Recovery metrics: formulas as published, planted recovery curves, short series, detection, table."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from wetlandflow.errors import MonitoringDesignError
from wetlandflow.monitoring.recovery import (
    detect_disturbance,
    recovery_figure,
    recovery_metrics,
    recovery_table,
)


def _curve(baseline=0.7, drop=0.5, years_to_full=8, y0=2010, start=2000, end=2022, noise=0.0, seed=0):
    """Flat baseline, a drop in ``y0``, then a linear return to the baseline over ``years_to_full`` years."""
    years = np.arange(start, end + 1)
    after = np.clip((years - y0) / years_to_full, 0, 1)
    values = np.where(years < y0, baseline, baseline - drop + drop * after)
    values = values + noise * np.random.default_rng(seed).normal(size=years.size)
    return pd.Series(values, index=years)


@pytest.mark.reference
def test_short_term_metrics_follow_the_published_formulas():
    """Reference: Frazier, Coops, Wulder, Hermosilla & White (2018), Remote Sensing of Environment 205,
    32-45: with V the value, y0 the disturbance year,
    RRI = (max(V_{y0+4}, V_{y0+5}) - V_{y0}) / (V_{y0-1} - V_{y0})  (Kennedy et al. 2012's indicator),
    R80P = max(V_{y0+4}, V_{y0+5}) / (0.8 mean(V_{y0-1}, V_{y0-2})),
    YrYr = (V_{y0+5} - V_{y0}) / 5."""
    v = _curve(noise=0.03, seed=1)
    y0 = 2010
    m = recovery_metrics(v, y0)
    late = max(v[y0 + 4], v[y0 + 5])
    assert m["rri"] == pytest.approx((late - v[y0]) / (v[y0 - 1] - v[y0]))
    assert m["r80p"] == pytest.approx(late / (0.8 * (v[y0 - 1] + v[y0 - 2]) / 2))
    assert m["yryr"] == pytest.approx((v[y0 + 5] - v[y0]) / 5)
    assert m["magnitude"] == pytest.approx((v[y0 - 1] + v[y0 - 2]) / 2 - v[y0])


@pytest.mark.reference
def test_years_to_recovery_follows_the_published_definition():
    """Reference: White, Wulder, Hermosilla, Coops & Hobart (2017), Remote Sensing of Environment 194,
    303-321: years to recovery = years after the disturbance until the value first reaches 80 % of the
    pre-disturbance value (mean of the two years before)."""
    v = _curve(noise=0.03, seed=2)
    y0 = 2010
    threshold = 0.8 * (v[y0 - 1] + v[y0 - 2]) / 2
    first = next(year for year in v.index if year > y0 and v[year] >= threshold)
    m = recovery_metrics(v, y0)
    assert m["years_to_recovery"] == first - y0
    assert m["recovered_year"] == first
    assert m["reason"] == ""


@pytest.mark.parametrize("years_to_full", [4, 7, 11])
def test_planted_recovery_time_found_within_one_year(years_to_full):
    # linear return from 0.2 to 0.7: 80 % of 0.7 (0.56) is reached after 0.72 * years_to_full years
    v = _curve(years_to_full=years_to_full, noise=0.005, seed=years_to_full)
    m = recovery_metrics(v, 2010)
    assert abs(m["years_to_recovery"] - 0.72 * years_to_full) <= 1


def test_too_short_after_the_disturbance_gives_nan_with_reasons():
    v = _curve(end=2013, years_to_full=20)
    m = recovery_metrics(v, 2010)
    assert np.isnan(m["rri"]) and np.isnan(m["r80p"]) and np.isnan(m["yryr"])
    assert np.isnan(m["years_to_recovery"])
    assert "2014 or 2015" in m["reason"] and "not back to 80 % of the baseline by 2013" in m["reason"]
    assert m["baseline"] == pytest.approx(0.7)


def test_no_baseline_is_refused_with_the_fix():
    with pytest.raises(MonitoringDesignError, match="no value in the 2 years before the disturbance year"):
        recovery_metrics(_curve(start=2000), 2000)
    with pytest.raises(MonitoringDesignError, match="no value in the disturbance year"):
        recovery_metrics(_curve().drop(2010), 2010)


def test_date_index_is_reduced_to_years():
    v = _curve()
    dated = pd.Series(v.to_numpy(), index=pd.to_datetime([f"{y}-07-01" for y in v.index]))
    by_year = recovery_metrics(v, 2010)["years_to_recovery"]
    assert recovery_metrics(dated, 2010)["years_to_recovery"] == by_year


def _step(level_change, seed=3):
    rng = np.random.default_rng(seed)
    years = np.arange(2000, 2016)
    return pd.Series(0.6 + level_change * (years >= 2007) + 0.02 * rng.normal(size=years.size), index=years)


def test_detect_disturbance_finds_a_planted_drop_and_ignores_rises_and_noise():
    assert detect_disturbance(_step(-0.3)) == 2007
    assert detect_disturbance(_step(+0.3)) is None
    assert detect_disturbance(_step(0.0)) is None


def test_detect_disturbance_on_a_slow_recovery_gives_the_drop_year():
    assert detect_disturbance(_curve(years_to_full=15, noise=0.01, seed=7)) == 2010


def test_table_mixes_given_and_detected_disturbances():
    series = {"p1": _curve(noise=0.01, seed=4), "p2": _step(-0.3, seed=5), "p3": _step(0.0, seed=6)}
    table = pd.concat([pd.DataFrame({"pid": k, "yr": s.index, "ndvi": s.to_numpy()})
                       for k, s in series.items()])
    out = recovery_table(table, id_col="pid", year_col="yr", metric="ndvi",
                         disturbance={"p1": 2010, "p2": None, "p3": None}).set_index("pid")
    assert list(out["source"]) == ["given", "detected", "detected"]
    assert out.loc["p2", "disturbance_year"] == 2007
    assert out.loc["p1", "years_to_recovery"] == recovery_metrics(series["p1"], 2010)["years_to_recovery"]
    assert np.isnan(out.loc["p3", "rri"]) and "no significant downward change" in out.loc["p3", "reason"]
    assert "Frazier" in out.attrs["reference"]


def test_table_reports_a_polygon_design_failure_on_its_row():
    table = pd.DataFrame({"pid": "p1", "yr": range(2000, 2010), "ndvi": 0.5})
    out = recovery_table(table, id_col="pid", year_col="yr", metric="ndvi", disturbance={"p1": 2000})
    assert "no value in the 2 years before" in out["reason"].iloc[0]
    assert np.isnan(out["baseline"].iloc[0])


def test_figure_shows_baseline_threshold_and_years():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    v = _curve()
    m = recovery_metrics(v, 2010)
    fig = recovery_figure(v, m, title="patch")
    labels = [line.get_label() for line in fig.axes[0].get_lines()]
    assert {"pre-disturbance baseline", "80 % of baseline", "disturbance", "back to 80 %"} <= set(labels)
    plt.close(fig)
