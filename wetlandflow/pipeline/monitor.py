"""The monitoring run: an archive of dated scenes -> water maps, per-polygon series, trends, BACI, recovery.

``wetlandflow monitor PROJECT.toml`` (and :func:`monitor_project`) reads the ``[monitor]`` section, brings
the archive's scenes onto a grid over the AOI (the archive's own pixel unless ``monitor.pixel_size_m`` says
otherwise), and writes into ``<run folder>/monitor/``:

* ``water/<source>.zarr``: one water map per date (1 water, 0 dry, NaN not observed), kept per date so a
  new scene is computed alone (:class:`~wetlandflow.monitoring.water_store.WaterSeriesStore`); and
  ``water/<source>_frequency.tif`` / ``_hydroperiod.tif`` per period;
* ``series.parquet`` (every metric per polygon and date), ``water_area.parquet``, ``annual.csv``;
* ``polygon_trends.csv`` and, with ``trend_maps``, ``trends/<metric>_trend.tif`` (Sen slope, its CI,
  Mann-Kendall p, Benjamini-Hochberg q);
* ``baci.csv`` and ``recovery.csv`` when those analyses are configured;
* ``figures/*.png`` and ``manifest.json`` (inputs, parameters, what each step computed or reused).

It holds the run folder's lock, so a map run and a monitoring run never write the same folder at once.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from ..errors import InputFileError, MonitoringDesignError, ProjectFileError, WetlandflowError
from ..inputs.grid import Grid
from ..inputs.io import fingerprint, read_vector, write_figure, write_json, write_table
from ..inputs.layers import load_optical, load_sar, project_grid, read_aoi
from ..inputs.project import GridSection, Project, load_project, scene_files
from ..progress import say, step_lines

SCREENING = ("Screening-level model product, not a legal delineation: trends, BACI effects and recovery "
             "figures describe the image archive, not the ground; defer to local regulations and qualified "
             "professionals before any permit or land decision.")


@dataclass
class MonitorResult:
    """What a finished monitoring run returns: its folder, its manifest and the headline tables."""

    out_dir: Path
    manifest: dict[str, Any]
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)

    def summary(self) -> str:
        return format_monitor_summary(self)


# -- the archive on a grid -------------------------------------------------------------------------------
def archive_project(project: Project) -> Project:
    """The project seen through its archive: ``[monitor]``'s scenes, no DEM, the archive's pixel."""
    m = _section(project)
    grid = GridSection(crs=project.grid.crs, pixel_size_m=m.pixel_size_m,
                       align_to="optical" if m.optical else "sar")
    return dataclasses.replace(project, optical=m.optical, sar=m.sar, dem=None, grid=grid)


def _section(project: Project):
    if project.monitor is None:
        raise ProjectFileError("the project has no [monitor] section; add one (docs/project-file.md, "
                               "[monitor]) naming the polygons and metrics to follow", key="monitor",
                               file=str(project.file))
    return project.monitor


def check_metrics(project: Project) -> list[str]:
    """Refuse metrics the archive cannot give (names the metric, the bands it needs and the fix)."""
    from ..features.optical import OPTICAL_INDICES

    m = _section(project)
    bands = list(m.optical[0].bands) if m.optical else []
    probe = xr.DataArray(np.full((len(bands), 1, 1), 0.2, np.float32), dims=("band", "y", "x"),
                         coords={"band": bands})
    for name in m.metrics:
        if name == "water":
            continue
        if name not in OPTICAL_INDICES:
            raise ProjectFileError(f"unknown metric {name!r}; metrics are \"water\" and the optical indices "
                                   f"{', '.join(OPTICAL_INDICES)}", key="monitor.metrics",
                                   file=str(project.file))
        if not bands:
            raise ProjectFileError(f"metric {name!r} is an optical index, and the archive has no optical "
                                   "scene: add [[monitor.optical]] tables or keep only \"water\"",
                                   key="monitor.metrics", file=str(project.file))
        try:
            OPTICAL_INDICES[name](probe)
        except (WetlandflowError, KeyError) as exc:
            raise ProjectFileError(f"metric {name!r} cannot be computed from the archive's bands {bands}: "
                                   f"{exc}. Remove it from monitor.metrics", key="monitor.metrics",
                                   file=str(project.file)) from None
    return list(m.metrics)


def monitor_polygons(project: Project, grid: Grid):
    """The polygons summarised, in the grid's CRS, with a string ``polygon`` column naming each."""
    m = _section(project)
    if m.polygons == "aoi":
        gdf = read_aoi(project)
        gdf = gdf.assign(polygon=[f"aoi_{i + 1}" for i in range(len(gdf))])
    else:
        if m.polygons == "inventory":
            path = project.run_dir / "inventory.gpkg"
            if not path.exists():
                raise InputFileError("monitor.polygons = \"inventory\" needs the run's polygons, and the run "
                                     "folder has none: run `wetlandflow run` on the project first, or name a "
                                     "polygon file", path=str(path))
            layer, default_id = "inventory", "polygon_id"
        else:
            path, layer, default_id = (project.root / m.polygons).resolve(), m.layer or None, ""
        gdf = read_vector(path, layer=layer, what="monitoring polygon file", key="monitor.layer")
        column = m.id_field or default_id
        if column and column not in gdf.columns:
            raise ProjectFileError(f"the polygons in {path.name} have no column {column!r}; columns are "
                                   f"{[c for c in gdf.columns if c != 'geometry']}. Set monitor.id_field",
                                   key="monitor.id_field", file=str(project.file))
        names = (gdf[column].astype(str) if column
                 else pd.Series([f"polygon_{i + 1}" for i in range(len(gdf))]))
        if names.duplicated().any():
            repeated = sorted(set(names[names.duplicated()]))
            raise ProjectFileError(f"polygon names repeat in column {column!r}: {repeated}; give each "
                                   "polygon its own name",
                                   key="monitor.id_field", file=str(project.file))
        gdf = gdf.assign(polygon=names.to_numpy())
    if gdf.crs is None:
        raise InputFileError("the monitoring polygons have no CRS; assign one and save again",
                             path=str(m.polygons))
    gdf = gdf.to_crs(grid.crs)
    for role, names in _named_sites(m).items():
        missing = sorted(set(names) - set(gdf["polygon"]))
        if missing:
            raise ProjectFileError(f"{missing} are not polygon names; names are "
                                   f"{sorted(gdf['polygon'])[:20]}", key=f"monitor.{role}",
                                   file=str(project.file))
    return gdf


