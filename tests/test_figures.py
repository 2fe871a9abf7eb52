"""Figures: coastlines from the package, never from the network."""

import time

import numpy as np
import pytest

from climodes import figures  # noqa: F401  (importing it switches cartopy's downloads off)
from climodes.coastline import coastlines
from climodes.demo import land_mask


def test_shipped_coastlines_cover_the_world():
    lines = coastlines()
    west, south, east, north = lines.bounds
    assert west <= -179 and east >= 179 and south < -80 and north > 80
    assert len(lines.geoms) > 100


def test_land_and_sea_where_they_are():
    """Common knowledge of geography: central Africa and Siberia are land, the central Pacific is sea."""
    lat = np.array([0.0, 60.0, 0.0])
    lon = np.array([20.0, 100.0, 180.0])
    mask = land_mask(lat, lon)
    assert mask[0, 0] and mask[1, 1] and not mask[2, 2] and not mask[0, 2]


def test_a_cartopy_download_fails_at_once():
    import cartopy.feature

    feature = cartopy.feature.NaturalEarthFeature("physical", "land", "50m")
    start = time.monotonic()
    with pytest.raises(ValueError, match="No generic downloadable item"):
        list(feature.geometries())
    assert time.monotonic() - start < 5
