"""Tests for wetlandflow.features.terrain and wetlandflow.features.mrvbf.

Check values come from closed-form surfaces (DERIVED: recomputed here from the
stated formulas), from the worked quadratic window of the stencil papers'
formulas, and from scikit-image (an independent implementation of
morphological depression filling).  Each reference check names its source.
"""

from __future__ import annotations

import math

import dask.array as da
import numpy as np
import pytest
import xarray as xr

from wetlandflow._provenance import parameters_of
from wetlandflow.errors import GridMismatchError
from wetlandflow.features import terrain as T

CS = 10.0


def make_dem(z: np.ndarray, cs: float = CS) -> xr.DataArray:
    """DEM on a north-up grid whose west and north edges are at x = 0 and y = ny * cs."""
    ny, nx = z.shape
    x = (np.arange(nx) + 0.5) * cs
    y = (np.arange(ny)[::-1] + 0.5) * cs
    return xr.DataArray(z, dims=("y", "x"), coords={"y": y, "x": x})


def xy_grid(ny: int, nx: int, cs: float = CS) -> tuple[np.ndarray, np.ndarray]:
    dem = make_dem(np.zeros((ny, nx)), cs)
    return np.meshgrid(dem.x.values, dem.y.values)


def random_dem(shape=(60, 70), seed=0) -> np.ndarray:
    """Rough terrain with many closed pits: smoothed noise on a tilted plane."""
    from scipy import ndimage

    rng = np.random.default_rng(seed)
    z = ndimage.gaussian_filter(rng.normal(size=shape), 2) * 20
    return z + np.linspace(0, 5, shape[1])[None, :]


# ----------------------------------------------------------------- filling


def test_fill_never_lowers_and_leaves_no_interior_pit():
    """Invariants of Priority-Flood+epsilon (Barnes, Lehman & Mulla 2014): fill >= dem; every cell drains."""
    z = random_dem()
    z[20:24, 30:33] = np.nan
    filled = T.fill_depressions(make_dem(z)).values
    valid = ~np.isnan(z)
    assert np.array_equal(np.isnan(filled), ~valid)
    assert np.all(filled[valid] >= z[valid])
    padded = np.pad(filled, 1, constant_values=np.nan)
    neighbours = np.stack(
        [padded[1 + di : 1 + di + z.shape[0], 1 + dj : 1 + dj + z.shape[1]]
         for di in (-1, 0, 1) for dj in (-1, 0, 1) if (di, dj) != (0, 0)]
    )
    touches_edge = np.isnan(neighbours).any(axis=0)
    has_lower = (neighbours < filled).any(axis=0)
    assert np.all(has_lower[valid & ~touches_edge])
    assert (filled > z).sum() > 50  # the test DEM really had depressions


@pytest.mark.reference
def test_fill_matches_skimage_reconstruction():
    """Flat fill equals morphological reconstruction by erosion, seeded with the maximum except on the
    border (scikit-image; van der Walt et al. 2014, 'scikit-image: image processing in Python',
    PeerJ 2:e453)."""
    from skimage.morphology import reconstruction

    z = random_dem(seed=3)
    seed = z.copy()
    seed[1:-1, 1:-1] = z.max()
    expected = reconstruction(seed, z, method="erosion", footprint=np.ones((3, 3)))
    filled = T.fill_depressions(make_dem(z), epsilon=False).values
    np.testing.assert_array_equal(filled, expected)


@pytest.mark.reference
def test_single_cell_pit_fills_to_rim():
    """DERIVED (Barnes et al. 2014 fill definition): a pit of depth d in cells at h fills to exactly h."""
    h, d = 12.5, 3.0
    z = np.full((7, 7), h)
    z[3, 3] = h - d
    filled = T.fill_depressions(make_dem(z), epsilon=False).values
    assert filled[3, 3] == h
    depth = T.depression_depth(make_dem(z)).values
    assert depth[3, 3] == d and np.count_nonzero(depth) == 1
    # with epsilon the whole flat rises by one float step per cell of distance from the edge (3 here)
    eps = T.fill_depressions(make_dem(z), epsilon=True).values
    top = h
    for _ in range(3):
        top = np.nextafter(top, np.inf)
    assert h < eps[3, 3] <= top


