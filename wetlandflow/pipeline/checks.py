"""Checks of a run's outputs: before a cached step is reused, and after a map is written.

A step's fingerprints (see :class:`~wetlandflow.pipeline.manifest.Manifest`) say whether its files
changed; the checks here look at what the files mean: a model bundle trained on other samples, an area
table that no longer holds the final map's pixel counts, a map with a block GDAL failed to write.
"""

from __future__ import annotations

import errno
from pathlib import Path

import numpy as np
import pandas as pd

from ..inputs.io import disk_full_error
from ..inputs.project import Project
from ..mapping.predict import class_areas, code_counts


def missing_files(folder: Path, names: tuple[str, ...]) -> list[str]:
    return [f"{folder.name}/{n} is missing" for n in names if not (folder / n).exists()]


def bundle_mismatch(model_dir: Path, training_hash: str, features: list[str]) -> list[str]:
    """Why the model bundle in the run folder is not the one this run's samples would train (empty if it is):
    its ``training_data_sha256`` must equal the samples' hash, its features the model's features."""
    import json

    try:
        bundle = json.loads((model_dir / "bundle.json").read_text())
    except (OSError, ValueError):
        return ["model/bundle.json is missing or unreadable"]
    reasons = []
    if bundle.get("training_data_sha256") != training_hash:
        reasons.append(f"the model bundle was trained on other data (its training_data_sha256 "
                       f"{str(bundle.get('training_data_sha256'))[:12]}... is not the hash of this run's "
                       f"samples, {training_hash[:12]}...)")
    if list(bundle.get("features", [])) != list(features):
        reasons.append("the model bundle's features are not this run's model features")
    return reasons


def inventory_areas(final_path: Path, class_names: tuple[str, ...], pixel_area_m2: float) -> pd.DataFrame:
    """Areas of the final map, with those of the per-pixel map (``class.tif`` beside it) before the MMU."""
    from ..accuracy.assessment import with_before_mmu

    mapped = class_areas(final_path, class_names, pixel_area_m2)
    raw = Path(final_path).with_name("class.tif")
    return with_before_mmu(mapped, class_areas(raw, class_names, pixel_area_m2)) if raw.exists() else mapped


def areas_mismatch(areas_path: Path, final_path: Path, project: Project, grid) -> list[str]:
    """Why ``areas.csv`` does not hold the final map's areas in the fixed columns (empty if it does)."""
    from ..accuracy.assessment import AREAS_COLUMNS, MAPPED_AREA_COLUMNS

    try:
        table = pd.read_csv(areas_path)
    except (OSError, ValueError):
        return ["areas.csv is missing or unreadable"]
    if tuple(table.columns) != AREAS_COLUMNS:
        return [f"areas.csv has the columns {list(table.columns)}, not {list(AREAS_COLUMNS)}"]
    mapped = inventory_areas(final_path, project.classes.names, grid.pixel_area_m2)
    same = (table["class"].astype(str).tolist() == mapped["class"].tolist()
            and np.array_equal(table["pixels"].to_numpy(), mapped["pixels"].to_numpy())
            and all(np.allclose(table[c].to_numpy(np.float64), mapped.reindex(columns=[c])[c].to_numpy(np.float64),
                                rtol=1e-9, atol=0, equal_nan=True) for c in MAPPED_AREA_COLUMNS[2:]))
    return [] if same else ["the mapped areas in areas.csv differ from the final map's pixel counts"]


def areas_with_assessment(run_dir: Path, mapped: pd.DataFrame) -> pd.DataFrame:
    """``areas.csv`` for the final map: with the error-adjusted areas of the assessment in ``accuracy/`` when
    one of this very map is there (a new map sets an earlier assessment aside first), else empty."""
    import json

    from ..accuracy.assessment import ACCURACY_DIR, areas_table

    table = run_dir / ACCURACY_DIR / "area_table.csv"
    if not table.exists():
        return areas_table(mapped)
    try:
        confidence = json.loads((run_dir / ACCURACY_DIR / "summary.json").read_text()).get("confidence")
    except (OSError, ValueError):
        confidence = None
    return areas_table(mapped, pd.read_csv(table), confidence=confidence)


def check_class_map_complete(path: Path, aoi, n_classes: int, *, step: str) -> None:
    """Refuse a class map with no class at a pixel inside the area of interest (or a code beyond the scheme).

    Every pixel inside the AOI is classified, so a gap there means a block of the file was never
    written: GDAL reports a failed block write (a full disk) only on standard error, and the gap would
    otherwise count as no area at all.  Raises the disk-full :class:`~wetlandflow.errors.OutputError`.
    """
    from ..mapping.predict import CLASS_NODATA

    counts = code_counts(path, 256)
    beyond = int(counts[n_classes + 1:].sum())
    _refuse_gaps(path, int(counts[CLASS_NODATA]) - _outside(aoi), step,
                 f" and {beyond} a code beyond the {n_classes} classes" if beyond else "")


def check_layer_complete(path: Path, aoi, *, step: str) -> None:
    """Refuse a map layer (probability, confidence) with no value in band 1 at a pixel inside the area of
    interest: its tiles hold every band, so an unwritten tile shows in band 1 (see
    :func:`check_class_map_complete`)."""
    import rasterio

    empty = 0
    with rasterio.open(path) as src:
        nodata = src.nodata
        for _, w in src.block_windows(1):
            band = src.read(1, window=w)
            gap = np.isnan(band) if nodata is None or np.isnan(nodata) else band == nodata
            empty += int(gap.sum())
    _refuse_gaps(path, empty - _outside(aoi), step, "")


def _outside(aoi) -> int:
    return int(aoi.size - int(aoi.sum()))


def _refuse_gaps(path: Path, unmapped: int, step: str, more: str) -> None:
    if unmapped == 0 and not more:
        return
    cause = OSError(errno.ENOSPC, f"{unmapped} pixel(s) inside the area of interest have no value{more}, "
                                  "so a block of the map was not written (GDAL reports a failed block write "
                                  "only on standard error)")
    raise disk_full_error(cause, path.parent, path=path, step=step)


def staged_map_sizes(grid, n_classes: int) -> dict[str, int]:
    """Bytes of the largest staged map files (uncompressed 256 x 256 tiles: probability and confidence)."""
    tiles = -(-grid.height // 256) * -(-grid.width // 256) * 256 * 256
    return {"maps/.stage/probability.tif": tiles * n_classes * 4 + (1 << 16),
            "maps/.stage/confidence.tif": tiles * 3 * 4 + (1 << 16)}
