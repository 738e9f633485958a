"""Time delays between images, against the closed forms of the SIS and the point mass."""

import numpy as np
import pytest
import astropy.constants as const
import astropy.units as u
from astropy.cosmology import FlatLambdaCDM

import lensview as lv
from lensview.lens.timedelay import arrival_times, pair_time_delay, time_delay_scale

from closed_form import make_wcs

Z_LENS, Z_SOURCE = 0.35, 1.8
H0 = 70.0
EDS = FlatLambdaCDM(H0=H0, Om0=1.0, Tcmb0=0.0)
SCALE = 0.05  # arcsec per pixel
N = 320


def eds_distances(z_l, z_s, h0=H0):
    """Einstein-de Sitter: D_C = (2c/H0)(1 - 1/sqrt(1+z)), flat so
    D_A(z1, z2) = (D_C2 - D_C1)/(1 + z2) (Hogg 1999, arXiv:astro-ph/9905116, eqs. 15-19)."""
    hubble = const.c / (h0 * u.km / u.s / u.Mpc)

    def comoving(z):
        return 2 * hubble * (1 - 1 / np.sqrt(1 + z))

    d_l = comoving(z_l) / (1 + z_l)
    d_s = comoving(z_s) / (1 + z_s)
    d_ls = (comoving(z_s) - comoving(z_l)) / (1 + z_s)
    return d_l.to(u.Mpc), d_s.to(u.Mpc), d_ls.to(u.Mpc)


def test_eds_distances_in_astropy_match_the_closed_form():
    d_l, d_s, d_ls = eds_distances(Z_LENS, Z_SOURCE)
    # Hogg 1999 closed form against astropy's FlatLambdaCDM(Om0=1).
    assert np.isclose(EDS.angular_diameter_distance(Z_LENS).to_value(u.Mpc), d_l.value, rtol=1e-8)
    assert np.isclose(EDS.angular_diameter_distance(Z_SOURCE).to_value(u.Mpc), d_s.value, rtol=1e-8)
    assert np.isclose(EDS.angular_diameter_distance_z1z2(Z_LENS, Z_SOURCE).to_value(u.Mpc),
                      d_ls.value, rtol=1e-8)
    expected = ((1 + Z_LENS) / const.c * d_l * d_s / d_ls * (1 * u.arcsec).to(u.rad).value ** 2)
    assert np.isclose(time_delay_scale(Z_LENS, Z_SOURCE, EDS).to_value(u.day / u.arcsec**2),
                      expected.to_value(u.day), rtol=1e-8)


def centred_grid(rotation, centre):
    wcs = make_wcs(N, N, scale_arcsec=SCALE, rotation_deg=rotation)
    y, x = np.mgrid[0:N, 0:N].astype(float)
    return wcs, x - centre[0], y - centre[1]


def sis_fields(theta_e, rotation, centre):
    """SIS, alpha = theta_E theta/|theta|, psi = theta_E |theta| (Narayan & Bartelmann 1996),
    made for the source redshift (z_norm = Z_SOURCE) so that f = 1."""
    wcs, dx, dy = centred_grid(rotation, centre)
    r = np.hypot(dx, dy)
    pair = lv.DeflectionField(theta_e * dx / r, theta_e * dy / r, wcs, units="pixel",
                              z_lens=Z_LENS, z_norm=Z_SOURCE, cosmology=EDS, name="sis pair")
    potential = lv.DeflectionField.from_potential(theta_e * r * SCALE**2, wcs, z_lens=Z_LENS,
                                                  z_norm=Z_SOURCE, cosmology=EDS, name="sis psi")
    return wcs, pair, potential


def point_mass_fields(theta_e, rotation, centre):
    """Point mass, alpha = theta_E^2 theta/|theta|^2, psi = theta_E^2 ln|theta| (SEF 1992, sec. 8.1.1)."""
    wcs, dx, dy = centred_grid(rotation, centre)
    r2 = dx * dx + dy * dy
    pair = lv.DeflectionField(theta_e**2 * dx / r2, theta_e**2 * dy / r2, wcs, units="pixel",
                              z_lens=Z_LENS, z_norm=Z_SOURCE, cosmology=EDS, name="pm pair")
    potential = lv.DeflectionField.from_potential(theta_e**2 * 0.5 * np.log(r2) * SCALE**2, wcs,
                                                  z_lens=Z_LENS, z_norm=Z_SOURCE, cosmology=EDS,
                                                  name="pm psi")
    return wcs, pair, potential


def images_of(field, wcs, xy):
    table = lv.predict_counterimages(wcs.pixel_to_world(*xy), field, Z_SOURCE)
    return table


