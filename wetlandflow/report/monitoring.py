"""The report's "Change through time" section, read from ``<run folder>/monitor/`` (``wetlandflow monitor``).

Everything comes from the monitoring run's ``manifest.json``, its tables and its figures; nothing is
recomputed here.  Without a monitoring run the section says how to make one.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import pandas as pd

from .blocks import Bullets, Callout, Figure, Paragraph, Section, Table

if TYPE_CHECKING:
    from .run_folder import RunFolder

TITLE = "Change through time (monitoring)"
MAX_ROWS = 12  # rows of a table shown in the report; the CSV holds them all


def _fmt(df: pd.DataFrame) -> pd.DataFrame:
    return df.assign(**{c: [f"{v:.3g}" if pd.notna(v) else "" for v in df[c]]
                        for c in df.columns if df[c].dtype.kind == "f"})


def _figures(run: RunFolder, prefix: str, caption: str) -> list[Figure]:
    folder = run.path / "monitor" / "figures"
    return [Figure(p.name, p.read_bytes(), f"{caption} ({p.stem.removeprefix(prefix).strip('_')}).")
            for p in sorted(folder.glob(f"{prefix}*.png"))] if folder.exists() else []


def _water_text(run: RunFolder, man: dict[str, Any]) -> str:
    water = man["parameters"]["water"]
    parts = []
    if "water_sar" in man["steps"].get("water", {}):
        thr = water["sar_threshold"]
        how = (f"a per-scene threshold on {water['pol']} backscatter in dB by the split-based procedure "
               f"({run.cite('split_threshold', 'SAR water threshold')}: Otsu's threshold "
               f"{run.cite('otsu_threshold', 'SAR water threshold')} on the tiles whose histogram is bimodal)"
               if thr == "split" else f"Otsu's threshold {run.cite('otsu_threshold', 'SAR water threshold')} "
               "on each scene" if thr == "otsu" else f"a fixed threshold of {thr} dB")
        parts.append(f"SAR scenes were mapped to water by {how}")
    if "water_optical" in man["steps"].get("water", {}):
        thr = water["optical_threshold"]
        how = "Otsu's threshold on each scene" if thr == "otsu" else f"a fixed threshold of {thr}"
        parts.append(f"optical scenes by the modified normalized difference water index "
                     f"({run.cite('mndwi_water', 'optical water')}) with {how}, masked pixels left unobserved")
    return "; ".join(parts)


def section_monitoring(run: RunFolder) -> Section:
    man = run.json("monitor/manifest.json")
    if man is None:
        return Section(TITLE, [Paragraph("No monitoring run was made for this project. With a [monitor] section "
                                         "in the project file, `wetlandflow monitor PROJECT.toml` maps water "
                                         "per date and tests trends, before/after-control-impact effects and "
                                         "recovery; this section then reports them.")])
    p = man["parameters"]
    years = [r.get("years") for r in man["steps"].get("trends", {}).values() if isinstance(r, dict)]
    span = next((f" over {y[0]}-{y[1]}" for y in years if y), "")
    blocks: list = [Paragraph(
        f"{man['polygons']['count']} polygon(s) ({man['polygons']['source']}) were followed through the image "
        f"archive{span}, on a grid of {abs(man['grid']['transform'][0]):g} m pixels. "
        + (_water_text(run, man) + ". " if "water" in p["metrics"] else "")
        + f"Dated values were reduced to one per year by their {p['aggregate']}"
        + (f" within {p['season'][0]} to {p['season'][1]}" if p["season"] else "")
        + ". Trends were tested per polygon and per pixel with the Mann-Kendall test "
        f"({run.cite('mann_kendall', 'trend test')}), its variance corrected for autocorrelation "
        f"({run.cite('hamed_rao', 'trend test')}), and measured by the Theil-Sen slope with its confidence "
        f"interval ({run.cite('sen_slope', 'trend slope')}) at alpha = {p['alpha']}; the per-pixel maps control "
        f"the false discovery rate at {p['fdr']} ({run.cite('fdr', 'trend maps')}).")]
    trends = run.csv("monitor/polygon_trends.csv")
    if trends is not None and len(trends):
        cols = ["polygon", "metric", "n", "slope", "slope_lo", "slope_hi", "p", "q"]
        blocks.append(Table(_fmt(trends.sort_values("p")[cols].head(MAX_ROWS)),
                            "Trends per polygon, smallest p first (slope per year; monitor/polygon_trends.csv "
                            "lists every polygon and metric)"))
    maps = [(k, r) for k, r in man["steps"].get("trends", {}).items() if isinstance(r, dict) and "file" in r]
    if maps:
        blocks.append(Bullets(tuple(
            f"{k}: {r['significant_share']:.1%} of the pixels with a trend at q <= {p['fdr']} "
            f"({r['increasing_share']:.1%} increasing, {r['decreasing_share']:.1%} decreasing); "
            f"monitor/trends/{r['file']}" for k, r in maps)))
    blocks += _figures(run, "trend_map_", "Theil-Sen slope per pixel; pixels without a significant trend greyed")
    blocks += _baci_blocks(run, man)
    blocks += _recovery_blocks(run, man)
    blocks += _figures(run, "water_frequency_", "Water frequency per period")
    blocks.append(Callout(man.get("screening", "")))
    return Section(TITLE, blocks)


def _baci_blocks(run: RunFolder, man: dict[str, Any]) -> list:
    table = run.csv("monitor/baci.csv")
    if table is None or not len(table):
        return []
    b = man["parameters"]["baci"]
    text = (f"Before/after-control-impact: the impact site(s) {', '.join(b['impact'])} against the control(s) "
            f"{', '.join(b['control'])}, event {b['event_date']}. The effect is the change, from before to "
            "after the event, of the impact-minus-control difference on matched dates (the paired design of "
            "Stewart-Oaten, Murdoch & Parker 1986, Ecology 67(4), 929-940; Welch's t interval); the interaction "
            "term of the "
            f"two-way model of site and period ({run.cite('baci', 'BACI interaction')}) is given beside it. "
            "Matched dates share weather and season, which the difference removes; what it cannot remove is "
            "anything else that changed at the impact site at the same time.")
    cols = [c for c in ("impact", "metric", "n_before", "n_after", "effect", "effect_lo", "effect_hi", "p",
                        "interaction", "interaction_p") if c in table.columns]
    return [Paragraph(text), Table(_fmt(table[cols]), "Before/after-control-impact effects (monitor/baci.csv)"),
            *_figures(run, "baci_", "Impact and control series and their difference; the event marked")]


def _recovery_blocks(run: RunFolder, man: dict[str, Any]) -> list:
    table = run.csv("monitor/recovery.csv")
    if table is None or not len(table):
        return []
    r = man["parameters"]["recovery"]
    detected = "source" in table.columns and (table["source"] == "detected").any()
    text = (f"Recovery of disturbed patches, on {r['metric']}: the relative recovery indicator, the share of "
            "the pre-disturbance value regained and the years to regain 80 % of it "
            f"({run.cite('recovery', 'recovery indicators')})"
            + (f"; disturbance years not given were detected as the largest downward change point "
               f"({run.cite('pettitt', 'disturbance year')})" if detected else "") + ".")
    return [Paragraph(text), Table(_fmt(table.head(MAX_ROWS)), "Recovery per patch (monitor/recovery.csv)"),
            *_figures(run, "recovery_", "Recovery curve, pre-disturbance baseline and 80 % line")]