def _named_sites(m) -> dict[str, tuple[str, ...]]:
    out = {}
    if m.baci is not None:
        out |= {"baci.impact": m.baci.impact, "baci.control": m.baci.control}
    if m.recovery is not None:
        out["recovery.patches"] = m.recovery.patches
    return out


# -- dated metrics ---------------------------------------------------------------------------------------
def _scene_key(scene, params: dict) -> str:
    files = [fingerprint(p) for p, _ in scene_files(scene)]
    return json.dumps({"files": files, **params}, sort_keys=True, default=str)


def _water_store(out_dir: Path, source: str, stack: xr.DataArray, scenes, params: dict, mapper):
    """Per-date water maps of one source through the append-only store: unchanged dates are not recomputed."""
    from ..monitoring.water_store import DatedInput, WaterSeriesStore

    store = WaterSeriesStore(out_dir / "water" / f"{source}.zarr")
    by_date = {np.datetime64(s.date, "ns"): s for s in scenes}
    items = [DatedInput(date=pd.Timestamp(t).date(), key=_scene_key(by_date[t], params),
                        load=(lambda t=t: mapper(stack.sel(time=[t]))))
             for t in stack["time"].values]
    report = store.update(items)
    return store.open(), report


def dated_metrics(project: Project, grid: Grid, out_dir: Path, *, progress: bool = True
                  ) -> tuple[dict[str, xr.DataArray], dict[str, Any]]:
    """Every metric per date on the grid: ``{name: (time, y, x)}``; water as ``water_optical`` and
    ``water_sar`` (from each source the archive has), the indices from the optical scenes."""
    from ..features.optical import OPTICAL_INDICES
    from ..monitoring.water_series import optical_water, sar_water

    m = _section(project)
    arch = archive_project(project)
    chunks = project.output.chunk_size
    stacks: dict[str, xr.DataArray] = {}
    record: dict[str, Any] = {}
    refl = load_optical(arch, grid, chunks=chunks)
    if refl is not None:
        for name in [n for n in m.metrics if n != "water"]:
            stacks[name] = OPTICAL_INDICES[name](refl)
        if "water" in m.metrics:
            params = {"threshold": m.water.optical_threshold, "index": "mndwi"}
            water, rep = _water_store(out_dir, "optical", refl, arch.optical, params,
                                      lambda r: optical_water(OPTICAL_INDICES["mndwi"](r),
                                                              threshold=m.water.optical_threshold))
            stacks["water_optical"], record["water_optical"] = water, _report_dict(rep)
    if "water" in m.metrics and arch.sar:
        sar = load_sar(arch, grid, chunks=chunks)
        params = {"threshold": m.water.sar_threshold, "pol": m.water.pol}
        water, rep = _water_store(out_dir, "sar", sar, arch.sar, params,
                                  lambda s: sar_water(s, pol=m.water.pol, threshold=m.water.sar_threshold))
        stacks["water_sar"], record["water_sar"] = water, _report_dict(rep)
    for name, rec in record.items():
        say(f"  {name}: {len(rec.get('computed', []))} date(s) computed, {len(rec.get('kept', []))} kept",
            enabled=progress)
    return stacks, record