@pytest.mark.parametrize("beta_over_e, phi, rotation", [(0.3, 0.4, 0.0), (0.55, 2.6, 31.0),
                                                        (0.15, -1.2, -70.0)])
def test_sis_delay_matches_closed_form(beta_over_e, phi, rotation):
    theta_e = 90.0
    centre = (N / 2 + 0.37, N / 2 - 0.21)
    wcs, pair, potential = sis_fields(theta_e, rotation, centre)
    beta = beta_over_e * theta_e
    direction = np.array([np.cos(phi), np.sin(phi)])
    image_a = np.array(centre) + (theta_e + beta) * direction   # outside the ring, minimum
    image_b = np.array(centre) - (theta_e - beta) * direction   # inside, saddle
    d_l, d_s, d_ls = eds_distances(Z_LENS, Z_SOURCE)
    theta_a, theta_b = ((theta_e + beta) * SCALE * u.arcsec).to(u.rad), \
        ((theta_e - beta) * SCALE * u.arcsec).to(u.rad)
    # SIS: delta t = (1+z_l)/(2c) D_l D_s/D_ls (theta_A^2 - theta_B^2)
    # (Narayan & Bartelmann 1996, sec. 3.1; Schneider, Ehlers & Falco 1992, sec. 8.1.4).
    expected = ((1 + Z_LENS) / (2 * const.c) * d_l * d_s / d_ls
                * (theta_a.value**2 - theta_b.value**2)).to(u.day)
    assert expected > 1 * u.day
    for field in (pair, potential):
        table = images_of(field, wcs, image_b)
        assert len(table) == 2
        other = table[~table["is_input"]][0]
        assert np.hypot(other["x_map"] - image_a[0], other["y_map"] - image_a[1]) < 1e-3
        # The outer image (positive parity) leads: the knot (inner image) comes later.
        assert other["arrival_order"] == 1 and other["time_delay_days"] == 0
        knot = table[table["is_input"]][0]
        assert knot["arrival_order"] == 2 and knot["parity"] == -1
        assert abs(knot["time_delay_days"] / expected.value - 1) < 1e-3


@pytest.mark.parametrize("u_source, phi", [(0.5, 0.3), (1.2, 2.2), (0.25, -2.0)])
def test_point_mass_delay_matches_closed_form(u_source, phi):
    theta_e = 60.0
    centre = (N / 2 - 0.41, N / 2 + 0.29)
    wcs, pair, potential = point_mass_fields(theta_e, 12.0, centre)
    root = np.sqrt(u_source**2 + 4)
    direction = np.array([np.cos(phi), np.sin(phi)])
    plus = np.array(centre) + 0.5 * (u_source + root) * theta_e * direction
    minus = np.array(centre) + 0.5 * (u_source - root) * theta_e * direction
    d_l, d_s, d_ls = eds_distances(Z_LENS, Z_SOURCE)
    theta_e_rad = (theta_e * SCALE * u.arcsec).to_value(u.rad)
    # theta_E^2 = 4GM/c^2 D_ls/(D_l D_s) (SEF 1992, eq. 2.6 / sec. 8.1.1) gives the mass ...
    mass = theta_e_rad**2 * const.c**2 * d_l * d_s / (4 * const.G * d_ls)
    # ... and SEF 1992 (sec. 8.1.1): delta t = 4GM/c^3 (1+z_l)
    #     [u sqrt(u^2+4)/2 + ln((sqrt(u^2+4)+u)/(sqrt(u^2+4)-u))].
    expected = (4 * const.G * mass / const.c**3 * (1 + Z_LENS)
                * (u_source * root / 2 + np.log((root + u_source) / (root - u_source)))).to(u.day)
    assert expected > 1 * u.day
    for field in (pair, potential):
        table = images_of(field, wcs, plus)
        outer = table[table["is_input"]][0]
        assert outer["arrival_order"] == 1 and outer["time_delay_days"] == 0
        inner = [row for row in table[~table["is_input"]]
                 if np.hypot(row["x_map"] - minus[0], row["y_map"] - minus[1]) < 1e-2]
        assert len(inner) == 1
        assert abs(inner[0]["time_delay_days"] / expected.value - 1) < 1e-3
        assert inner[0]["arrival_order"] == 2


