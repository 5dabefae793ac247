"""Before/after-control-impact (BACI) comparisons of one metric at an impact site and a control site.

Two published analyses of the same paired series are reported side by side:

* the paired-series design of Stewart-Oaten, Murdoch & Parker (1986): on every date sampled at both sites
  take ``d_t = impact_t - control_t``; the effect is ``mean(d | after) - mean(d | before)``, tested with
  Welch's two-sample t-test (periods may have unequal variances and lengths);
* the BACI interaction of Green (1979) and Underwood (1992): ordinary least squares on the stacked
  observations ``y ~ period + site + period:site``; the interaction coefficient is the BACI effect.  With
  this cell-means model it equals the paired effect exactly; its standard error pools the residual
  variance of all four period-site cells and ignores the pairing by date.

Convention: an observation dated at or after ``event`` belongs to the *after* period.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from ..errors import MonitoringDesignError, ParameterError
from ._attrs import result_attrs

__all__ = ["BaciResult", "baci", "baci_table", "baci_figure"]

#: Minimum dates per period.  Two is the arithmetic floor (a period's variance needs two dates); three is
#: common practice, no source.  Stewart-Oaten et al. (1986) ask for several sampling times in each period
#: without fixing a number.
MIN_DATES = 3

_REFERENCES = (
    "Stewart-Oaten, A., Murdoch, W. W. & Parker, K. R. (1986). Environmental impact assessment: "
    "'pseudoreplication' in time? Ecology, 67(4), 929-940; Green, R. H. (1979). Sampling Design and "
    "Statistical Methods for Environmental Biologists. Wiley; Underwood, A. J. (1992). Beyond BACI: the "
    "detection of environmental impacts on populations in the real, but variable, world. Journal of "
    "Experimental Marine Biology and Ecology, 161, 145-178.")

TABLE_COLUMNS = ["impact", "control", "metric", "n_before", "n_after", "n_dropped", "effect", "effect_lo",
                 "effect_hi", "p", "interaction", "interaction_se", "interaction_p", "mean_diff_before",
                 "mean_diff_after"]


@dataclasses.dataclass(frozen=True, slots=True)
class BaciResult:
    """The two BACI analyses of one impact-control pair (units of the metric unless stated).

    ``effect`` (with ``effect_lo``/``effect_hi``, ``p``, ``t``, ``df``) is the Stewart-Oaten et al. (1986)
    paired-difference effect with its Welch test; ``interaction`` (``interaction_se``, ``_lo``, ``_hi``,
    ``interaction_p``) is the OLS interaction of Green (1979) / Underwood (1992).  ``n_dropped`` counts
    dates present at one site only (or NaN at either).
    """

    n_before: int
    n_after: int
    n_dropped: int
    mean_diff_before: float
    mean_diff_after: float
    effect: float
    effect_lo: float
    effect_hi: float
    t: float
    df: float
    p: float
    interaction: float
    interaction_se: float
    interaction_lo: float
    interaction_hi: float
    interaction_p: float
    alpha: float

    def as_row(self) -> dict[str, Any]:
        """The fields as a plain dict (one table row)."""
        return dataclasses.asdict(self)


def _paired(impact: pd.Series, control: pd.Series) -> tuple[pd.DataFrame, int]:
    """Impact and control on the dates where both have a value, and how many dates were dropped."""
    both = pd.concat({"impact": impact, "control": control}, axis=1, join="outer", sort=True)
    kept = both.dropna().sort_index()
    return kept, len(both) - len(kept)


def _check_design(n_before: int, n_after: int, min_before: int, min_after: int, event, alpha: float) -> None:
    if not 0 < alpha < 1:
        raise ParameterError(f"baci: alpha={alpha} is outside (0, 1); expected a two-sided level such as "
                             "0.05.")
    for name, value in (("min_before", min_before), ("min_after", min_after)):
        if value < 2:
            raise ParameterError(f"baci: {name}={value} is below 2; a period's variance needs two dates. "
                                 f"Expected an integer >= 2 (default {MIN_DATES}).")
    if n_before < min_before or n_after < min_after:
        raise MonitoringDesignError(
            f"BACI needs at least {min_before} paired dates before and {min_after} after the event "
            f"({event}); received {n_before} before and {n_after} after. The minimum of {MIN_DATES} per "
            "period is common practice, no source (Stewart-Oaten et al. 1986 ask for several sampling "
            "times in each period). Fix: add sampling dates on the short side, or check the event date.")


def _welch(after: np.ndarray, before: np.ndarray, alpha: float) -> tuple[float, ...]:
    """Difference of means, its Welch CI, t, Welch-Satterthwaite df and two-sided p."""
    va, vb = after.var(ddof=1) / after.size, before.var(ddof=1) / before.size
    diff, se = after.mean() - before.mean(), np.sqrt(va + vb)
    if se == 0:  # both periods constant: no variance to test against, as in scipy
        return diff, np.nan, np.nan, np.nan, np.nan, np.nan
    df = (va + vb) ** 2 / (va ** 2 / (after.size - 1) + vb ** 2 / (before.size - 1))
    half = stats.t.ppf(1 - alpha / 2, df) * se
    t = diff / se
    return diff, diff - half, diff + half, t, df, 2 * stats.t.sf(abs(t), df)


def _interaction(paired: pd.DataFrame, after: np.ndarray, alpha: float) -> tuple[float, ...]:
    """OLS of the stacked data on (1, after, impact, after x impact); the last coefficient and its test."""
    y = np.r_[paired["impact"].to_numpy(float), paired["control"].to_numpy(float)]
    period = np.r_[after, after].astype(float)
    site = np.r_[np.ones(len(paired)), np.zeros(len(paired))]
    design = np.column_stack([np.ones_like(y), period, site, period * site])
    coef, _, rank, _ = np.linalg.lstsq(design, y, rcond=None)
    dof = y.size - rank
    resid = y - design @ coef
    cov = resid @ resid / dof * np.linalg.inv(design.T @ design)
    b, se = coef[3], np.sqrt(cov[3, 3])
    if se == 0:
        return b, se, np.nan, np.nan, np.nan
    half = stats.t.ppf(1 - alpha / 2, dof) * se
    return b, se, b - half, b + half, 2 * stats.t.sf(abs(b / se), dof)


def baci(impact: pd.Series, control: pd.Series, event, *, alpha: float = 0.05,
         min_before: int = MIN_DATES, min_after: int = MIN_DATES) -> BaciResult:
    """Paired-difference and interaction BACI analyses of one metric at an impact and a control site.

    Parameters
    ----------
    impact, control : pandas.Series
        The metric (water share, NDVI, ...) indexed by date or year.  Only dates with a value at both
        sites are used (``n_dropped`` says how many were not).
    event : scalar
        The date or year of the intervention, comparable with the index; dates ``>= event`` are *after*.
    alpha : float
        Two-sided level of the confidence intervals.
    min_before, min_after : int
        Minimum paired dates per period (default 3: common practice, no source; Stewart-Oaten et al. 1986
        ask for several sampling times before and after).

    Returns
    -------
    BaciResult
        Frozen result; ``.as_row()`` gives a dict.

    Raises
    ------
    MonitoringDesignError
        Fewer than ``min_before`` dates before or ``min_after`` after (the message states the minimum).

    References
    ----------
    Stewart-Oaten, Murdoch & Parker (1986), Ecology 67(4); Green (1979), Sampling Design and Statistical
    Methods for Environmental Biologists; Underwood (1992), J. Exp. Mar. Biol. Ecol. 161.

    Examples
    --------
    >>> import pandas as pd
    >>> years = range(2010, 2020)
    >>> control = pd.Series([0.30, 0.32, 0.29, 0.31, 0.30, 0.33, 0.31, 0.30, 0.32, 0.29], index=years)
    >>> step = pd.Series([0.0, 0.01, 0.0, 0.01, 0.0, 0.11, 0.1, 0.11, 0.1, 0.11], index=years)
    >>> result = baci(control + step, control, 2015)
    >>> round(result.effect, 2), result.n_before, result.n_after
    (0.1, 5, 5)
    """
    paired, n_dropped = _paired(impact, control)
    if isinstance(paired.index, pd.DatetimeIndex):  # a date (datetime.date, ISO text) against dated values
        event = pd.Timestamp(event)
    after = (paired.index >= event)
    n_after = int(after.sum())
    _check_design(len(paired) - n_after, n_after, min_before, min_after, event, alpha)
    d = (paired["impact"] - paired["control"]).to_numpy(float)
    effect, lo, hi, t, df, p = _welch(d[after], d[~after], alpha)
    inter = _interaction(paired, after, alpha)
    return BaciResult(
        n_before=len(paired) - n_after, n_after=n_after, n_dropped=n_dropped,
        mean_diff_before=float(d[~after].mean()), mean_diff_after=float(d[after].mean()),
        effect=float(effect), effect_lo=float(lo), effect_hi=float(hi), t=float(t), df=float(df), p=float(p),
        interaction=float(inter[0]), interaction_se=float(inter[1]), interaction_lo=float(inter[2]),
        interaction_hi=float(inter[3]), interaction_p=float(inter[4]), alpha=alpha)


def _site_series(table: pd.DataFrame, id_col: str, date_col: str, metric: str,
                 ids: Sequence[str]) -> pd.DataFrame:
    """One column per polygon id, indexed by date (mean of duplicate rows of a date)."""
    missing = sorted(set(ids) - set(table[id_col]))
    if missing:
        raise ParameterError(f"baci_table: ids {missing} are not in column {id_col!r}; expected some of "
                             f"{sorted(table[id_col].unique())[:10]}. Fix: check the impact/control lists.")
    rows = table[table[id_col].isin(ids)]
    return rows.pivot_table(index=date_col, columns=id_col, values=metric, aggfunc="mean")


def baci_table(table: pd.DataFrame, *, id_col: str, date_col: str, metrics: Sequence[str],
               impact: Sequence[str], control: Sequence[str], event) -> pd.DataFrame:
    """BACI analyses for every impact polygon and metric of a long per-polygon, per-date table.

    The control series is the mean of the control polygons on each date (dates where no control has a
    value are dropped).

    Parameters
    ----------
    table : pandas.DataFrame
        Long table with ``id_col``, ``date_col`` and one column per metric.
    id_col, date_col : str
        Polygon id and date (or year) columns.
    metrics : sequence of str
        Metric columns to analyse.
    impact, control : sequence of str
        Impact and control polygon ids.
    event : scalar
        Date or year of the intervention (``>= event`` is after).

    Returns
    -------
    pandas.DataFrame
        One row per impact polygon and metric with columns ``impact, control, metric, n_before, n_after,
        n_dropped, effect, effect_lo, effect_hi, p, interaction, interaction_se, interaction_p,
        mean_diff_before, mean_diff_after`` (``control`` lists the control ids joined by ``+``); ``attrs``
        from ``result_attrs``.

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> years = np.arange(2010, 2020)
    >>> t = pd.DataFrame({"id": np.repeat(["a", "b"], 10), "year": np.r_[years, years],
    ...                   "ndvi": np.r_[0.5 + 0.1 * (years >= 2015) + 0.01 * (years % 3), np.full(10, 0.5)]})
    >>> rows = baci_table(t, id_col="id", date_col="year", metrics=["ndvi"], impact=["a"], control=["b"],
    ...                   event=2015)
    >>> round(float(rows["effect"].iloc[0]), 2)
    0.1
    """
    rows = []
    for metric in metrics:
        control_series = _site_series(table, id_col, date_col, metric, control).mean(axis=1)
        impacts = _site_series(table, id_col, date_col, metric, impact)
        for site in impact:
            result = baci(impacts[site], control_series, event)
            rows.append({"impact": site, "control": "+".join(map(str, control)), "metric": metric,
                         **result.as_row()})
    out = pd.DataFrame(rows, columns=TABLE_COLUMNS) if rows else pd.DataFrame(columns=TABLE_COLUMNS)
    out.attrs = result_attrs(
        long_name="before/after-control-impact effects per impact polygon and metric", units="metric units",
        method="paired differences with Welch t-test; OLS y ~ period + site + period:site",
        reference=_REFERENCES, parameters={"event": event, "control": list(control)})
    return out


def baci_figure(impact: pd.Series, control: pd.Series, event, *, metric: str = ""):
    """Both series, their difference with the period means, and the event marked.

    Parameters
    ----------
    impact, control : pandas.Series
        The metric at the impact and control site, indexed by date or year.
    event : scalar
        Date or year of the intervention.
    metric : str
        Label of the y axis.

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> import pandas as pd
    >>> s = pd.Series([0.1, 0.2, 0.1, 0.3, 0.4, 0.3], index=range(2000, 2006))
    >>> fig = baci_figure(s, s * 0 + 0.2, 2003, metric="water share")
    """
    import matplotlib.pyplot as plt

    paired, _ = _paired(impact, control)
    diff = paired["impact"] - paired["control"]
    fig, (top, bottom) = plt.subplots(2, 1, sharex=True, figsize=(7, 5))
    top.plot(paired.index, paired["impact"], "o-", label="impact")
    top.plot(paired.index, paired["control"], "s--", label="control")
    top.set_ylabel(metric or "value")
    top.legend(loc="best")
    bottom.plot(diff.index, diff, "o-", color="0.3", label="impact - control")
    after = diff.index >= event
    for mask, label in ((~after, "mean before"), (after, "mean after")):
        if mask.any():
            bottom.hlines(diff[mask].mean(), diff.index[mask][0], diff.index[mask][-1], colors="C3",
                          label=label)
    bottom.set_ylabel("difference")
    bottom.legend(loc="best")
    for ax in (top, bottom):
        ax.axvline(event, color="k", linestyle=":")
    fig.tight_layout()
    return fig
