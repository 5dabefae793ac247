"""Property tests (hypothesis): invariants that must hold for every input, not only for the examples.

* spectral indices on arbitrary reflectances: range [-1, 1], NaN exactly where an input is NaN or the
  denominator vanishes, no floating-point warning leaking, dask equal to numpy;
* spatial splitters: folds disjoint and covering, one fold per plot and per block, the buffer respected;
* grids and alignment: bounds snapped outward by less than a pixel, pixel centres round-trip, and a raster
  in another CRS lands within half a pixel of where it belongs;
* stratified area estimation: proportions sum to 1, areas to the total, intervals contain the estimate,
  and the estimates equal the closed form of the stratified estimator.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from wetlandflow.errors import ValidationDesignError
from wetlandflow.features.optical import _ND_SPECS, BANDS, optical_indices
from wetlandflow.inputs.grid import Grid

FAST = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
SLOW = settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])

# -- spectral indices --------------------------------------------------------------------------------------

# reflectance in [0, 1.5] (bright targets may exceed 1), with exact zeros and NaN mixed in
reflectance_values = st.one_of(st.floats(0.0, 1.5, width=32), st.just(0.0), st.just(np.nan))


def reflectance_stack(values: np.ndarray) -> xr.DataArray:
    return xr.DataArray(values, dims=("band", "y", "x"), coords={"band": list(BANDS)})


@FAST
@given(arrays(np.float32, (len(BANDS), 3, 5), elements=reflectance_values))
def test_normalised_differences_range_nan_and_no_warning(values):
    refl = reflectance_stack(values)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # any RuntimeWarning (0/0, overflow) leaking would fail here
        out = optical_indices(refl).compute()
    for name, (a, b, *_) in _ND_SPECS.items():
        va, vb = values[BANDS.index(a)].astype(np.float64), values[BANDS.index(b)].astype(np.float64)
        got = out[name].values
        undefined = np.isnan(va) | np.isnan(vb) | (va + vb == 0)
        np.testing.assert_array_equal(np.isnan(got), undefined)
        assert np.all(np.abs(got[~undefined]) <= 1.0)
        # the closed form, computed here in float64
        expected = np.where(undefined, np.nan, (va - vb) / np.where(undefined, 1.0, va + vb))
        np.testing.assert_allclose(got, expected, rtol=1e-6, atol=1e-7, equal_nan=True)


@SLOW
@given(arrays(np.float32, (len(BANDS), 9, 11), elements=reflectance_values), st.integers(2, 6))
def test_indices_on_dask_equal_numpy(values, chunk):
    refl = reflectance_stack(values)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        whole = optical_indices(refl).compute()
        lazy = optical_indices(refl.chunk({"y": chunk, "x": chunk}))
        assert all(v.chunks is not None for v in lazy.data_vars.values())
        xr.testing.assert_allclose(lazy.compute(), whole)


@pytest.mark.reference
@FAST
@given(st.floats(0.001, 1.0), st.floats(0.001, 1.0))
def test_ndvi_equals_spyndex(nir, red):
    """Reference: spyndex (Montero et al. 2023, A standardized catalogue of spectral indices to advance the
    use of remote sensing in Earth system research, Scientific Data 10, 197), index NDVI."""
    spyndex = pytest.importorskip("spyndex")
    values = np.full((len(BANDS), 1, 1), 0.1, np.float64)
    values[BANDS.index("nir")], values[BANDS.index("red")] = nir, red
    got = float(optical_indices(reflectance_stack(values), ["ndvi"])["ndvi"].values.item())
    assert got == pytest.approx(float(spyndex.computeIndex("NDVI", params={"N": nir, "R": red})), rel=1e-12)


# -- spatial splitters ---------------------------------------------------------------------------------------


@st.composite
def plots_and_samples(draw):
    """Plots scattered over 5 km, each with 1-6 pixels within 30 m of its centre, and a class per plot."""
    n_plots = draw(st.integers(6, 40))
    seed = draw(st.integers(0, 2**31 - 1))
    rng = np.random.default_rng(seed)
    centres = rng.uniform(0, 5000, size=(n_plots, 2))
    sizes = rng.integers(1, 7, size=n_plots)
    plot = np.repeat(np.arange(n_plots), sizes)
    xy = centres[plot] + rng.uniform(-30, 30, size=(plot.size, 2))
    labels = rng.choice(["marsh", "bog", "fen"], size=n_plots)[plot]
    return xy, labels, plot.astype(str)


def assert_partition(splits, n):
    tests = [np.asarray(t) for _, t in splits]
    allidx = np.concatenate(tests)
    assert allidx.size == n and np.unique(allidx).size == n  # disjoint and covering
    for train, test in splits:
        assert np.intersect1d(train, test).size == 0


@FAST
@given(plots_and_samples(), st.floats(200, 2500), st.integers(2, 5))
def test_block_folds_partition_and_keep_plots_and_blocks_whole(data, block, k):
    from wetlandflow.validation.splitters import SpatialBlockKFold, _plot_blocks, block_ids

    xy, y, plots = data
    cv = SpatialBlockKFold(
        n_splits=k, block_size_m=block, random_state=0, coords=xy, on_class_missing="ignore"
    )
    units = _plot_blocks(block_ids(xy[:, 0], xy[:, 1], block), plots)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # few-plots warnings are expected for random labels
            splits = list(cv.split(xy, y, plots))
    except ValidationDesignError:
        assert np.unique(units).size < k  # refused only when there are fewer blocks than folds
        return
    assert len(splits) == cv.get_n_splits()
    assert_partition(splits, len(xy))
    fold = np.empty(len(xy), int)
    for f, (_, test) in enumerate(splits):
        fold[test] = f
    for key in (plots, units):  # one fold per plot, and per block (plots follow their majority block)
        per = {}
        for g, f in zip(key, fold, strict=True):
            assert per.setdefault(g, f) == f


@FAST
@given(plots_and_samples(), st.floats(0, 400))
def test_buffered_training_samples_stay_beyond_the_buffer(data, buffer_m):
    from scipy.spatial.distance import cdist
    from sklearn.model_selection import GroupKFold

    from wetlandflow.validation.splitters import BufferedSplitter

    xy, y, plots = data
    cv = BufferedSplitter(GroupKFold(n_splits=3), buffer_m, coords=xy, on_class_missing="ignore")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            splits = list(cv.split(xy, y, plots))
    except ValidationDesignError as exc:
        assert "removes every training sample" in str(exc)
        return
    for train, test in splits:
        assert np.intersect1d(train, test).size == 0
        assert cdist(xy[train], xy[test]).min() > buffer_m
        assert not set(plots[train]) & set(plots[test])


# -- grids and alignment ------------------------------------------------------------------------------------

PROJECTED = ("EPSG:32632", "EPSG:32633", "EPSG:32634", "EPSG:3035", "EPSG:3857")


@FAST
@given(st.floats(-2e5, 9e5), st.floats(4e6, 7e6), st.floats(1, 5000), st.floats(1, 5000), st.floats(1, 100))
def test_grid_from_bbox_covers_the_box_and_centres_round_trip(x0, y0, w, h, res):
    g = Grid.from_bbox((x0, y0, x0 + w, y0 + h), crs="EPSG:32633", resolution=res)
    gx0, gy0, gx1, gy1 = g.bounds
    tol = 1e-6 * max(abs(x0), abs(y0), 1.0)
    assert gx0 <= x0 + tol and gy0 <= y0 + tol and gx1 >= x0 + w - tol and gy1 >= y0 + h - tol
    assert x0 - gx0 < res + tol and gy1 - (y0 + h) < res + tol  # snapped outward by less than a pixel
    x, y = g.xy_coords()
    rows, cols = g.rowcol(x[[0, -1]], y[[0, -1]])
    assert rows.tolist() == [0, g.height - 1] and cols.tolist() == [0, g.width - 1]
    assert Grid.from_dict(g.to_dict()) == g
    for f in (1, 2, 7):
        c = g.coarsen(f)
        assert c.bounds[0] == gx0 and c.bounds[3] == gy1
        assert c.bounds[2] >= gx1 - tol and c.bounds[1] <= gy0 + tol


@st.composite
def grid_pair(draw):
    """A grid in one projected CRS and the source pixel size and CRS of a raster covering it."""
    lon, lat = draw(st.floats(10.0, 20.0)), draw(st.floats(46.0, 58.0))
    grid_crs, src_crs = draw(st.sampled_from(PROJECTED)), draw(st.sampled_from(PROJECTED))
    res, src_res = draw(st.floats(5, 60)), draw(st.floats(5, 60))
    w, h = draw(st.integers(8, 24)), draw(st.integers(8, 24))
    return lon, lat, grid_crs, src_crs, res, src_res, w, h


@SLOW
@given(grid_pair())
def test_alignment_places_every_pixel_within_half_a_pixel(tmp_path_factory, pair):
    """A raster whose values are its own x and y coordinates, warped onto a grid in another CRS: each grid
    pixel must receive the coordinates of its own centre, to within half a source pixel."""
    import rasterio
    from pyproj import Transformer
    from rasterio.transform import from_origin

    from wetlandflow.inputs.align import read_aligned

    lon, lat, grid_crs, src_crs, res, src_res, w, h = pair
    cx, cy = Transformer.from_crs("EPSG:4326", grid_crs, always_xy=True).transform(lon, lat)
    grid = Grid.from_bbox((cx, cy, cx + w * res, cy + h * res), crs=grid_crs, resolution=res)
    to_src = Transformer.from_crs(grid_crs, src_crs, always_xy=True)
    xs, ys = grid.xy_coords()
    gx, gy = np.meshgrid(xs, ys)
    sx, sy = to_src.transform(gx, gy)
    margin = 4 * src_res + 2 * res
    left, top = sx.min() - margin, sy.max() + margin
    n_cols = int((sx.max() + margin - left) / src_res) + 1
    n_rows = int((top - (sy.min() - margin)) / src_res) + 1
    assume(n_cols * n_rows < 400_000)
    t = from_origin(left, top, src_res, src_res)
    cols, rows = np.meshgrid(np.arange(n_cols) + 0.5, np.arange(n_rows) + 0.5)
    path = tmp_path_factory.mktemp("align") / "coords.tif"
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        width=n_cols,
        height=n_rows,
        count=2,
        dtype="float64",
        crs=src_crs,
        transform=t,
    ) as dst:
        dst.write(np.stack([left + cols * src_res, top - rows * src_res]))
    got = read_aligned(path, grid, kind="elevation", name="coords", chunks=8).values
    err_px = np.hypot(got[0] - sx, got[1] - sy) / src_res
    assert np.isfinite(err_px).all()
    assert err_px.max() < 0.5


# -- stratified area estimation ------------------------------------------------------------------------------


@st.composite
def sample_and_areas(draw):
    """A stratified sample: a k x k count matrix with at least 2 units per map class, and mapped areas."""
    k = draw(st.integers(2, 5))
    counts = np.array(
        draw(st.lists(st.lists(st.integers(0, 40), min_size=k, max_size=k), min_size=k, max_size=k))
    )
    counts[np.arange(k), np.arange(k)] += 2  # every stratum holds >= 2 units
    areas = np.array(draw(st.lists(st.floats(1.0, 1e6), min_size=k, max_size=k)))
    return counts.astype(float), areas


def _matrix(counts):
    import pandas as pd

    names = [f"c{i}" for i in range(len(counts))]
    return pd.DataFrame(counts, index=names, columns=names), names


@FAST
@given(sample_and_areas(), st.sampled_from([0.8, 0.9, 0.95, 0.99]))
def test_area_estimates_sum_up_and_intervals_contain_them(data, confidence):
    from wetlandflow.accuracy.estimators import stratified_estimates

    counts, areas = data
    m, names = _matrix(counts)
    res = stratified_estimates(m, dict(zip(names, areas, strict=True)), confidence=confidence)
    t = res.area_table
    assert t["estimated_proportion"].sum() == pytest.approx(1.0, abs=1e-9)
    assert t["mapped_proportion"].sum() == pytest.approx(1.0, abs=1e-9)
    assert t["estimated_area_ha"].sum() == pytest.approx(areas.sum(), rel=1e-9)
    assert float(res.proportion_matrix.to_numpy().sum()) == pytest.approx(1.0, abs=1e-9)
    assert (t["se_area_ha"] >= 0).all()
    assert (t["ci_low_ha"] <= t["estimated_area_ha"]).all() and (
        t["estimated_area_ha"] <= t["ci_high_ha"]
    ).all()
    assert 0.0 <= res.overall.value <= 1.0 and res.overall.low <= res.overall.value <= res.overall.high
    acc = res.accuracy_table
    assert ((acc["users"] >= 0) & (acc["users"] <= 1)).all()


@pytest.mark.reference
@FAST
@given(sample_and_areas())
def test_area_estimates_equal_the_stratified_estimator_closed_form(data):
    """Reference: the stratified estimator of Olofsson et al. (2014), Good practices for estimating area and
    assessing accuracy of land change, Remote Sensing of Environment 148, 42-57 (after Cochran 1977):
    p_j = sum_i W_i n_ij / n_i.,  SE(p_j) = sqrt(sum_i W_i^2 (n_ij/n_i.)(1 - n_ij/n_i.) / (n_i. - 1)).
    The formulas are from memory (not re-read in the paper); the worked example they reproduce is tested
    in tests/test_accuracy.py."""
    from wetlandflow.accuracy.estimators import stratified_estimates

    counts, areas = data
    m, names = _matrix(counts)
    res = stratified_estimates(m, dict(zip(names, areas, strict=True)))
    w = areas / areas.sum()
    share = counts / counts.sum(axis=1, keepdims=True)
    p = (w[:, None] * share).sum(axis=0)
    se = np.sqrt(
        (w[:, None] ** 2 * share * (1 - share) / (counts.sum(axis=1, keepdims=True) - 1)).sum(axis=0)
    )
    np.testing.assert_allclose(res.area_table["estimated_proportion"], p, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(res.area_table["se_proportion"], se, rtol=1e-9, atol=1e-12)


@FAST
@given(st.lists(st.integers(2, 60), min_size=2, max_size=6), st.data())
def test_a_perfect_sample_returns_the_mapped_areas_with_no_error(diag, data):
    """Closed form: with no off-diagonal counts every estimate equals the mapped value and every SE is 0."""
    from wetlandflow.accuracy.estimators import stratified_estimates

    k = len(diag)
    areas = np.array(data.draw(st.lists(st.floats(1.0, 1e5), min_size=k, max_size=k)))
    m, names = _matrix(np.diag(np.array(diag, float)))
    res = stratified_estimates(m, dict(zip(names, areas, strict=True)))
    np.testing.assert_allclose(res.area_table["estimated_area_ha"], areas, rtol=1e-12)
    np.testing.assert_allclose(res.area_table["se_area_ha"], 0.0, atol=1e-9)
    assert res.overall.value == pytest.approx(1.0) and res.overall.se == pytest.approx(0.0, abs=1e-12)
