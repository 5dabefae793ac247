"""The reference grid: snapping, immutability, coordinates, mismatch messages."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from affine import Affine

from wetlandflow.errors import AlignmentError, GridMismatchError
from wetlandflow.inputs.grid import Grid, require_match


def test_from_bbox_snaps_outward_to_whole_pixels():
    g = Grid.from_bbox((500003.0, 6000001.0, 500997.0, 6000999.0), crs="EPSG:32633", resolution=10)
    assert g.bounds == (500000.0, 6000000.0, 501000.0, 6001000.0)
    assert g.shape == (100, 100)
    assert g.pixel_area_m2 == 100.0


def test_grid_is_frozen_and_hashable():
    g = Grid.from_bbox((0, 0, 100, 100), crs="EPSG:32633", resolution=10)
    with pytest.raises(dataclasses.FrozenInstanceError):
        g.width = 5
    assert hash(g) == hash(Grid.from_bbox((0, 0, 100, 100), crs="EPSG:32633", resolution=10))


def test_pixel_centres():
    g = Grid.from_bbox((0, 0, 30, 20), crs="EPSG:32633", resolution=10)
    x, y = g.xy_coords()
    np.testing.assert_array_equal(x, [5, 15, 25])
    np.testing.assert_array_equal(y, [15, 5])


def test_rowcol_inverts_centres():
    g = Grid.from_bbox((1000, 2000, 1500, 2400), crs="EPSG:32633", resolution=10)
    x, y = g.xy_coords()
    rows, cols = g.rowcol(x[[0, 7, 49]], y[[3, 3, 39]])
    np.testing.assert_array_equal(rows, [3, 3, 39])
    np.testing.assert_array_equal(cols, [0, 7, 49])


def test_geographic_grid_refused():
    with pytest.raises(AlignmentError, match="geographic"):
        Grid.from_bbox((10, 50, 11, 51), crs="EPSG:4326", resolution=0.0001)


def test_feet_grid_refused():
    # EPSG:2227 (a US State Plane zone) has axes in US survey feet
    with pytest.raises(AlignmentError, match="metres"):
        Grid.from_bbox((6e6, 2e6, 6.001e6, 2.001e6), crs="EPSG:2227", resolution=10)


def test_rotated_transform_refused():
    with pytest.raises(AlignmentError, match="north-up"):
        Grid("EPSG:32633", Affine(10, 1, 0, 0, -10, 100), 10, 10)


def test_require_match_names_the_offset():
    g = Grid.from_bbox((0, 0, 100, 100), crs="EPSG:32633", resolution=10)
    da = g.empty("ndvi")
    require_match(da, g)
    shifted = da.assign_coords(x=da.x + 2.5)
    with pytest.raises(GridMismatchError, match=r"ndvi.*offset .* 0\.25 pixel"):
        require_match(shifted, g)
    with pytest.raises(GridMismatchError, match="shape"):
        require_match(da.isel(x=slice(0, 5)), g)


def test_dict_round_trip():
    g = Grid.from_bbox((0, 0, 100, 50), crs="EPSG:32633", resolution=5)
    assert Grid.from_dict(g.to_dict()) == g