def test_path_detours_around_masked_cells_and_gives_nan_when_cut_off():
    theta_e = 90.0
    centre = (N / 2 + 0.37, N / 2 - 0.21)
    wcs, dx, dy = centred_grid(0.0, centre)
    r = np.hypot(dx, dy)
    ax, ay = theta_e * dx / r, theta_e * dy / r
    beta = 30.0
    image_a = np.array(centre) + np.array([theta_e + beta, 0.0])
    image_b = np.array(centre) - np.array([theta_e - beta, 0.0])
    reference = lv.DeflectionField(ax, ay, wcs, units="pixel", z_lens=Z_LENS, z_norm=Z_SOURCE,
                                   cosmology=EDS)
    expected, _ = arrival_times(reference, [image_a[0], image_b[0]], [image_a[1], image_b[1]],
                                Z_SOURCE)
    # A masked block on the straight path between the images, away from the centre.
    masked_x, masked_y = ax.copy(), ay.copy()
    hole = (np.abs(dx - 60) < 8) & (np.abs(dy) < 8)
    masked_x[hole] = np.nan
    masked_y[hole] = np.nan
    masked = lv.DeflectionField(masked_x, masked_y, wcs, units="pixel", z_lens=Z_LENS,
                                z_norm=Z_SOURCE, cosmology=EDS)
    delays, order = arrival_times(masked, [image_a[0], image_b[0]], [image_a[1], image_b[1]],
                                  Z_SOURCE)
    # alpha is curl-free, so any path between the images gives the same psi difference
    # (SEF 1992, eq. 5.8: alpha = grad psi).
    assert np.allclose(delays.value, expected.value, rtol=1e-6)
    assert list(order) == [1, 2]
    # A wall of NaN across the whole map: no path, so no delay.
    wall_x, wall_y = ax.copy(), ay.copy()
    wall_x[:, int(centre[0]) + 40] = np.nan
    walled = lv.DeflectionField(wall_x, wall_y, wcs, units="pixel", z_lens=Z_LENS,
                                z_norm=Z_SOURCE, cosmology=EDS)
    delays, order = arrival_times(walled, [image_a[0], image_b[0]], [image_a[1], image_b[1]],
                                  Z_SOURCE)
    assert np.isnan(delays[1].value) and list(order) == [1, 0]


def test_delays_scale_as_one_over_h0():
    theta_e = 90.0
    centre = (N / 2 + 0.37, N / 2 - 0.21)
    wcs, pair, _ = sis_fields(theta_e, 0.0, centre)
    slow = FlatLambdaCDM(H0=H0 / 2, Om0=1.0, Tcmb0=0.0)
    other = lv.DeflectionField(*pair.node_deflection(slice(None), slice(None)), wcs, units="pixel",
                               z_lens=Z_LENS, z_norm=Z_SOURCE, cosmology=slow)
    x, y = [centre[0] + 110.0, centre[0] - 70.0], [centre[1], centre[1]]
    fast_delay = arrival_times(pair, x, y, Z_SOURCE)[0][1]
    slow_delay = arrival_times(other, x, y, Z_SOURCE)[0][1]
    # Distances scale as c/H0 (Hogg 1999), so delays scale as 1/H0.
    assert np.isclose((slow_delay / fast_delay).value, 2.0, rtol=1e-9)


def test_pair_delay_names_the_leading_knot():
    theta_e = 90.0
    centre = (N / 2 + 0.37, N / 2 - 0.21)
    wcs, pair, potential = sis_fields(theta_e, 20.0, centre)
    beta = 50.0
    image_a = np.array(centre) + np.array([theta_e + beta, 0.0])
    image_b = np.array(centre) - np.array([theta_e - beta, 0.0])
    knots = wcs.pixel_to_world([image_b[0], image_a[0]], [image_b[1], image_a[1]])
    single = pair_time_delay(pair, [image_b[0], image_a[0]], [image_b[1], image_a[1]], Z_SOURCE)
    table = lv.pair_counterparts(knots, [pair, potential], Z_SOURCE, max_score=50)
    assert len(table) == 3  # each model and the consensus
    d_l, d_s, d_ls = eds_distances(Z_LENS, Z_SOURCE)
    theta_a = ((theta_e + beta) * SCALE * u.arcsec).to_value(u.rad)
    theta_b = ((theta_e - beta) * SCALE * u.arcsec).to_value(u.rad)
    # SIS closed form as above (Narayan & Bartelmann 1996): knot j (outer) leads, so t_j - t_i < 0.
    expected = -((1 + Z_LENS) / (2 * const.c) * d_l * d_s / d_ls
                 * (theta_a**2 - theta_b**2)).to_value(u.day)
    assert np.isclose(single.to_value(u.day), expected, rtol=1e-3)
    for row in table:
        assert (row["i"], row["j"]) == (0, 1)
        assert row["leading"] == 1
        assert abs(row["time_delay_days"] / expected - 1) < 1e-3
    assert table["time_delay_days"].unit == u.day