def _report_dict(report) -> dict[str, Any]:
    if dataclasses.is_dataclass(report):
        report = dataclasses.asdict(report)
    return {k: [str(d) for d in v] if isinstance(v, list | tuple) else v for k, v in dict(report).items()}


# -- writing ---------------------------------------------------------------------------------------------
def write_bands_cog(values: np.ndarray, grid: Grid, names: list[str], dst: Path, *, nodata: float = np.nan,
                    tags: dict[str, str] | None = None) -> Path:
    """A float32 multi-band Cloud-Optimized GeoTIFF on ``grid`` with band descriptions (staged, atomic)."""
    import rasterio

    from ..mapping.predict import build_cog

    dst.parent.mkdir(parents=True, exist_ok=True)
    stage = dst.with_name(f".{dst.stem}.stage.tif")
    profile = {"driver": "GTiff", "dtype": "float32", "count": values.shape[0], "height": grid.height,
               "width": grid.width, "crs": grid.crs, "transform": grid.transform, "nodata": nodata,
               "tiled": True, "blockxsize": 256, "blockysize": 256, "compress": "deflate", "predictor": 3}
    with rasterio.open(stage, "w", **profile) as out:
        out.write(values.astype(np.float32))
        for i, name in enumerate(names, start=1):
            out.set_band_description(i, name)
        out.update_tags(**(tags or {}))
    build_cog(stage, dst, overview_resampling="average")
    stage.unlink()
    return dst


def _pixel_trends(name: str, stack: xr.DataArray, m, grid: Grid, out_dir: Path) -> dict[str, Any]:
    from ..monitoring.trends import annual_values, false_discovery, mann_kendall, trend_map_figure

    annual = annual_values(stack, time_dim="time", how=m.aggregate, season=tuple(m.season) or None)
    if annual.sizes["year"] < 4:
        return {"skipped": f"{annual.sizes['year']} year(s) of {name}; a trend needs at least 4"}
    ds = mann_kendall(annual, dim="year", alpha=m.alpha).compute()
    ds["q"] = false_discovery(ds["p"])
    bands = ["slope", "slope_lo", "slope_hi", "p", "q"]
    path = write_bands_cog(np.stack([ds[b].values for b in bands]), grid, bands,
                           out_dir / "trends" / f"{name}_trend.tif",
                           tags={"units_slope": str(ds["slope"].attrs.get("units", "")),
                                 "method": "Mann-Kendall (Hamed & Rao 1998 variance) and Theil-Sen slope; "
                                           "q: Benjamini & Hochberg (1995)"})
    write_figure(trend_map_figure(ds, q_max=m.fdr), out_dir / "figures" / f"trend_map_{name}.png")
    significant = np.isfinite(ds["q"].values) & (ds["q"].values <= m.fdr)
    return {"file": path.name, "years": [int(annual["year"].min()), int(annual["year"].max())],
            "significant_share": float(significant.mean()),
            "increasing_share": float((significant & (ds["slope"].values > 0)).mean()),
            "decreasing_share": float((significant & (ds["slope"].values < 0)).mean())}


