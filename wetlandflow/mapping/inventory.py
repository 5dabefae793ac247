"""From a class map to an inventory: minimum mapping unit, polygons and area tables.

:func:`apply_mmu` removes patches (connected components of one class) smaller
than the minimum mapping unit by merging each into the neighbouring class that
the model finds most probable over the patch.  :func:`polygonize` turns the map
into polygons with stable ids, areas, perimeters, mean class probability and
the share of each polygon outside the area of applicability.

Both work on whole in-memory arrays: connected components are a global
operation (a patch may span any number of windows), so they compute in memory.
A 2048 x 2048 uint8 map with six classes of probabilities needs about 150 MB.

The default MMU of 9 pixels (a 3 x 3 block) is common practice, no source; the
project's check-value notes record that reference samples are commonly taken
from uniform 3 x 3 windows, and that MMUs are usually chosen close to the data
resolution (Knight & Lunetta 2003, An experimental assessment of minimum
mapping unit size, IEEE TGRS 41(9)).
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np
from scipy import ndimage

from ..errors import GridMismatchError, ParameterError
from ..inputs.grid import Grid
from ..inputs.io import write_vector

NODATA = 0
INVENTORY_LAYER = "inventory"
_OFFSETS = {4: ((0, 1), (1, 0)), 8: ((0, 1), (1, 0), (1, 1), (1, -1))}  # half of each neighbourhood


def _structure(connectivity: int) -> np.ndarray:
    if connectivity not in (4, 8):
        raise ParameterError(f"connectivity must be 4 (edge neighbours) or 8 (edge and corner), "
                             f"got {connectivity!r}")
    return ndimage.generate_binary_structure(2, 1 if connectivity == 4 else 2)


def _check_class_map(class_map: np.ndarray) -> np.ndarray:
    cm = np.asarray(class_map)
    if cm.ndim != 2 or not np.issubdtype(cm.dtype, np.integer) or (cm.size and cm.min() < 0):
        raise ParameterError(f"class_map must be a 2-D array of non-negative integer codes (0 = nodata), got "
                             f"dtype {cm.dtype} and shape {cm.shape}")
    return cm.astype(np.uint8, copy=False)


def label_patches(class_map: np.ndarray, connectivity: int = 8) -> tuple[np.ndarray, np.ndarray]:
    """Connected components of each class; returns ``labels`` (0 at nodata) and the class of each label.

    ``patch_class[0]`` is 0, so ``patch_class[labels]`` reproduces ``class_map``.
    """
    structure = _structure(connectivity)
    labels = np.zeros(class_map.shape, np.int32)
    n = 0
    for c in np.unique(class_map[class_map != NODATA]):  # loop over classes, a handful
        lab, k = ndimage.label(class_map == c, structure=structure)
        hit = lab > 0
        labels[hit] = lab[hit] + n
        n += k
    patch_class = np.zeros(n + 1, np.uint8)
    patch_class[labels.ravel()] = class_map.ravel()
    return labels, patch_class


def _adjacent_pairs(labels: np.ndarray, connectivity: int, keep: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct (a, b) pairs of touching labels where ``keep[a]``."""
    a_all, b_all = [], []
    h, w = labels.shape
    kept = keep[labels]
    for dy, dx in _OFFSETS[connectivity]:
        src = (slice(0, h - dy), slice(max(0, -dx), w - max(0, dx)))
        dst = (slice(dy, h), slice(max(0, dx), w - max(0, -dx)))
        a, b = labels[src], labels[dst]
        ka, kb = kept[src], kept[dst]
        # only pixel pairs that involve a kept patch matter; filtering here keeps the arrays small
        touch = (a != b) & (a > 0) & (b > 0) & (ka | kb)
        a, b, ka, kb = a[touch], b[touch], ka[touch], kb[touch]
        a_all += [a[ka], b[kb]]
        b_all += [b[ka], a[kb]]
    a = np.concatenate(a_all).astype(np.int64)
    b = np.concatenate(b_all).astype(np.int64)
    base = int(labels.max()) + 1
    code = np.unique(a * base + b)
    return code // base, code % base


def _class_scores(labels: np.ndarray, small: np.ndarray, proba: np.ndarray, size: np.ndarray) -> np.ndarray:
    """Mean probability of every class over each small patch: (n_labels + 1, K); NaN counts as 0."""
    pix = small[labels]
    lab = labels[pix]
    scores = np.zeros((size.size, proba.shape[0]))
    for k in range(proba.shape[0]):  # loop over classes
        p = np.nan_to_num(proba[k][pix], nan=0.0)
        scores[:, k] = np.bincount(lab, weights=p, minlength=size.size)
    return scores / np.maximum(size, 1)[:, None]


