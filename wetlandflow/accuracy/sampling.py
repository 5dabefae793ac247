"""Sample design for accuracy assessment: sample size, allocation, drawing, labelling round trip.

The workflow is: read the class shares with :func:`mapped_proportions`, choose ``n`` with
:func:`sample_size_overall`, split it over the map classes
(strata) with :func:`allocate`, draw pixel-centre points with :func:`draw_stratified_sample`, write
them with :func:`write_sample` for photo-interpreters to fill ``reference_class``, read them back with
:func:`read_labelled_sample`, and estimate areas and accuracies with :func:`estimates_from_sample`.

Maps are classified rasters (``xr.DataArray`` with dims ``("y", "x")``, pixel-centre coordinates in
metres, a CRS readable as ``class_map.rio.crs``).  Class code 0, NaN and the map's ``rio.nodata``
mean "no data" and are never sampled.  Sampling reads the whole map into memory (one integer array);
it is a global operation.

References
----------
Cochran, W. G. (1977). *Sampling Techniques*, 3rd ed. Wiley.
Olofsson, P., Foody, G. M., Herold, M., Stehman, S. V., Woodcock, C. E., Wulder, M. A. (2014). Good
practices for estimating area and assessing accuracy of land change. *Remote Sensing of Environment*
148, 42-57.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import shapely
import xarray as xr

from ..errors import AlignmentError, InputFileError, OutputError, ValidationDesignError
from ..inputs.io import write_vector
from .estimators import AreaAccuracyResult, error_matrix, simple_random_estimates, stratified_estimates

__all__ = [
    "SAMPLE_COLUMNS",
    "allocate",
    "draw_stratified_sample",
    "estimates_from_sample",
    "expected_overall_se",
    "mapped_proportions",
    "read_map_classes",
    "read_labelled_sample",
    "sample_size_overall",
    "write_map_classes",
    "write_sample",
]

SAMPLE_COLUMNS = ("sample_id", "map_class", "x", "y", "reference_class")
# What the interpreters get: no map class, so that the map cannot steer the labels (it goes to a separate
# table, keyed by sample_id, that the assessment joins back).
INTERPRETER_COLUMNS = ("sample_id", "x", "y", "reference_class")
MAP_CLASS_COLUMNS = ("sample_id", "map_class")
_METHODS = ("proportional", "equal", "min_per_class")
_DESIGNS = ("stratified", "simple_random", "systematic")
_MAX_LISTED = 15


# -- sample size and allocation ------------------------------------------------------------------------


def _aligned(values: Mapping[Any, float] | Sequence[float], keys: list[Any] | None, what: str) -> np.ndarray:
    if isinstance(values, Mapping):
        if keys is not None and set(values) != set(keys):
            raise ValidationDesignError(
                f"{what} must name the same classes as mapped_proportions {keys}, got {list(values)}."
            )
        return np.array([values[k] for k in (keys or list(values))], dtype=float)
    return np.asarray(values, dtype=float)


def _proportions(mapped_proportions: Mapping[Any, float] | Sequence[float]) -> tuple[list[Any], np.ndarray]:
    keys = list(mapped_proportions) if isinstance(mapped_proportions, Mapping) else None
    w = _aligned(mapped_proportions, None, "mapped_proportions")
    if w.ndim != 1 or w.size < 1 or not np.isfinite(w).all() or (w < 0).any() or abs(w.sum() - 1) > 1e-6:
        raise ValidationDesignError(
            f"mapped_proportions must be >= 0 and sum to 1, got {w.tolist()} (sum {w.sum():.6g}); "
            "divide each class's mapped area by the total mapped area."
        )
    return (keys if keys is not None else list(range(w.size))), w


def sample_size_overall(
    mapped_proportions: Mapping[Any, float] | Sequence[float],
    expected_users: Mapping[Any, float] | Sequence[float],
    target_se: float,
) -> int:
    """Total sample size for a target standard error of overall accuracy (stratified random sample).

    ``n = (sum_i W_i S_i / S(O))^2`` with ``S_i = sqrt(U_i (1 - U_i))``, rounded up (Cochran 1977,
    eq. 5.25; Olofsson et al. 2014, eq. 13).

    Parameters
    ----------
    mapped_proportions : dict or sequence
        W_i, the mapped area proportion of each stratum (sum 1).
    expected_users : dict or sequence
        Anticipated user's accuracy U_i of each stratum (same classes/order).
    target_se : float
        Target standard error S(O) of overall accuracy, e.g. 0.01.

    Returns
    -------
    int

    Examples
    --------
    >>> sample_size_overall([0.02, 0.015, 0.32, 0.645], [0.70, 0.60, 0.90, 0.95], 0.01)
    641
    """
    keys, w = _proportions(mapped_proportions)
    users = _aligned(
        expected_users, keys if isinstance(mapped_proportions, Mapping) else None, "expected_users"
    )
    if users.shape != w.shape or not ((users >= 0) & (users <= 1)).all():
        raise ValidationDesignError(
            f"expected_users must give one accuracy in [0, 1] per class ({w.size}), got {users.tolist()}."
        )
    if not target_se > 0:
        raise ValidationDesignError(f"target_se must be > 0, got {target_se!r}; e.g. 0.01.")
    n = (np.sum(w * np.sqrt(users * (1 - users))) / target_se) ** 2
    return max(int(math.ceil(n - 1e-9)), 1)  # the tolerance stops float noise adding a unit


def expected_overall_se(
    mapped_proportions: Mapping[Any, float] | Sequence[float],
    expected_users: Mapping[Any, float] | Sequence[float],
    allocation: Mapping[Any, int] | Sequence[int],
) -> float:
    """Standard error of overall accuracy that a stratified sample would give if each stratum's user's
    accuracy came out as expected.

    The variance is the one the stratified estimator reports (Olofsson et al. 2014; the ratio estimator of
    :mod:`wetlandflow.accuracy.estimators`): ``sum_i W_i^2 U_i (1 - U_i) / (n_i - 1)``, a stratum with fewer
    than two points adding nothing (as there).

    Parameters
    ----------
    mapped_proportions : dict or sequence
        W_i, the mapped area proportion of each stratum (sum 1).
    expected_users : dict or sequence
        Anticipated user's accuracy U_i of each stratum.
    allocation : dict or sequence
        n_i, points per stratum.

    Examples
    --------
    >>> round(expected_overall_se([0.5, 0.5], [0.9, 0.8], [101, 101]), 5)
    0.0125
    """
    keys, w = _proportions(mapped_proportions)
    keyed = keys if isinstance(mapped_proportions, Mapping) else None
    users = _aligned(expected_users, keyed, "expected_users")
    n = _aligned(allocation, keyed, "allocation")
    if users.shape != w.shape or n.shape != w.shape:
        raise ValidationDesignError(
            f"expected_users and allocation must give one value per class ({w.size}), got {users.tolist()} "
            f"and {n.tolist()}."
        )
    per_stratum = np.where(n > 1, w**2 * users * (1 - users) / np.maximum(n - 1, 1), 0.0)
    return float(np.sqrt(per_stratum.sum()))


def allocate(
    n: int,
    mapped_proportions: Mapping[Any, float] | Sequence[float],
    *,
    method: str = "proportional",
    min_per_class: int = 50,
) -> dict[Any, int]:
    """Split a total sample size over strata.

    Parameters
    ----------
    n : int
        Total sample size.
    mapped_proportions : dict or sequence
        Mapped area proportion of each stratum (sum 1); keys become the keys of the result.
    method : {"proportional", "equal", "min_per_class"}
        ``"proportional"``: n W_i; ``"equal"``: n / K each; ``"min_per_class"``: every stratum gets at
        least ``min_per_class`` and the rest is shared in proportion to area (the allocation used in
        the Olofsson et al. 2014 example).  Strata with zero mapped area get 0.
    min_per_class : int
        Floor for ``"min_per_class"``.  50 per class is a rule of thumb (common practice, no source).

    Returns
    -------
    dict
        Stratum -> sample size; the sizes sum to ``n`` (largest-remainder rounding).

    Examples
    --------
    >>> allocate(641, [0.02, 0.015, 0.32, 0.645], method="min_per_class", min_per_class=75)
    {0: 75, 1: 75, 2: 163, 3: 328}
    """
    keys, w = _proportions(mapped_proportions)
    if method not in _METHODS:
        raise ValidationDesignError(f"method must be one of {list(_METHODS)}, got {method!r}.")
    if int(n) != n or n < 1:
        raise ValidationDesignError(f"n must be a positive integer, got {n!r}.")
    live = w > 0
    if method == "proportional":
        sizes = _round_shares(n * w, n)
    elif method == "equal":
        sizes = _round_shares(np.where(live, n / live.sum(), 0.0), n)
    else:
        sizes = _floored_shares(int(n), w, int(min_per_class))
    return {k: int(s) for k, s in zip(keys, sizes, strict=True)}


def _round_shares(shares: np.ndarray, n: int) -> np.ndarray:
    """Largest-remainder rounding of non-negative shares to integers summing to ``n``."""
    base = np.floor(shares + 1e-9).astype(int)
    left = n - base.sum()
    order = np.argsort(-(shares - base), kind="stable")
    base[order[:left]] += 1
    return base


def _floored_shares(n: int, w: np.ndarray, floor: int) -> np.ndarray:
    live = w > 0
    if floor * live.sum() > n:
        raise ValidationDesignError(
            f"min_per_class={floor} for {int(live.sum())} mapped classes needs at least "
            f"{floor * int(live.sum())} units, but n={n}. Raise n or lower min_per_class."
        )
    fixed = np.zeros_like(live)
    while True:  # a few passes at most: each pass fixes at least one more stratum at the floor
        rest, free = n - floor * fixed.sum(), live & ~fixed
        shares = np.where(free, rest * w / w[free].sum(), 0.0) if free.any() else np.zeros_like(w)
        newly = free & (shares < floor)
        if not newly.any():
            break
        fixed |= newly
    return _round_shares(shares, int(rest)) + floor * fixed


def mapped_proportions(class_map: xr.DataArray, class_names: Mapping[int, str]) -> dict[int, float]:
    """Mapped area proportion W_i of each class (pixel counts over all valid pixels).

    Reads the map into memory.  The result feeds :func:`sample_size_overall` and :func:`allocate`.

    Parameters
    ----------
    class_map : xarray.DataArray
        Classified map, dims ``("y", "x")``; 0, NaN and ``rio.nodata`` are no data.
    class_names : dict
        Class code -> class name; the map may hold no other codes.

    Returns
    -------
    dict
        Class code -> proportion (sums to 1), in code order.
    """
    _check_names(class_names)
    pixels = _pixel_counts(_codes(class_map), class_names)
    total = sum(pixels.values())
    if total == 0:
        raise ValidationDesignError("class_map holds no valid pixel; check its nodata value and class codes.")
    return {code: count / total for code, count in pixels.items()}


def _pixel_counts(codes: np.ndarray, class_names: Mapping[int, str]) -> dict[int, int]:
    order = sorted(class_names)
    counts = np.bincount(codes.ravel(), minlength=max(order) + 1)
    stray = [int(c) for c in np.flatnonzero(counts) if c != 0 and c not in class_names]
    if stray:
        raise ValidationDesignError(
            f"the map holds codes {stray} missing from class_names {dict(class_names)}; name every code."
        )
    return {code: int(counts[code]) for code in order}


# -- drawing ---------------------------------------------------------------------------------------------


def _codes(class_map: xr.DataArray) -> np.ndarray:
    """The map as an int64 array with every nodata pixel set to 0 (reads the map into memory)."""
    if tuple(class_map.dims) != ("y", "x"):
        raise ValidationDesignError(f"class_map must have dims ('y', 'x'), got {class_map.dims}.")
    values = np.asarray(class_map.values)
    nodata = class_map.rio.nodata
    bad = ~np.isfinite(values) if values.dtype.kind == "f" else np.zeros(values.shape, bool)
    if nodata is not None and np.isfinite(nodata):
        bad |= values == nodata
    clean = np.where(bad, 0, values)
    if (clean < 0).any():
        raise ValidationDesignError(
            "class_map holds negative codes; class codes must be integers >= 1 (0 = nodata)."
        )
    if values.dtype.kind == "f" and not np.array_equal(clean, np.round(clean)):
        raise ValidationDesignError(
            "class_map holds non-integer values; pass the classified map (class codes)."
        )
    return clean.astype(np.int64)


def _steps(class_map: xr.DataArray) -> tuple[float, float]:
    """Pixel steps (dx, dy) from the pixel-centre coordinates (dy < 0 for north-up maps)."""
    if class_map.sizes["x"] > 1 and class_map.sizes["y"] > 1:
        x, y = class_map.x.to_numpy(), class_map.y.to_numpy()
        return float(x[1] - x[0]), float(y[1] - y[0])
    dx, dy = class_map.rio.resolution()
    return float(dx), float(dy)


def _crs(class_map: xr.DataArray) -> Any:
    crs = class_map.rio.crs
    if crs is None:
        raise AlignmentError(
            "class_map has no CRS; sample points could not be placed on the ground. "
            "Set one with class_map.rio.write_crs('EPSG:...')."
        )
    return crs


def _check_names(class_names: Mapping[int, str]) -> None:
    if 0 in class_names:
        raise ValidationDesignError("class code 0 means 'no data' and cannot name a class; renumber from 1.")
    if len(set(class_names.values())) != len(class_names):
        raise ValidationDesignError(f"class_names repeats a name: {dict(class_names)}.")


def _resolve_allocation(allocation: Mapping[Any, int], class_names: Mapping[int, str]) -> dict[int, int]:
    by_name = {name: code for code, name in class_names.items()}
    out: dict[int, int] = {}
    for key, size in allocation.items():
        code = by_name.get(key, key)
        if code not in class_names:
            raise ValidationDesignError(
                f"allocation names class {key!r}, which is not in class_names {dict(class_names)}."
            )
        if int(size) != size or size < 0:
            raise ValidationDesignError(
                f"allocation for {class_names[code]!r} must be an integer >= 0, got {size!r}."
            )
        out[int(code)] = int(size)
    return out


def _footprint_filter(class_map: xr.DataArray, exclude: gpd.GeoDataFrame | None, buffer_m: float):
    """Return f(flat indices) -> bool mask of pixels whose footprint is farther than buffer_m from exclude."""
    if exclude is None or len(exclude) == 0:
        return None
    if exclude.crs is None:
        raise AlignmentError("exclude has no CRS; set it with exclude.set_crs('EPSG:...') before sampling.")
    if not buffer_m >= 0:
        raise ValidationDesignError(f"exclude_buffer_m must be >= 0, got {buffer_m!r}.")
    geoms = exclude.to_crs(_crs(class_map)).geometry.to_numpy()
    tree = shapely.STRtree(geoms[~shapely.is_empty(geoms)])
    xs, ys = class_map.x.to_numpy(), class_map.y.to_numpy()
    dx, dy = (abs(r) / 2 for r in _steps(class_map))

    def keep(flat: np.ndarray) -> np.ndarray:
        row, col = np.unravel_index(flat, (ys.size, xs.size))
        boxes = shapely.box(xs[col] - dx, ys[row] - dy, xs[col] + dx, ys[row] + dy)
        if buffer_m > 0:
            hits = tree.query(boxes, predicate="dwithin", distance=buffer_m)
        else:
            hits = tree.query(boxes, predicate="intersects")
        ok = np.ones(flat.size, bool)
        ok[hits[0]] = False
        return ok

    return keep


def _draw_stratum(pool: np.ndarray, n: int, rng: np.random.Generator, keep, name: str) -> np.ndarray:
    if keep is None:
        return rng.choice(pool, size=n, replace=False)
    order, chosen, got, start = rng.permutation(pool.size), [], 0, 0
    batch = max(4 * n, 256)
    while got < n and start < pool.size:  # batches of candidates, tested for exclusion together
        cand = pool[order[start : start + batch]]
        start += batch
        take = cand[keep(cand)][: n - got]
        chosen.append(take)
        got += take.size
    if got < n:
        raise ValidationDesignError(
            f"stratum {name!r}: only {got} of its {pool.size} pixels lie outside the exclusion buffer, but "
            f"{n} were asked for. Lower its allocation, reduce exclude_buffer_m, or merge the class."
        )
    return np.concatenate(chosen)


def draw_stratified_sample(
    class_map: xr.DataArray,
    allocation: Mapping[Any, int],
    *,
    seed: int,
    exclude: gpd.GeoDataFrame | None = None,
    exclude_buffer_m: float = 0.0,
    class_names: Mapping[int, str],
) -> gpd.GeoDataFrame:
    """Draw a stratified random sample of pixel-centre points, strata = map classes.

    Parameters
    ----------
    class_map : xarray.DataArray
        Classified map, dims ``("y", "x")``, with a CRS (``class_map.rio.crs``).
    allocation : dict
        Class code (or class name) -> number of points.
    seed : int
        Seed of the random generator; the same seed, map and allocation give the same sample.
    exclude : geopandas.GeoDataFrame, optional
        Geometries to keep away from (e.g. training plots, for spatially independent validation).
    exclude_buffer_m : float
        No part of a sampled pixel lies within this distance of an ``exclude`` geometry; with 0, pixels
        touching a geometry are excluded.
    class_names : dict
        Class code -> class name.

    Returns
    -------
    geopandas.GeoDataFrame
        Points in the map's CRS with columns ``sample_id, map_class, x, y, reference_class``
        (``reference_class`` empty, for the interpreters).  Rows are shuffled so their order does not
        reveal the stratum; give interpreters the file without ``map_class`` for blind labelling.

    Raises
    ------
    ValidationDesignError
        If a stratum has no pixels or fewer eligible pixels than asked (names the class).
    """
    _check_names(class_names)
    crs = _crs(class_map)
    codes = _codes(class_map)
    wanted = _resolve_allocation(allocation, class_names)
    if sum(wanted.values()) == 0:
        raise ValidationDesignError(f"the allocation asks for no points: {dict(allocation)}; see allocate().")
    rng = np.random.default_rng(seed)
    keep = _footprint_filter(class_map, exclude, float(exclude_buffer_m))
    flat = codes.ravel()
    drawn, strata = [], []
    for code in sorted(wanted):  # loop over strata, never over pixels
        n, name = wanted[code], class_names[code]
        pool = np.flatnonzero(flat == code)
        if n > pool.size:
            raise ValidationDesignError(
                f"stratum {name!r} (code {code}) has {pool.size} pixels but {n} points were asked for. "
                "Lower its allocation or merge the class into a neighbour."
            )
        picked = _draw_stratum(pool, n, rng, keep, name) if n else pool[:0]
        drawn.append(picked)
        strata.append(np.full(picked.size, name, dtype=object))
    index, names = np.concatenate(drawn), np.concatenate(strata)
    order = rng.permutation(index.size)
    row, col = np.unravel_index(index[order], codes.shape)
    x, y = class_map.x.to_numpy()[col], class_map.y.to_numpy()[row]
    table = pd.DataFrame(
        {
            "sample_id": np.arange(1, index.size + 1),
            "map_class": names[order],
            "x": x,
            "y": y,
            "reference_class": pd.Series([None] * index.size, dtype=object),
        }
    )
    return gpd.GeoDataFrame(table, geometry=gpd.points_from_xy(x, y), crs=crs)


# -- labelling round trip ----------------------------------------------------------------------------


def write_sample(gdf: gpd.GeoDataFrame, path: str | Path, *, overwrite: bool = False) -> Path:
    """Write a sample to a GeoPackage (layer ``"sample"``) for photo-interpretation.

    The columns are written as given: for blind labelling drop ``map_class`` first and keep it with
    :func:`write_map_classes` (as :func:`wetlandflow.accuracy.assessment.design_sample` does).

    Parameters
    ----------
    gdf : geopandas.GeoDataFrame
        From :func:`draw_stratified_sample` (at least ``sample_id, x, y, reference_class``).
    path : str or Path
        Target ``.gpkg`` file.
    overwrite : bool
        Replace an existing file.  Off by default so labelled work is never clobbered.

    Returns
    -------
    Path
    """
    path = Path(path)
    missing = [c for c in INTERPRETER_COLUMNS if c not in gdf.columns]
    if missing:
        raise ValidationDesignError(
            f"the sample lacks columns {missing}; build it with draw_stratified_sample."
        )
    if path.exists() and not overwrite:
        raise OutputError(
            f"{path} already exists (it may hold labels); pass overwrite=True (command line: --overwrite) "
            "or choose a new name."
        )
    try:
        write_vector(gdf, path, layer="sample")  # atomic: a reader never meets half a sample
    except OSError as exc:
        if isinstance(exc, OutputError):
            raise
        raise OutputError(f"cannot write {path}: {exc}. Choose a writable folder.") from exc
    return path


def write_map_classes(gdf: pd.DataFrame, path: str | Path) -> Path:
    """Write ``sample_id, map_class`` of a drawn sample to a CSV file: the strata, kept from the
    interpreters."""
    from ..inputs.io import write_table

    return write_table(pd.DataFrame(gdf.loc[:, list(MAP_CLASS_COLUMNS)]), Path(path))


def read_map_classes(path: str | Path) -> pd.Series:
    """The map class per ``sample_id`` from a file of :func:`write_map_classes`.

    Raises
    ------
    ValidationDesignError
        When the file lacks a column or repeats an id.
    """
    table = pd.read_csv(path)
    missing = [c for c in MAP_CLASS_COLUMNS if c not in table.columns]
    if missing:
        raise ValidationDesignError(f"{path}: columns {missing} are missing (found {list(table.columns)}); "
                                    "it must keep the columns sample_id and map_class written by "
                                    "`wetlandflow sample`.")
    dup = table["sample_id"][table["sample_id"].duplicated()].unique()
    if dup.size:
        raise ValidationDesignError(f"{path}: duplicate sample_id {_listed(list(dup))}; restore the file "
                                    "written by `wetlandflow sample`.")
    return table.set_index("sample_id")["map_class"].astype(str)


def _listed(ids: Sequence[Any]) -> str:
    shown = ", ".join(str(i) for i in ids[:_MAX_LISTED])
    return shown + (f" ... and {len(ids) - _MAX_LISTED} more" if len(ids) > _MAX_LISTED else "")


def _canonical_labels(raw: pd.Series, class_names: Mapping[int, str]) -> pd.Series:
    """Map names (any case, spaces trimmed) and codes (3, 3.0, '3') to class names; unknown -> NaN."""
    lookup = {name.strip().lower(): name for name in class_names.values()}
    lookup.update({str(code): name for code, name in class_names.items()})
    text = raw.astype(str).str.strip().str.lower().str.replace(r"^(\d+)\.0+$", r"\1", regex=True)
    return text.map(lookup)


def _pixel_of(points: gpd.GeoSeries, class_map: xr.DataArray, codes: np.ndarray) -> np.ndarray:
    """Map code under each point; -1 outside the map extent, 0 on nodata."""
    dx, dy = _steps(class_map)
    x0, y0 = class_map.x.to_numpy()[0] - dx / 2, class_map.y.to_numpy()[0] - dy / 2
    cols, rows = (points.x.to_numpy() - x0) / dx, (points.y.to_numpy() - y0) / dy
    col, row = np.floor(cols).astype(int), np.floor(rows).astype(int)
    inside = (row >= 0) & (row < codes.shape[0]) & (col >= 0) & (col < codes.shape[1])
    out = np.full(col.size, -1, dtype=np.int64)
    out[inside] = codes[row[inside], col[inside]]
    return out


def read_labelled_sample(
    path: str | Path, class_names: Mapping[int, str], class_map: xr.DataArray, *,
    map_classes: pd.Series | None = None,
) -> gpd.GeoDataFrame:
    """Read a photo-interpreted sample back and check it against the legend and the map.

    Parameters
    ----------
    path : str or Path
        GeoPackage written by :func:`write_sample` with ``reference_class`` filled in.  Labels may be
        class names (case and surrounding spaces ignored) or class codes.
    class_names : dict
        Class code -> class name.
    class_map : xarray.DataArray
        The map the sample was drawn from.
    map_classes : pandas.Series, optional
        The map class of each point as drawn, indexed by ``sample_id`` (:func:`read_map_classes`); each
        point of the file must be in it and agree with the map.  A file from before the split, with its own
        ``map_class`` column, is checked the same way.

    Returns
    -------
    geopandas.GeoDataFrame
        ``sample_id, map_class, reference_class, x, y, geometry`` in the map's CRS, ``map_class`` read
        from the map and ``reference_class`` as canonical class names.

    Raises
    ------
    InputFileError
        If the file is missing or unreadable.
    ValidationDesignError
        For missing columns, duplicate ids, empty or unknown labels, points outside the map or on
        nodata, or a ``map_class`` that disagrees with the map; the message names the file and ids.
    """
    path = Path(path)
    if not path.exists():
        raise InputFileError("the labelled sample file does not exist; check the path.", path=str(path))
    try:
        gdf = gpd.read_file(path)
    except Exception as exc:  # pyogrio raises its own DataSourceError
        raise InputFileError(f"cannot read the labelled sample: {exc}", path=str(path)) from exc
    _check_names(class_names)

    def fail(problem: str, ids: Sequence[Any], fix: str) -> None:
        raise ValidationDesignError(f"{path}: {problem} for sample_id {_listed(list(ids))}. {fix}")

    missing = [c for c in ("sample_id", "reference_class") if c not in gdf.columns]
    if missing:
        raise ValidationDesignError(
            f"{path}: columns {missing} are missing (found {list(gdf.columns)}); the file must keep the "
            "columns written by write_sample."
        )
    if gdf.crs is None:
        raise ValidationDesignError(f"{path}: the layer has no CRS; re-export it with the map's CRS.")
    gdf = gdf.to_crs(_crs(class_map))
    dup = gdf["sample_id"][gdf["sample_id"].duplicated()].unique()
    if dup.size:
        fail("duplicate ids", dup, "Each point must keep its own sample_id; remove the copies.")
    ids = gdf["sample_id"].to_numpy()
    not_point = (gdf.geometry.geom_type != "Point").to_numpy() | gdf.geometry.is_empty.to_numpy()
    if not_point.any():
        fail(
            "geometries are not points",
            ids[not_point],
            "Do not edit the geometries; restore the original points.",
        )
    raw = gdf["reference_class"]
    empty = (raw.isna() | (raw.astype(str).str.strip() == "")).to_numpy()
    if empty.any():
        fail(
            "reference_class is empty",
            ids[empty],
            f"Label every point with one of {sorted(class_names.values())}; do not drop points, because "
            "dropping units from a probability sample can bias the estimates.",
        )
    labels = _canonical_labels(raw, class_names)
    unknown = labels.isna().to_numpy()
    if unknown.any():
        bad = sorted(set(raw[unknown].astype(str)))
        fail(
            f"labels {bad} are not in the legend",
            ids[unknown],
            f"Use one of {sorted(class_names.values())} (or their codes {sorted(class_names)}).",
        )
    under = _pixel_of(gdf.geometry, class_map, _codes(class_map))
    if (under < 0).any():
        fail(
            "points fall outside the map extent",
            ids[under < 0],
            "The sample was drawn from another map or the points were moved; use the matching map.",
        )
    if (under == 0).any():
        fail(
            "points fall on nodata pixels",
            ids[under == 0],
            "The sample was drawn from another map or the points were moved; use the matching map.",
        )
    unknown_code = ~np.isin(under, list(class_names))
    if unknown_code.any():
        fail(
            f"the map holds codes {sorted(set(under[unknown_code]))} missing from class_names",
            ids[unknown_code],
            "Add every map code to class_names.",
        )
    mapped = pd.Series(under).map(dict(class_names)).to_numpy()
    if map_classes is not None:
        absent = ~pd.Series(ids).isin(map_classes.index).to_numpy()
        if absent.any():
            fail("the map-class table has no row", ids[absent],
                 "The labelled file and map_classes.csv come from different draws; use the pair written "
                 "together by `wetlandflow sample`.")
        drawn = map_classes.reindex(ids).to_numpy()
        if (drawn != mapped).any():
            fail("the map class recorded at the draw differs from the map under the point",
                 ids[drawn != mapped],
                 "The map changed since the sample was drawn, or the file comes from another draw; draw a "
                 "new sample of this map (wetlandflow sample --overwrite) or assess the map it was drawn "
                 "from.")
    if "map_class" in gdf.columns:
        differs = gdf["map_class"].notna().to_numpy() & (gdf["map_class"].astype(str).to_numpy() != mapped)
        if differs.any():
            fail(
                "map_class differs from the map under the point",
                ids[differs],
                "The sample was drawn from a different map; estimate with the map it was drawn from.",
            )
    out = pd.DataFrame(
        {
            "sample_id": ids,
            "map_class": mapped,
            "reference_class": labels.to_numpy(),
            "x": gdf.geometry.x.to_numpy(),
            "y": gdf.geometry.y.to_numpy(),
        }
    )
    return gpd.GeoDataFrame(out, geometry=gdf.geometry.to_numpy(), crs=gdf.crs)


def estimates_from_sample(
    labelled_gdf: gpd.GeoDataFrame,
    class_map: xr.DataArray,
    class_names: Mapping[int, str],
    pixel_area_ha: float | None = None,
    *,
    design: str = "stratified",
    confidence: float = 0.95,
    collapse: Mapping[str, Sequence[str]] | None = None,
    zero_error: str = "wilson",
) -> AreaAccuracyResult:
    """Error-adjusted areas and accuracies from a labelled sample and the map it was drawn from.

    Parameters
    ----------
    labelled_gdf : geopandas.GeoDataFrame
        From :func:`read_labelled_sample` (``reference_class`` filled, points on the map).
    class_map : xarray.DataArray
        The classified map; mapped areas come from its pixel counts (computed in memory).
    class_names : dict
        Class code -> class name; the class order of every table.
    pixel_area_ha : float, optional
        Area of one pixel in hectares; by default from the map's resolution (metres).
    design : {"stratified", "simple_random", "systematic"}
        How the sample was drawn; strata are the map classes.
    confidence : float
        Confidence level of the intervals.
    collapse : dict, optional
        ``{parent: [class names]}`` to report at a coarser level (e.g. wetland vs upland).
    zero_error : {"wilson", "exact"}
        Interval of an error rate observed as zero (Wilson 1927 score or Clopper & Pearson 1934 exact;
        see :func:`~wetlandflow.accuracy.estimators.stratified_estimates`).

    Returns
    -------
    AreaAccuracyResult
    """
    if design not in _DESIGNS:
        raise ValidationDesignError(f"design must be one of {list(_DESIGNS)}, got {design!r}.")
    _check_names(class_names)
    codes = _codes(class_map)
    pixels = _pixel_counts(codes, class_names)
    under = _pixel_of(labelled_gdf.geometry, class_map, codes)
    if (~np.isin(under, list(class_names))).any():
        raise ValidationDesignError(
            "some sample points are outside the map or on nodata; read the sample with read_labelled_sample."
        )
    names = [class_names[c] for c in pixels]
    counts = error_matrix(labelled_gdf["reference_class"].to_numpy(), [class_names[c] for c in under], names)
    if pixel_area_ha is None:
        dx, dy = _steps(class_map)
        pixel_area_ha = abs(dx * dy) / 10_000.0
    areas = dict(zip(names, pixels.values(), strict=True))
    options = {"pixel_area_ha": pixel_area_ha, "confidence": confidence, "collapse": collapse,
               "zero_error": zero_error}
    if design == "stratified":
        return stratified_estimates(counts, areas, **options)
    return simple_random_estimates(counts, areas, systematic=design == "systematic", **options)