def _water_summaries(source: str, water: xr.DataArray, m, grid: Grid, out_dir: Path) -> dict[str, Any]:
    from ..monitoring.water_figures import water_frequency_figure
    from ..monitoring.water_series import hydroperiod_days, water_frequency

    seasons = {"monitor": tuple(m.season)} if m.season else None
    freq = water_frequency(water, period=m.water.period, seasons=seasons).compute()
    days = hydroperiod_days(water, period=m.water.period).compute()
    periods = [str(p) for p in freq[freq.dims[0]].values]
    write_bands_cog(freq.values, grid, periods, out_dir / "water" / f"{source}_frequency.tif")
    write_bands_cog(days.values, grid, [str(p) for p in days[days.dims[0]].values],
                    out_dir / "water" / f"{source}_hydroperiod.tif")
    write_figure(water_frequency_figure(freq), out_dir / "figures" / f"water_frequency_{source}.png")
    return {"periods": periods, "dates": int(water.sizes["time"])}


# -- the run ---------------------------------------------------------------------------------------------
class _Steps:
    """Progress lines per step and, with a task control (the notebook panel's), a cancel point before each
    step and the step count for its progress bar."""

    TOTAL = 8

    def __init__(self, progress: bool, control: Any = None) -> None:
        self.progress, self.control, self.done = progress, control, 0

    def __call__(self, name: str):
        if self.control is not None:
            self.control.check()
            self.control.report(name, self.done, self.TOTAL)
        self.done += 1
        return step_lines(f"monitor: {name}", enabled=self.progress)


def monitor_project(project: Project | str | Path, *, progress: bool = True, control: Any = None
                    ) -> MonitorResult:
    """Run the ``[monitor]`` analyses of a project into ``<run folder>/monitor/``.

    ``control`` (optional) is a task control with ``check()`` and ``report(stage, done, total)``, such as
    the notebook panel's: cancelling stops before the next step, keeping the water maps already stored.

    Raises
    ------
    ProjectFileError, InputFileError, MonitoringDesignError
        With the key or file concerned and the fix.
    """
    from .lock import run_folder_lock

    if not isinstance(project, Project):
        project = load_project(project)
    m = _section(project)
    check_metrics(project)
    run_dir = project.run_dir
    run_dir.mkdir(parents=True, exist_ok=True)
    with run_folder_lock(run_dir, f"monitor {project.file.name}"):
        return _monitor(project, m, run_dir / "monitor", _Steps(progress, control))


