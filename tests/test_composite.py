"""Filters resampled onto the cutout's grid and colour composites (display only)."""

import numpy as np
import pytest
import astropy.units as u

from lensview import demo
from lensview.composite import band_on_grid, colour_composite
from lensview.errors import LensviewInputError


@pytest.fixture(scope="module")
def field():
    cutout, _, _ = demo.load_demo()
    return cutout, demo.load_demo_filters()


def _circle_sum(data, wcs, centre, radius_arcsec):
    x0, y0 = (float(v) for v in wcs.world_to_pixel(centre))
    scale = wcs.proj_plane_pixel_scales()[0].to_value(u.arcsec)
    yy, xx = np.mgrid[:data.shape[0], :data.shape[1]]
    inside = np.hypot(xx - x0, yy - y0) * scale <= radius_arcsec
    return np.nansum(data[inside])


def test_resampling_keeps_the_flux_in_a_circle(field):
    cutout, filters = field
    red = filters[-1]
    on_grid = band_on_grid(red, cutout.wcs, cutout.data.shape)
    # Total f_nu within a circle on the sky is the same on either grid (surface
    # brightness times pixel area; common practice for resampling); a circle does
    # not care that the grids are rotated. The circle holds a member galaxy.
    centre = demo.scenario.scenario_sky(demo.scenario.MEMBERS[3].east,
                                        demo.scenario.MEMBERS[3].north)
    native = _circle_sum(red.data, red.wcs, centre, 2.5) * red.band.unit_flux_density().to_value(u.uJy)
    resampled = _circle_sum(on_grid, cutout.wcs, centre, 2.5)
    assert resampled == pytest.approx(native, rel=0.02)
    assert np.isnan(on_grid).any()  # the rotated filter does not cover the corners


def test_composite_is_rgb_and_needs_three_filters(field):
    cutout, filters = field
    rgb = colour_composite(filters[1:], cutout.wcs, cutout.data.shape)
    assert rgb.shape == cutout.data.shape + (3,) and rgb.dtype == np.uint8
    assert rgb.max() > 0
    with pytest.raises(LensviewInputError, match="three filters"):
        colour_composite(filters[:2], cutout.wcs, cutout.data.shape)
