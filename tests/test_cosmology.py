import math

import numpy as np
import pytest
import astropy.constants as const
import astropy.units as u
import astropy.cosmology.units as cu
from astropy.cosmology import FlatLambdaCDM, LambdaCDM, Planck18

from lensview import cosmology as lc
from lensview.errors import LensviewInputError

H0 = 70.0 * u.km / u.s / u.Mpc
EDS = FlatLambdaCDM(H0=H0, Om0=1.0)  # Einstein-de Sitter: no Lambda, no radiation (Tcmb0 = 0)


def eds_comoving(z):
    # Einstein-de Sitter closed form D_C = (2c/H0)(1 - 1/sqrt(1+z))
    # (Hogg 1999, arXiv:astro-ph/9905116).
    return (2 * const.c / H0 * (1 - 1 / np.sqrt(1 + np.asarray(z, float)))).to(u.Mpc)


def test_default_is_planck18_and_any_cosmology_is_kept():
    assert lc.resolve_cosmology() is Planck18
    assert lc.resolve_cosmology(None) is Planck18
    assert lc.resolve_cosmology(EDS) is EDS
    other = FlatLambdaCDM(H0=68, Om0=0.31)
    assert lc.resolve_cosmology(other) is other


@pytest.mark.parametrize("bad", ["Planck18", 70.0, {"H0": 70}])
def test_resolve_cosmology_rejects_other_things(bad):
    with pytest.raises(LensviewInputError, match="not an astropy cosmology"):
        lc.resolve_cosmology(bad)


def test_einstein_de_sitter_distances_match_closed_form():
    z = np.array([0.1, 0.5, 1.0, 3.0, 7.5])
    d_a = lc.angular_diameter_distance(z, EDS)
    assert d_a.unit == u.Mpc
    # D_A = D_C / (1 + z) in a flat universe (Hogg 1999, eq. 16, 18).
    expected = eds_comoving(z) / (1 + z)
    np.testing.assert_allclose(d_a.value, expected.value, rtol=1e-8)

    z1, z2 = 0.4, 2.3
    between = lc.angular_diameter_distance_between(z1, z2, EDS)
    # D_A(z1, z2) = (D_C(z2) - D_C(z1)) / (1 + z2) for a flat universe (Hogg 1999, eq. 19).
    expected = (eds_comoving(z2) - eds_comoving(z1)) / (1 + z2)
    assert between.unit == u.Mpc
    assert between.value == pytest.approx(expected.value, rel=1e-8)


def test_einstein_de_sitter_distance_ratio_and_scale_match_closed_form():
    z_l, z_s = 0.35, 1.8
    # Flat universe: D_ls/D_s = (D_C(z_s) - D_C(z_l)) / D_C(z_s) (Hogg 1999, eq. 19 over eq. 18).
    expected = 1 - eds_comoving(z_l).value / eds_comoving(z_s).value
    assert lc.distance_ratio(z_l, z_s, EDS) == pytest.approx(expected, rel=1e-8)
    assert isinstance(lc.distance_ratio(z_l, z_s, EDS), float)

    scale = lc.angular_scale(z_l, EDS)
    # 1 arcsec = pi / 648000 rad (definition of the arcsecond).
    expected_pc = (eds_comoving(z_l) / (1 + z_l)).to_value(u.pc) * math.pi / 648000
    assert scale.unit == u.pc / u.arcsec
    assert scale.value == pytest.approx(expected_pc, rel=1e-8)


def test_planck18_matches_astropy_distances():
    z_l, z_s = 0.308, 3.2
    # Reference library: astropy.cosmology.Planck18.
    d_ls = Planck18.angular_diameter_distance_z1z2(z_l, z_s)
    d_s = Planck18.angular_diameter_distance(z_s)
    assert lc.distance_ratio(z_l, z_s) == pytest.approx((d_ls / d_s).value, rel=1e-12)
    assert lc.angular_diameter_distance_between(z_l, z_s).value == pytest.approx(
        d_ls.to_value(u.Mpc), rel=1e-12)
    assert lc.angular_diameter_distance(z_s).value == pytest.approx(d_s.to_value(u.Mpc), rel=1e-12)


def test_curved_cosmology_is_accepted():
    closed = LambdaCDM(H0=70, Om0=0.4, Ode0=0.7)
    # Reference library: astropy's curved-space distances.
    expected = (closed.angular_diameter_distance_z1z2(0.5, 2.0)
                / closed.angular_diameter_distance(2.0)).value
    assert lc.distance_ratio(0.5, 2.0, closed) == pytest.approx(expected, rel=1e-12)


def test_redshift_quantities_are_accepted():
    assert lc.distance_ratio(0.3 * cu.redshift, 2.0 * u.one) == pytest.approx(
        lc.distance_ratio(0.3, 2.0), rel=1e-14)


def test_scaling_factor_without_and_with_normalisation():
    z_l = 0.4
    # Tolerances of 1e-12: far below any physical need, above any release's rounding.
    assert lc.scaling_factor(z_l, 2.0) == pytest.approx(lc.distance_ratio(z_l, 2.0), rel=1e-12)
    # A map made for z_norm reproduces itself at z_norm (design notes, section 4).
    assert lc.scaling_factor(z_l, 1.5, z_norm=1.5) == pytest.approx(1.0, abs=1e-12)
    f = lc.scaling_factor(z_l, 4.0, z_norm=1.5, cosmology=EDS)
    expected = lc.distance_ratio(z_l, 4.0, EDS) / lc.distance_ratio(z_l, 1.5, EDS)
    assert f == pytest.approx(expected, rel=1e-12)
    # Sources behind the normalisation redshift see larger deflections (common practice).
    assert f > 1
    assert lc.scaling_factor(z_l, 1.0, z_norm=1.5) < 1