def _monitor(project: Project, m, out_dir: Path, step: _Steps) -> MonitorResult:
    from ..monitoring.zonal import annual_table, zonal_series, zone_ids

    t0 = time.time()
    manifest: dict[str, Any] = {"project": project.project.name, "started": dt.datetime.now().isoformat(
        timespec="seconds"), "parameters": json.loads(json.dumps(dataclasses.asdict(m), default=str)),
        "screening": SCREENING, "steps": {}}
    tables: dict[str, pd.DataFrame] = {}
    progress = step.progress
    with step("archive grid and polygons"):
        grid = project_grid(archive_project(project))
        polygons = monitor_polygons(project, grid)
        manifest["grid"] = grid.to_dict()
        manifest["polygons"] = {"source": m.polygons, "count": int(len(polygons))}
    with step("water maps and indices per date"):
        stacks, manifest["steps"]["water"] = dated_metrics(project, grid, out_dir, progress=progress)
    with step("series per polygon"):
        ids, names = zone_ids(polygons, next(iter(stacks.values())), id_field="polygon")
        pixel_ha = abs(grid.transform.a * grid.transform.e) / 1e4
        series = pd.concat([zonal_series(s, ids, names, metric=k, pixel_area_ha=pixel_ha)
                            for k, s in stacks.items()], ignore_index=True)
        write_table(series, out_dir / "series.parquet")
        annual = annual_table(series, how=m.aggregate, season=m.season)
        write_table(annual, out_dir / "annual.csv")
        tables |= {"series": series, "annual": annual}
        water = series[series["metric"].str.startswith("water")]
        if not water.empty:
            area = water.assign(water_ha=water["value"] * water["observed_share"] * water["area_ha"])
            write_table(area, out_dir / "water_area.parquet")
    manifest["steps"]["trends"] = _trends(m, annual, stacks, grid, out_dir, tables, step)
    if m.baci is not None:
        manifest["steps"]["baci"] = _baci(m, series, out_dir, tables, step)
    if m.recovery is not None:
        manifest["steps"]["recovery"] = _recovery(m, annual, polygons, out_dir, tables, step)
    for source, stack in stacks.items():
        if source.startswith("water_"):
            with step(f"frequency and hydroperiod ({source})"):
                manifest["steps"][f"{source}_summaries"] = _water_summaries(source.split("_", 1)[1], stack, m,
                                                                             grid, out_dir)
    manifest["seconds"] = round(time.time() - t0, 1)
    write_json(manifest, out_dir / "manifest.json")
    return MonitorResult(out_dir, manifest, tables)


def _wide(table: pd.DataFrame, index: list[str]) -> pd.DataFrame:
    return table.pivot_table(index=index, columns="metric", values="value").reset_index()


def _trends(m, annual: pd.DataFrame, stacks, grid: Grid, out_dir: Path, tables, step: _Steps) -> dict:
    from ..monitoring.trends import polygon_trends

    rec: dict[str, Any] = {}
    with step("trends per polygon"):
        wide = _wide(annual, ["polygon", "year"])
        metrics = [c for c in wide.columns if c not in ("polygon", "year")]
        trends = polygon_trends(wide, id_col="polygon", year_col="year", value_cols=metrics, alpha=m.alpha)
        write_table(trends, out_dir / "polygon_trends.csv")
        tables["polygon_trends"] = trends
        rec["polygons"] = {"rows": int(len(trends)), "significant_q": int((trends["q"] <= m.fdr).sum())}
    if m.trend_maps:
        for name, stack in stacks.items():
            with step(f"trend map ({name})"):
                rec[name] = _pixel_trends(name, stack, m, grid, out_dir)
    return rec


def _baci(m, series: pd.DataFrame, out_dir: Path, tables, step: _Steps) -> dict:
    from ..monitoring.baci_analysis import baci_figure, baci_table

    with step("before/after-control-impact"):
        dated = series[series["observed_share"] >= 0.5]
        wide = _wide(dated, ["polygon", "date"])
        event = pd.Timestamp(m.baci.event_date)
        metrics, skipped = list(m.baci.metrics), {}
        if not metrics:  # every metric observed on both sides of the event (a SAR season may lie on one)
            for c in (c for c in wide.columns if c not in ("polygon", "date")):
                dates = wide.loc[wide[c].notna(), "date"]
                if (dates < event).any() and (dates >= event).any():
                    metrics.append(c)
                else:
                    skipped[c] = "no observation on one side of the event"
        table = baci_table(wide, id_col="polygon", date_col="date", metrics=metrics, impact=m.baci.impact,
                           control=m.baci.control, event=m.baci.event_date)
        write_table(table, out_dir / "baci.csv")
        tables["baci"] = table
        control = wide[wide["polygon"].isin(m.baci.control)].groupby("date")[metrics].mean()
        for site in m.baci.impact:
            impact = wide[wide["polygon"] == site].set_index("date")
            for metric in metrics:
                fig = baci_figure(impact[metric], control[metric], event, metric=metric)
                write_figure(fig, out_dir / "figures" / f"baci_{site}_{metric}.png")
    return {"rows": int(len(table)), "event_date": m.baci.event_date.isoformat(), "skipped": skipped}