def _best_targets(pa, pb, patch_class, scores):
    """For each patch in ``pa``, the neighbouring class of highest mean probability (ties: lowest code)."""
    cls = patch_class[pb].astype(np.int64)
    s = scores[pa, cls - 1]
    order = np.lexsort((cls, -s, pa))
    patches, first = np.unique(pa[order], return_index=True)
    return patches, cls[order][first]


def _local_minima(candidates: np.ndarray, pa, pb, size: np.ndarray) -> np.ndarray:
    """Candidates whose (size, label) key is below that of every touching candidate.

    Such patches never touch each other, so they can all merge in one pass against
    neighbours that stay fixed: each pass removes at least one patch and the
    iteration ends.
    """
    key = size.astype(np.int64) * size.size + np.arange(size.size)
    both = candidates[pa] & candidates[pb]
    nb_min = np.full(size.size, np.iinfo(np.int64).max)
    np.minimum.at(nb_min, pa[both], key[pb[both]])
    return candidates & (key < nb_min)


def _mmu_pass(cm, proba, min_pixels, connectivity):
    """One merge pass; returns the new map and the number of patches merged."""
    labels, patch_class = label_patches(cm, connectivity)
    size = np.bincount(labels.ravel(), minlength=patch_class.size)
    small = (size < min_pixels) & (patch_class != NODATA)
    if not small.any():
        return cm, 0
    pa, pb = _adjacent_pairs(labels, connectivity, small)
    scores = _class_scores(labels, small, proba, size)
    patches, target = _best_targets(pa, pb, patch_class, scores)
    candidates = np.zeros(size.size, bool)
    candidates[patches] = True  # small patches with at least one valid neighbour
    go = _local_minima(candidates, pa, pb, size)
    new_class = patch_class.copy()
    new_class[patches[go[patches]]] = target[go[patches]]
    return new_class[labels], int(go.sum())


def apply_mmu(class_map: np.ndarray, proba: np.ndarray, *, min_pixels: int = 9, connectivity: int = 8,
              max_passes: int = 10_000) -> np.ndarray:
    """Merge patches smaller than ``min_pixels`` into their most probable neighbouring class.

    A patch is a connected component of one class (``scipy.ndimage.label`` with
    the given connectivity).  A patch below the MMU takes the class, among those
    of the patches touching it, with the highest mean probability over the
    patch's pixels.  Passes repeat until no patch below the MMU remains.  Each
    pass merges the small patches that are smaller than every small patch they
    touch (ties by label), so merges within a pass never interact and the
    result does not oscillate.  A patch touching only nodata and the map edge
    has no valid neighbour and is kept.  Nodata (0) stays nodata.

    Parameters
    ----------
    class_map : ndarray (H, W) of uint8
        Class codes 1..K, 0 = nodata.
    proba : ndarray (K, H, W)
        Per-class probabilities; band ``k`` belongs to code ``k + 1``.  NaN counts as 0.
    min_pixels : int
        The MMU in pixels (default 9 = 3 x 3: common practice, no source).
    connectivity : {4, 8}
        Neighbourhood both for patches and for which patches touch.
    max_passes : int
        Safety bound; each pass removes at least one patch, so it is never reached on real maps.

    Returns
    -------
    ndarray (H, W) of uint8, a new array.

    Notes
    -----
    Computes in memory (connected components are global).  Applying it to its own
    output changes nothing.
    """
    cm = _check_class_map(class_map).copy()
    proba = np.asarray(proba)
    if proba.ndim != 3 or proba.shape[1:] != cm.shape or proba.shape[0] < int(cm.max(initial=0)):
        raise ParameterError(f"proba must be (K, H, W) with H, W = {cm.shape} and K >= the largest class "
                             "code "
                             f"{int(cm.max(initial=0))}, got {proba.shape}")
    if int(min_pixels) < 1:
        raise ParameterError(f"min_pixels must be >= 1, got {min_pixels}")
    _structure(connectivity)
    for _ in range(max_passes):
        cm, merged = _mmu_pass(cm, proba, int(min_pixels), connectivity)
        if merged == 0:
            break
    return cm


def _per_label_mean(labels: np.ndarray, values: np.ndarray | None, n: int, size: np.ndarray) -> np.ndarray:
    if values is None:
        return np.full(n, np.nan)
    v = np.nan_to_num(np.asarray(values, dtype=np.float64), nan=0.0)
    return np.bincount(labels.ravel(), weights=v.ravel(), minlength=n) / np.maximum(size, 1)