@pytest.mark.reference
def test_nested_pits_fill_to_spill_level():
    """DERIVED: nested pits fill to the lowest spill elevation on the way to the edge (Barnes et al. 2014)."""
    z = np.full((9, 13), 10.0)
    z[1:-1, 1:-1] = 6.0  # basin floor
    z[4, 0] = 7.0  # notch in the west rim: the spill level
    z[2:7, 6] = 8.0  # inner ridge, higher than the notch
    z[4, 3], z[4, 9] = 2.0, 1.0  # one pit on each side of the ridge
    filled = T.fill_depressions(make_dem(z), epsilon=False)
    basin = np.zeros_like(z, dtype=bool)
    basin[1:-1, 1:-1] = True
    basin[2:7, 6] = False
    assert np.all(filled.values[basin] == 7.0)
    assert np.all(filled.values[~basin] == z[~basin])
    assert parameters_of(filled)["conditioning"] == "priority_flood"


def test_nodata_is_an_outlet_and_float32_flats_drain():
    """A pit beside nodata is not filled (flow leaves into nodata); epsilon steps stay in float32."""
    z = np.full((8, 8), 5.0, dtype=np.float32)
    z[3, 3] = 1.0
    z[3, 4] = np.nan
    filled = T.fill_depressions(make_dem(z))
    assert filled.dtype == np.float32 and filled.values[3, 3] == 1.0
    flat = T.fill_depressions(make_dem(np.full((30, 30), 100.0, dtype=np.float32))).values
    interior = flat[1:-1, 1:-1]
    shifts = [flat[1 + di : 29 + di, 1 + dj : 29 + dj] for di in (-1, 0, 1) for dj in (-1, 0, 1)]
    lower = np.min(shifts, axis=0)
    assert np.all(lower < interior)


@pytest.mark.reference
@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("offset", [0.0, -60.0])
def test_flat_fill_matches_skimage_for_both_dtypes_ties_and_negative_elevations(dtype, offset):
    """Flat fill equals morphological reconstruction by erosion (scikit-image; van der Walt et al. 2014,
    'scikit-image: image processing in Python', PeerJ 2:e453) on float32 and float64 DEMs, with
    elevations below zero, exactly zero and with many ties (the fill sorts elevations by their bits)."""
    from skimage.morphology import reconstruction

    z = (np.round(random_dem((50, 57), seed=4) * 2) / 2 + offset).astype(dtype)  # half-metre steps: ties
    z[10, 10] = 0.0
    seed = z.astype(np.float64)
    seed[1:-1, 1:-1] = z.max()
    expected = reconstruction(seed, z.astype(np.float64), method="erosion", footprint=np.ones((3, 3)))
    filled = T.fill_depressions(make_dem(z), epsilon=False).values
    assert filled.dtype == dtype
    np.testing.assert_array_equal(filled, expected.astype(dtype))
    assert (filled > z).sum() > 20 and len(np.unique(z)) < z.size / 5


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
def test_epsilon_fill_drains_flats_with_ties_nodata_and_negative_zero(dtype):
    """Priority-Flood+epsilon invariants (Barnes, Lehman & Mulla 2014) where ties, nodata holes and
    -0.0 meet: never below the DEM, never below the flat fill, every cell away from outlets has a
    strictly lower neighbour, and unraised -0.0 cells keep their sign."""
    z = np.round(random_dem((40, 44), seed=9)).astype(dtype)  # whole metres: large flats
    z[z == 0] = -0.0
    z[5:8, 30:33] = np.nan
    flat = T.fill_depressions(make_dem(z), epsilon=False).values
    filled = T.fill_depressions(make_dem(z)).values
    valid = ~np.isnan(z)
    assert np.all(filled[valid] >= flat[valid]) and np.all(flat[valid] >= z[valid])
    assert np.all(filled[valid] - flat[valid] <= 1e-3 * np.maximum(1.0, np.abs(flat[valid])))
    padded = np.pad(filled, 1, constant_values=np.nan)
    neighbours = np.stack(
        [padded[1 + di : 1 + di + z.shape[0], 1 + dj : 1 + dj + z.shape[1]]
         for di in (-1, 0, 1) for dj in (-1, 0, 1) if (di, dj) != (0, 0)]
    )
    inner = valid & ~np.isnan(neighbours).any(axis=0)
    assert np.all((neighbours < filled).any(axis=0)[inner])
    kept = valid & (filled == z) & (z == 0)
    assert kept.any() and np.all(np.signbit(filled[kept]) == np.signbit(z[kept]))