def _recovery(m, annual: pd.DataFrame, polygons, out_dir: Path, tables, step: _Steps) -> dict:
    from ..monitoring.recovery import recovery_figure, recovery_table

    r = m.recovery
    with step("recovery of disturbed patches"):
        given: dict[str, int | None] = {}
        for name in r.patches:
            value = None
            if r.date_field:
                if r.date_field not in polygons.columns:
                    raise ProjectFileError(f"the polygons have no column {r.date_field!r}; set "
                                           "monitor.recovery.date_field to the disturbance-year column, "
                                           "or \"\" to detect the year", key="monitor.recovery.date_field")
                raw = polygons.loc[polygons["polygon"] == name, r.date_field].iloc[0]
                value = None if pd.isna(raw) or str(raw).strip() == "" else int(str(raw)[:4])
            given[name] = value
        sub = annual[(annual["metric"] == r.metric) & annual["polygon"].isin(r.patches)]
        if sub.empty:
            raise MonitoringDesignError(f"no annual {r.metric!r} values for the patches {list(r.patches)}; "
                                        f"add {r.metric!r} to monitor.metrics")
        wide = sub.pivot_table(index=["polygon", "year"], values="value").reset_index().rename(
            columns={"value": r.metric})
        table = recovery_table(wide, id_col="polygon", year_col="year", metric=r.metric, disturbance=given,
                               post_years=r.post_years, alpha=m.alpha)
        write_table(table, out_dir / "recovery.csv")
        tables["recovery"] = table
        for _, row in table.iterrows():
            s = wide[wide["polygon"] == row["polygon"]].set_index("year")[r.metric]
            write_figure(recovery_figure(s, row.to_dict(), title=str(row["polygon"])),
                         out_dir / "figures" / f"recovery_{row['polygon']}.png")
    return {"rows": int(len(table))}


# -- the summary -----------------------------------------------------------------------------------------
def format_monitor_summary(result: MonitorResult) -> str:
    """The lines the CLI prints after a monitoring run: totals first, then each analysis, then the caveat."""
    man, t = result.manifest, result.tables
    series = t.get("series")
    n_dates = 0 if series is None else series["date"].nunique()
    lines = [f"Monitoring written to {result.out_dir}",
             f"  {man['polygons']['count']} polygon(s) ({man['polygons']['source']}), {n_dates} date(s)"]
    for name, rec in man["steps"].get("water", {}).items():
        lines.append(f"  {name}: {len(rec.get('computed', []))} date(s) computed, {len(rec.get('kept', []))} "
                     "reused")
    trends = t.get("polygon_trends")
    if trends is not None and len(trends):
        lines.append("  Trends per polygon (Theil-Sen slope per year, Mann-Kendall with Hamed-Rao variance):")
        for row in trends.sort_values("p").head(8).itertuples():
            lines.append(f"    {row.polygon:<16} {row.metric:<14} {row.slope:+.4g}/yr "
                         f"[{row.slope_lo:+.3g}, {row.slope_hi:+.3g}]  p = {row.p:.3g}  q = {row.q:.3g}")
    baci = t.get("baci")
    if baci is not None and len(baci):
        lines.append("  Before/after-control-impact (impact minus control, after minus before):")
        for row in baci.itertuples():
            lines.append(f"    {row.impact:<16} {row.metric:<14} {row.effect:+.4g} "
                         f"[{row.effect_lo:+.3g}, {row.effect_hi:+.3g}]  p = {row.p:.3g}")
    rec = t.get("recovery")
    if rec is not None and len(rec):
        lines.append("  Recovery of disturbed patches:")
        for row in rec.to_dict("records"):
            lines.append("    " + ", ".join(f"{k} {v:.4g}" if isinstance(v, float) else f"{k} {v}"
                                           for k, v in row.items()))
    lines.append(f"  {SCREENING}")
    return "\n".join(lines)