@pytest.mark.parametrize("z_s", [0.3, 0.4])
def test_source_at_or_in_front_of_lens_is_an_input_error(z_s):
    with pytest.raises(LensviewInputError) as info:
        lc.distance_ratio(0.4, z_s)
    message = str(info.value)
    assert f"source redshift {z_s:g} is at or below the lens redshift 0.4" in message
    assert "no lensing" in message
    assert "above 0.4" in message
    with pytest.raises(LensviewInputError, match="source redshift"):
        lc.scaling_factor(0.4, z_s)


def test_normalisation_redshift_in_front_of_lens_is_an_input_error():
    with pytest.raises(LensviewInputError, match="normalisation redshift 0.2 is at or below"):
        lc.scaling_factor(0.4, 2.0, z_norm=0.2)


@pytest.mark.parametrize("bad, phrase", [
    (-0.1, "must not be negative"),
    (float("nan"), "must be finite"),
    (float("inf"), "must be finite"),
    ("one", "must be a number"),
    (None, "must be a number"),
    (True, "must be a number"),
    (3 * u.m, "must be dimensionless"),
    ([1.0, 2.0], "single number"),
])
def test_bad_redshifts_are_input_errors(bad, phrase):
    with pytest.raises(LensviewInputError, match=phrase):
        lc.distance_ratio(bad, 2.0)
    with pytest.raises(LensviewInputError, match=phrase):
        lc.scaling_factor(0.3, bad)


def test_bad_distance_arguments():
    with pytest.raises(LensviewInputError, match="must not be negative"):
        lc.angular_diameter_distance([0.5, -1.0])
    with pytest.raises(LensviewInputError, match="nearer plane first"):
        lc.angular_diameter_distance_between(2.0, 1.0)
    with pytest.raises(LensviewInputError, match="not a length unit"):
        lc.angular_scale(1.0, unit=u.s)
    with pytest.raises(LensviewInputError, match="not a unit"):
        lc.angular_scale(1.0, unit="parsnips")
    with pytest.raises(LensviewInputError, match="angular unit"):
        lc.physical_size(0.1, 1.0)
    with pytest.raises(LensviewInputError, match="redshift above 0"):
        lc.distance_modulus(0.0)


def test_angular_scale_in_light_years_and_physical_size():
    z = 1.2
    pc_per_arcsec = lc.angular_scale(z)
    ly_per_arcsec = lc.angular_scale(z, unit=u.lyr)
    assert ly_per_arcsec.unit == u.lyr / u.arcsec
    # 1 pc = 3.26156 ly with the IAU definitions (from memory).
    assert (ly_per_arcsec.value / pc_per_arcsec.value) == pytest.approx(3.26156, rel=1e-5)

    angles = np.array([0.01, 0.5, np.nan]) * u.arcsec
    sizes = lc.physical_size(angles, z)
    assert sizes.unit == u.pc
    np.testing.assert_allclose(sizes.value[:2], angles.value[:2] * pc_per_arcsec.value, rtol=1e-12)
    assert np.isnan(sizes.value[2])
    # A milliarcsecond in mas converts as 1e-3 arcsec (definition of the unit).
    assert lc.physical_size(10 * u.mas, z, unit=u.AU).to_value(u.pc) == pytest.approx(
        0.01 * pc_per_arcsec.value, rel=1e-12)
    # Array of redshifts, one per angle.
    z_array = np.array([0.5, 2.0])
    sizes = lc.physical_size([1.0, 1.0] * u.arcsec, z_array)
    np.testing.assert_allclose(sizes.value, lc.angular_scale(z_array).value, rtol=1e-12)


def test_distance_modulus_and_absolute_magnitude():
    z = np.array([0.5, 2.0, 6.0])
    dm = lc.distance_modulus(z, EDS)
    # D_L = (1+z)^2 D_A and DM = 5 log10(D_L / 10 pc) (Hogg 1999, eqs. 21, 24).
    d_l = (1 + z) * eds_comoving(z)
    expected = 5 * np.log10(d_l.to_value(u.pc) / 10)
    np.testing.assert_allclose(dm.to_value(u.mag), expected, rtol=1e-9)

    m = np.array([27.0, 28.5, np.nan])
    absolute = lc.absolute_ab_magnitude(m, z, EDS)
    # M = m - DM(z) + 2.5 log10(1 + z) (Hogg et al. 2002, arXiv:astro-ph/0210394).
    assert absolute.unit == u.mag
    np.testing.assert_allclose(absolute.value[:2], m[:2] - expected[:2] + 2.5 * np.log10(1 + z[:2]),
                               rtol=1e-9)
    assert np.isnan(absolute.value[2])
    # Reference library: Planck18.distmod.
    assert lc.absolute_ab_magnitude(26.0 * u.mag, 3.0).value == pytest.approx(
        26.0 - Planck18.distmod(3.0).value + 2.5 * math.log10(4.0), abs=1e-9)
    with pytest.raises(LensviewInputError, match="u.mag"):
        lc.absolute_ab_magnitude(26.0 * u.Jy, 3.0)
    with pytest.raises(LensviewInputError, match="must be a number"):
        lc.absolute_ab_magnitude("bright", 3.0)