def _d8_receivers_numpy(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Steepest-descent neighbour by the definition (O'Callaghan & Mark 1984), written with numpy."""
    ny, nx = z.shape
    padded = np.pad(z, 1, constant_values=np.nan)
    steps = [(0, 1), (1, 1), (1, 0), (1, -1), (0, -1), (-1, -1), (-1, 0), (-1, 1)]  # E, SE, S, ... NE
    length = [CS if di == 0 or dj == 0 else math.sqrt(2 * CS * CS) for di, dj in steps]
    drops = np.stack([(z - padded[1 + di : 1 + di + ny, 1 + dj : 1 + dj + nx]) / d
                      for (di, dj), d in zip(steps, length)])
    drops = np.where(np.isnan(drops), -np.inf, drops)
    best = drops.argmax(axis=0)
    has = drops.max(axis=0) > 0
    i, j = np.indices(z.shape)
    di = np.array([s[0] for s in steps])[best]
    dj = np.array([s[1] for s in steps])[best]
    return np.where(has, (i + di) * nx + (j + dj), -1), has


@pytest.mark.reference
def test_d8_accumulation_satisfies_its_recurrence():
    """DERIVED from the D8 definition (O'Callaghan & Mark 1984): each cell's area is its own plus the
    areas of the cells whose steepest-descent neighbour it is, and all area leaves through outlets."""
    z = random_dem((45, 52), seed=13)
    z[20:23, 10:14] = np.nan
    dem = make_dem(z)
    filled = T.fill_depressions(dem).values
    acc = T.flow_accumulation(dem, method="d8").values
    receiver, has = _d8_receivers_numpy(filled)
    valid = ~np.isnan(z)
    inflow = np.bincount(receiver[has & valid], weights=acc[has & valid], minlength=z.size).reshape(z.shape)
    np.testing.assert_allclose(acc[valid], CS * CS + inflow[valid], rtol=1e-12)
    outlets = valid & ~has
    assert acc[outlets].sum() == pytest.approx(valid.sum() * CS * CS, rel=1e-12)


# ----------------------------------------------------------- slope, aspect


@pytest.mark.reference
def test_horn_on_inclined_plane_everywhere():
    """DERIVED (Horn 1981, 'Hill shading and the reflectance map'): the stencil is exact on z = 2x + 3y;
    slope = atan(sqrt(13)) = 74.4986 deg, downslope azimuth atan2(-2, -3) = 213.69 deg, also on the border
    (extrapolation edge policy)."""
    xx, yy = xy_grid(9, 11)
    dem = make_dem(2 * xx + 3 * yy)
    np.testing.assert_allclose(T.slope(dem).values, 74.4986, atol=1e-4)
    np.testing.assert_allclose(T.slope(dem, units="ratio").values, math.sqrt(13), rtol=1e-12)
    np.testing.assert_allclose(T.slope(dem, units="percent").values, 100 * math.sqrt(13), rtol=1e-12)
    expected_aspect = math.degrees(math.atan2(-2, -3)) % 360
    np.testing.assert_allclose(T.aspect(dem).values, expected_aspect, atol=1e-9)
    assert abs(expected_aspect - 213.690068) < 1e-5


QUAD = dict(D=0.02, E=-0.01, F=0.005, G=0.3, H=-0.4, I=100.0)


def quadratic_window(cs: float = 10.0) -> np.ndarray:
    x, y = np.meshgrid([-cs, 0, cs], [cs, 0, -cs])
    q = QUAD
    return q["D"] * x**2 + q["E"] * y**2 + q["F"] * x * y + q["G"] * x + q["H"] * y + q["I"]


@pytest.mark.reference
def test_horn_on_quadratic_window():
    """DERIVED: Horn (1981) is exact at the centre of z = Dx^2 + Ey^2 + Fxy + Gx + Hy + I:
    dz/dx = 0.3, dz/dy = -0.4, slope 26.565 deg, downslope azimuth 323.13 deg."""
    window = quadratic_window()
    np.testing.assert_allclose(window, [[93.5, 95.0, 100.5], [99.0, 100.0, 105.0], [102.5, 103.0, 107.5]])
    dem = make_dem(window)
    assert T.slope(dem, units="ratio").values[1, 1] == pytest.approx(0.5, abs=1e-12)
    assert T.slope(dem).values[1, 1] == pytest.approx(26.565, abs=1e-3)
    assert T.aspect(dem).values[1, 1] == pytest.approx(323.13, abs=1e-2)


@pytest.mark.reference
def test_zevenbergen_thorne_curvatures_on_quadratic_window():
    """DERIVED: Zevenbergen & Thorne (1987), 'Quantitative analysis of land surface topography', fit the
    quadratic exactly, so the curvatures equal the formulas evaluated with the true D..H
    (profile 0.0032, plan 0.0232, total -0.02 per m; curvature formulas from memory)."""
    D, E, F, G, H = (QUAD[k] for k in "DEFGH")
    # the ZT polynomial uses z = D x^2 + ..., so its D..H are exactly the generating coefficients
    profile = -2 * (D * G**2 + E * H**2 + F * G * H) / (G**2 + H**2)
    plan = 2 * (D * H**2 + E * G**2 - F * G * H) / (G**2 + H**2)
    assert profile == pytest.approx(0.0032) and plan == pytest.approx(0.0232)
    dem = make_dem(quadratic_window())
    assert T.curvature(dem, "profile").values[1, 1] == pytest.approx(profile, abs=1e-12)
    assert T.curvature(dem, "plan").values[1, 1] == pytest.approx(plan, abs=1e-12)
    assert T.curvature(dem, "total").values[1, 1] == pytest.approx(-2 * (D + E), abs=1e-12)


@pytest.mark.reference
def test_curvature_signs_on_bowl_and_dome():
    """DERIVED sign check of the pinned convention: on the dome z = -(x^2 + y^2) total curvature is
    -laplacian = +4 (convex); on the convergent cone z = r plan curvature is +1/r."""
    xx, yy = xy_grid(21, 21)
    xx, yy = xx - xx.mean(), yy - yy.mean()
    dome = T.curvature(make_dem(-(xx**2 + yy**2)), "total").values
    np.testing.assert_allclose(dome[5:-5, 5:-5], 4.0, rtol=1e-9)
    r = np.hypot(xx, yy)
    plan = T.curvature(make_dem(r), "plan").values
    ring = (r > 60) & (r < 90)
    np.testing.assert_allclose(plan[ring], 1 / r[ring], rtol=0.1)


def _chunked(dem: xr.DataArray, chunks: int) -> xr.DataArray:
    return dem.copy(data=da.from_array(dem.values, chunks=chunks))


@pytest.mark.parametrize(
    "func",
    [
        lambda d: T.slope(d),
        lambda d: T.aspect(d),
        lambda d: T.curvature(d, "plan"),
        lambda d: T.curvature(d, "profile"),
        lambda d: T.topographic_position_index(d, 35.0),
        lambda d: T.topographic_position_index(d, 52.0, inner_radius_m=20.0),
    ],
    ids=["slope", "aspect", "plan", "profile", "tpi", "tpi_annulus"],
)
def test_chunked_equals_whole_array(func):
    """map_overlap with the stencil depth reproduces the whole-array result at chunk seams, stays lazy."""
    z = random_dem((47, 53), seed=5)
    z[10:13, 20:26] = np.nan
    whole = func(make_dem(z))
    lazy = func(_chunked(make_dem(z), 16))
    assert isinstance(lazy.data, da.Array)
    np.testing.assert_allclose(lazy.values, whole.values, rtol=1e-12, atol=1e-12, equal_nan=True)
    assert np.array_equal(np.isnan(whole.values), np.isnan(z) | np.isnan(whole.values))
    assert np.isnan(whole.values[11, 22]) and not np.isnan(whole.values[0, 0])


def test_global_operations_accept_dask_input():
    """Routing computes in memory but returns an array chunked like a dask-backed input."""
    z = random_dem((30, 34), seed=11)
    lazy = _chunked(make_dem(z), 10)
    funcs = (T.fill_depressions, lambda d: T.flow_accumulation(d, method="mfd"), T.topographic_wetness_index)
    for func in funcs:
        out = func(lazy)
        assert isinstance(out.data, da.Array) and out.chunks == lazy.chunks
        np.testing.assert_array_equal(out.values, func(make_dem(z)).values)


def test_outputs_have_fresh_attrs_and_errors_are_explicit():
    dem = make_dem(random_dem((10, 12)))
    dem.attrs = {"units": "m", "long_name": "elevation"}
    out = T.slope(dem, units="percent")
    assert out.attrs["units"] == "%" and out.attrs["domain"] == "terrain" and out.name == "slope"
    with pytest.raises(ValueError, match="units must be one of"):
        T.slope(dem, units="gradians")
    with pytest.raises(GridMismatchError, match="dims"):
        T.slope(dem.T)
    with pytest.raises(GridMismatchError, match="north-up"):
        T.slope(dem.isel(y=slice(None, None, -1)))


# ------------------------------------------------------------- flow routing


def _plane(ny=60, nx=60, s=0.05):
    xx, yy = xy_grid(ny, nx)
    return make_dem(100 - s * xx), xx


@pytest.mark.reference
@pytest.mark.parametrize("method, rtol", [("d8", 1e-9), ("mfd", 1e-4), ("mfd_quinn", 1e-4)])
def test_sca_on_grid_aligned_plane(method, rtol):
    """DERIVED closed form (Zhou & Liu 2002; Tarboton 1997 SCA = A/L): on a plane draining east,
    SCA = L, the distance from the upslope (west) edge to the cell's downslope face.  MFD is exact on an
    infinite plane; the 1e-4 allows for flow the north/south border rows turn back inwards."""
    dem, xx = _plane()
    sca = T.specific_catchment_area(dem, method=method).values
    length = xx + CS / 2
    rows = slice(20, -20)  # MFD spreads sideways; keep away from the north/south borders
    np.testing.assert_allclose(sca[rows], length[rows], rtol=rtol)
    acc = T.flow_accumulation(dem, method=method).values
    np.testing.assert_allclose(acc.min(), CS * CS)
    assert acc.max() <= dem.size * CS * CS * (1 + 1e-9)


@pytest.mark.reference
@pytest.mark.parametrize("method, rtol", [("d8", 1e-9), ("mfd", 0.02)])
def test_sca_on_plane_at_45_degrees(method, rtol):
    """DERIVED closed form: on a plane draining south-east, SCA = length of the flow line back to the
    edge.  D8 flow lines are cellsize/sqrt(2) apart (exact); for Freeman MFD (p = 1.1) a flux balance
    across a diagonal gives SCA = 0.994 L with width = cellsize, hence 2 %."""
    n = 50
    xx, yy = xy_grid(n, n)
    dem = make_dem(200 - 0.05 * (xx - yy))
    sca = T.specific_catchment_area(dem, method=method).values
    i, j = np.indices((n, n))
    length = (np.minimum(i, j) + 1) * CS * math.sqrt(2)
    # away from the upslope corner and from the downslope borders, where flow turns along the edge
    inner = (i > 15) & (j > 15) & (np.abs(i - j) > 8) & (i < n - 3) & (j < n - 3)
    np.testing.assert_allclose(sca[inner], length[inner], rtol=rtol)


def _cone(n=101, convergent=False):
    xx, yy = xy_grid(n, n)
    xx, yy = xx - xx.mean(), yy - yy.mean()
    r = np.hypot(xx, yy)
    radius = (n // 2) * CS
    z = 0.1 * r if convergent else 500 - 0.1 * r
    z = np.where(r <= radius, z, np.nan)
    if convergent:
        z[n // 2, n // 2] = np.nan  # outlet at the centre: flow leaves into nodata
    return make_dem(z), r, radius


@pytest.mark.reference
def test_sca_on_divergent_cone():
    """DERIVED closed form SCA = r/2 on the cone z = h - s r (Zhou & Liu 2002 test-surface idea).
    Tolerances from memory of the routing literature (Freeman 1991; Zhou & Liu 2002): MFD within about
    10 % median error away from the summit, D8 clearly worse on divergent surfaces."""
    dem, r, radius = _cone()
    ring = (r > 10 * CS) & (r < radius - 5 * CS)
    err = {m: np.median(np.abs(T.specific_catchment_area(dem, method=m).values[ring] / (r[ring] / 2) - 1))
           for m in ("mfd", "d8")}
    assert err["mfd"] < 0.10
    assert err["d8"] > 2 * err["mfd"]


@pytest.mark.reference
def test_sca_on_convergent_cone():
    """DERIVED closed form SCA = (R^2 - r^2) / (2 r) on the inverted cone with rim R (Zhou & Liu 2002
    test-surface idea); MFD median relative error below 20 % (tolerance from memory)."""
    dem, r, radius = _cone(convergent=True)
    ring = (r > 5 * CS) & (r < radius - 10 * CS)
    sca = T.specific_catchment_area(dem, method="mfd").values[ring]
    expected = (radius**2 - r[ring] ** 2) / (2 * r[ring])
    assert np.median(np.abs(sca / expected - 1)) < 0.20


def test_accumulation_conserves_area_and_unconditioned_pits_are_sinks():
    """All area reaches an outlet; without conditioning a pit keeps the area that reaches it."""
    z = random_dem((40, 45), seed=7)
    dem = make_dem(z)
    for method in ("d8", "mfd"):
        acc = T.flow_accumulation(dem, method=method).values
        assert np.all(acc >= CS * CS - 1e-9)
    xx, yy = xy_grid(21, 21)
    bowl = make_dem(np.hypot(xx - xx.mean(), yy - yy.mean()))
    acc = T.flow_accumulation(bowl, method="mfd", conditioned=False).values
    assert acc[10, 10] == pytest.approx(21 * 21 * CS * CS, rel=1e-9)


@pytest.mark.reference
@pytest.mark.parametrize("method", ["d8", "mfd"])
def test_twi_on_plane(method):
    """DERIVED closed form for TWI = ln(a / tan b) (Beven & Kirkby 1979): ln(L / s) on a plane of slope s."""
    dem, xx = _plane(s=0.05)
    twi = T.topographic_wetness_index(dem, method=method)
    expected = np.log((xx + CS / 2) / 0.05)
    np.testing.assert_allclose(twi.values[20:-20], expected[20:-20], atol=1e-4)
    assert parameters_of(twi)["min_slope"] == 0.001


# ------------------------------------------------------------- TPI, HAND, DTW


@pytest.mark.reference
def test_tpi_on_paraboloid():
    """DERIVED: for z = x^2 + y^2 the annulus mean minus the centre is the mean of d^2 over the footprint
    offsets, so TPI = -mean(d^2) (exact, computed here from the disk)."""
    xx, yy = xy_grid(31, 31)
    xx, yy = xx - xx.mean(), yy - yy.mean()
    tpi = T.topographic_position_index(make_dem(xx**2 + yy**2), 30.0).values
    di, dj = np.mgrid[-3:4, -3:4]
    d2 = (di**2 + dj**2) * CS**2
    ring = (d2 > 0) & (d2 <= 30.0**2)
    assert tpi[15, 15] == pytest.approx(-d2[ring].mean(), rel=1e-12)


@pytest.mark.reference
def test_hand_in_v_valley():
    """DERIVED: in a V valley whose side slope s1 (0.1) is much steeper than the down-valley slope (0.01),
    D8 paths run straight across to the channel, so HAND = s1 * distance to the channel
    (Renno et al. 2008 definition)."""
    xx, yy = xy_grid(60, 41)
    xc = xx - xx[0, 20]
    dem = make_dem(0.1 * np.abs(xc) + 0.01 * yy)
    hand = T.height_above_nearest_drainage(dem, channel_threshold_m2=41 * 20 * CS * CS).values
    rows = slice(30, 59)
    np.testing.assert_allclose(hand[rows], 0.1 * np.abs(xc)[rows], atol=1e-6)
    assert np.all(np.isnan(hand[:5, 1:-1]) | (hand[:5, 1:-1] >= 0))


@pytest.mark.reference
def test_depth_to_water_on_plane():
    """DERIVED (Murphy, Ogilvie & Arp 2009 cost definition): on a plane of slope s, DTW k straight cells
    from the water equals k * s * cellsize, the elevation difference."""
    xx, _ = xy_grid(20, 30)
    dem = make_dem(0.04 * xx)
    water = xr.zeros_like(dem, dtype=bool)
    water[:, 0] = True
    dtw = T.depth_to_water(dem, water_mask=water).values
    k = np.arange(30)
    np.testing.assert_allclose(dtw, np.broadcast_to(k * 0.04 * CS, dtw.shape), atol=1e-9)
    with pytest.raises(ValueError, match="exactly one"):
        T.depth_to_water(dem)


# -------------------------------------------------------------------- MRVBF
# Gallant, J. C., Dowling, T. I. (2003) A multiresolution index of valley bottom flatness for mapping
# depositional areas. Water Resources Research 39(12), 1347.  Step details are from memory (see
# wetlandflow.features.mrvbf); the checks below are DERIVED from those stated equations or qualitative
# properties the abstract states (flat + low = valley bottom; larger = broader and flatter).


def test_elevation_percentile_kernel_matches_its_definition():
    """The MRVBF percentile (Gallant & Dowling 2003: share of cells within the radius lower than the
    centre) equals a brute-force count, at borders and next to nodata; the fused kernel returns N(PCTL)."""
    from wetlandflow.features import _terrain_kernels as K

    z = random_dem((23, 26), seed=2)
    z[8:10, 5:9] = np.nan
    radius = 3.0
    out = K.position(z, radius, 0.4, False, np.zeros((0, 0)))
    for ci, cj in ((11, 0), (10, 6), (0, 25), (15, 15)):  # border, beside the hole, corner, interior
        di, dj = np.mgrid[-3:4, -3:4]
        ii, jj = ci + di, cj + dj
        inside = (ii >= 0) & (ii < z.shape[0]) & (jj >= 0) & (jj < z.shape[1]) & (di**2 + dj**2 <= radius**2)
        inside &= (di != 0) | (dj != 0)
        values = z[ii[inside], jj[inside]]
        values = values[~np.isnan(values)]
        pctl = np.mean(values < z[ci, cj])
        assert out[ci, cj] == pytest.approx(1 / (1 + (pctl / 0.4) ** 3), rel=1e-12)
    assert np.isnan(out[8, 5]) and np.isfinite(out[~np.isnan(z)]).all()


@pytest.mark.reference
def test_mrvbf_slope_threshold_rule():
    """Rule quoted from Gallant & Dowling (2003) in a secondary source: 16 % at 25 m, 8 % at 75 m,
    32 % at 8 m (one factor 2 per factor 3 of resolution); 10 m -> 28.52 % DERIVED."""
    from wetlandflow.features.mrvbf import mrvbf_slope_threshold

    assert mrvbf_slope_threshold(25.0) == pytest.approx(16.0)
    assert mrvbf_slope_threshold(75.0) == pytest.approx(8.0)
    assert mrvbf_slope_threshold(25.0 / 3) == pytest.approx(32.0)
    assert mrvbf_slope_threshold(10.0) == pytest.approx(28.52, abs=0.005)


@pytest.mark.reference
@pytest.mark.parametrize("steps, expected", [(2, 1.98768), (3, 2.98767), (4, 3.98767)])
def test_mrvbf_on_flat_plain(steps, expected):
    """DERIVED from the Gallant & Dowling (2003) equations: a flat plain has F = 1 and PCTL = 0, so
    VF = 1 - N(1; 0.3, 4) = 0.99197 at every step and MRVBF = s - 0.012 after s steps."""
    from wetlandflow.features.mrvbf import mrvbf

    out = mrvbf(make_dem(np.full((45, 45), 10.0), 25.0), steps=steps)
    np.testing.assert_allclose(out.values, expected, atol=2e-5)
    assert parameters_of(out)["steps"] == steps


def _valley(floor_width_m: float, n: int = 243, cs: float = 25.0):
    xx, yy = xy_grid(n, n, cs)
    d = np.abs(xx - xx.mean())
    return make_dem(np.maximum(0.0, d - floor_width_m / 2) * 0.3 + 0.002 * yy, cs), d


@pytest.mark.reference
def test_mrvbf_on_synthetic_valleys():
    """Qualitative properties stated by Gallant & Dowling (2003): high on a flat valley floor, about zero
    on slopes well above the slope threshold (30 % vs 16 %), larger for a broader valley."""
    from wetlandflow.features.mrvbf import mrvbf

    band_means = []
    for width in (150.0, 300.0, 1000.0):
        dem, d = _valley(width)
        m = mrvbf(dem).values
        assert np.all(m[d < 10] > 2.5)
        assert np.median(m[d > width / 2 + 200]) < 0.05
        band_means.append(m[d <= 150].mean())
    assert band_means[0] < band_means[1] < band_means[2]


@pytest.mark.reference
def test_mrrtf_on_flat_ridge_and_nodata():
    """Gallant & Dowling (2003): MRRTF marks flat high ground; an inverted valley gives a high index on
    the flat crest and about zero on its steep flanks.  NaN in gives NaN out, finite elsewhere."""
    from wetlandflow.features.mrvbf import mrrtf

    dem, d = _valley(1000.0)
    ridge = -dem
    ridge[100:105, 10:15] = np.nan
    r = mrrtf(ridge).values
    assert np.median(r[d < 100]) > 3.0
    assert np.nanmedian(r[d > 800]) < 0.05
    hole = np.isnan(ridge.values)
    assert np.isnan(r[hole]).all() and np.isfinite(r[~hole]).all()