def _shapes_by_label(labels: np.ndarray, grid: Grid):
    """One geometry per label: MultiPolygon of the label's edge-connected (4-connected) pieces.

    GDAL's polygons of 8-connected regions touch themselves at pixel corners, which is invalid in
    the simple-features model, and repairing them is slow; 4-connected pieces are always valid, and
    a MultiPolygon whose parts touch only at corners is valid too.  Same area, same boundary.
    """
    import shapely
    from rasterio.features import shapes

    values, ring_coords, ring_owner = [], [], []
    found = shapes(labels, mask=labels > 0, connectivity=4, transform=grid.transform)
    for i, (geom, value) in enumerate(found):
        values.append(int(value))
        for ring in geom["coordinates"]:
            ring_coords.append(np.asarray(ring, dtype=np.float64))
            ring_owner.append(i)
    lengths = np.fromiter((len(r) for r in ring_coords), np.int64, len(ring_coords))
    ring_of_point = np.repeat(np.arange(lengths.size), lengths)
    rings = shapely.linearrings(np.concatenate(ring_coords), indices=ring_of_point)
    pieces = shapely.polygons(rings, indices=np.asarray(ring_owner))  # first ring of each piece is its shell
    values = np.asarray(values, np.int64)
    order = np.argsort(values, kind="stable")
    labels_sorted, group = np.unique(values[order], return_inverse=True)
    return labels_sorted, shapely.multipolygons(pieces[order], indices=group)


def polygonize(class_map: np.ndarray, grid: Grid, *, class_names: Sequence[str],
               proba: np.ndarray | None = None,
               outside_aoa: np.ndarray | None = None, connectivity: int = 8):
    """Polygons of the class map with stable ids and per-polygon statistics.

    Parameters
    ----------
    class_map : ndarray (H, W) of uint8
        Codes 1..K (0 = nodata), on ``grid``.
    grid : Grid
    class_names : sequence of str
        Name of code ``k`` is ``class_names[k - 1]``.
    proba : ndarray (K, H, W), optional
        Per-class probabilities; gives ``mean_probability`` (mean of the polygon's own class).
    outside_aoa : ndarray (H, W) of bool, optional
        True where a pixel is outside the area of applicability (e.g. ``inside_aoa == 0``).
    connectivity : {4, 8}
        8 (default, as :func:`apply_mmu`): pixels touching at a corner belong to one polygon.
        Geometries are MultiPolygons of the polygon's edge-connected parts (with 4, always one part).

    Returns
    -------
    geopandas.GeoDataFrame with ``polygon_id``, ``class``, ``class_code``, ``n_pixels``, ``area_ha``,
    ``perimeter_m``, ``mean_probability``, ``share_outside_aoa`` and ``geometry``, CRS ``grid.crs``.
    ``polygon_id`` is ``"P"`` + the 1-based rank of the polygon's first pixel in row-major order, so the
    same map always gives the same ids.  Computes in memory.
    """
    import geopandas as gpd

    cm = _check_class_map(class_map)
    if cm.shape != grid.shape:
        raise GridMismatchError(f"class_map has shape {cm.shape}, the grid {grid.shape}; "
                                "pass the grid the map was made on")
    if int(cm.max(initial=0)) > len(class_names):
        raise ParameterError(f"class code {int(cm.max())} has no name: {len(class_names)} class_names given")
    labels, patch_class = label_patches(cm, connectivity)
    n = patch_class.size
    size = np.bincount(labels.ravel(), minlength=n)
    uniq, first = np.unique(labels.ravel(), return_index=True)
    first_pixel = np.full(n, -1, np.int64)
    first_pixel[uniq] = first
    own = None
    if proba is not None:
        own = np.take_along_axis(np.asarray(proba), np.maximum(cm.astype(np.intp) - 1, 0)[None], axis=0)[0]
    mean_p = _per_label_mean(labels, own, n, size)
    share = _per_label_mean(labels, None if outside_aoa is None else np.asarray(outside_aoa, bool), n, size)
    values, geoms = _shapes_by_label(labels, grid)
    order = np.argsort(first_pixel[values])
    values, geoms = values[order], geoms[order]
    codes = patch_class[values].astype(int)
    gdf = gpd.GeoDataFrame({
        "polygon_id": [f"P{i:06d}" for i in range(1, values.size + 1)],
        "class": [class_names[c - 1] for c in codes],
        "class_code": codes,
        "n_pixels": size[values],
        "area_ha": np.zeros(values.size),
        "perimeter_m": np.zeros(values.size),
        "mean_probability": mean_p[values],
        "share_outside_aoa": share[values],
    }, geometry=list(geoms), crs=grid.crs)
    gdf["area_ha"] = gdf.geometry.area / 1e4
    gdf["perimeter_m"] = gdf.geometry.length
    return gdf


def area_summary(gdf):
    """Per class: number of polygons, area (ha) and share of the mapped area, in class-code order."""
    import pandas as pd

    out = (gdf.groupby(["class_code", "class"], sort=True)
           .agg(n_polygons=("polygon_id", "size"), area_ha=("area_ha", "sum")).reset_index())
    total = out["area_ha"].sum()
    out["share"] = out["area_ha"] / total if total > 0 else np.nan
    return pd.DataFrame(out)


def write_inventory(gdf, path: str | Path) -> Path:
    """Write the inventory as the GeoPackage layer ``"inventory"``, atomically."""
    return write_vector(gdf, path, layer=INVENTORY_LAYER)
