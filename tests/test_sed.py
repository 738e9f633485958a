"""Blackbody SEDs: the Planck law, the redshifted fit, luminosities and radii."""

import numpy as np
import pytest
import astropy.units as u
import astropy.constants as const
from astropy.cosmology import Planck18
from astropy.modeling.physical_models import BlackBody
from scipy.integrate import trapezoid
from scipy.optimize import minimize_scalar

from lensview import demo
from lensview.errors import LensviewInputError
from lensview.sed import (Dust, blackbody_flux_density, fit_blackbody, luminosity_and_radius,
                          planck_nu, stefan_boltzmann_luminosity)

DEMO_PIVOTS = np.array([f.pivot_um for f in demo.FILTERS]) * u.um


@pytest.mark.parametrize("temperature", [3000.0, 5772.0, 2.0e4, 1.0e5])
def test_planck_law_matches_astropy_blackbody(temperature):
    # Reference: astropy.modeling.physical_models.BlackBody (a general-purpose library).
    nu = np.geomspace(1e11, 1e17, 60) * u.Hz
    with np.errstate(over="ignore"):
        expected = BlackBody(temperature * u.K)(nu).to(u.W / u.m**2 / u.Hz / u.sr)
    assert np.allclose(planck_nu(nu, temperature * u.K), expected, rtol=1e-10, atol=0)


def test_planck_law_accepts_wavelengths():
    # Same law through u.spectral(): a wavelength is its frequency (CODATA c in astropy).
    lam = 0.5 * u.um
    assert np.isclose(planck_nu(lam, 6000 * u.K), planck_nu(const.c / lam, 6000 * u.K), rtol=1e-12)


@pytest.mark.parametrize("temperature", [3500.0, 8000.0, 25000.0])
def test_wien_displacement_law_with_the_codata_constant(temperature):
    # Wien's displacement law lambda_max T = b with b = 2.897771955e-3 m K
    # (CODATA 2018, as scipy.constants.physical_constants["Wien wavelength displacement law
    # constant"]). B_lambda = B_nu * c / lambda^2 peaks at lambda_max.
    from scipy.constants import physical_constants

    b = physical_constants["Wien wavelength displacement law constant"][0]
    assert b == pytest.approx(2.897771955e-3, rel=1e-9)

    def minus_b_lambda(log_lam):
        lam = 10.0**log_lam * u.m
        return -(planck_nu(lam, temperature) * const.c / lam**2).value

    found = minimize_scalar(minus_b_lambda, bounds=(-8, -4), method="bounded",
                            options={"xatol": 1e-10})
    assert 10.0**found.x * temperature == pytest.approx(b, rel=1e-6)


def test_the_sun_as_a_blackbody_gives_one_nominal_solar_luminosity():
    # IAU 2015 Resolution B3 (Prsa et al. 2016, AJ 152, 41): nominal T_eff = 5772 K,
    # R_sun = 6.957e8 m and L_sun = 3.828e26 W, which astropy's constants carry.
    assert const.R_sun.value == pytest.approx(6.957e8, rel=1e-12)
    assert const.L_sun.value == pytest.approx(3.828e26, rel=1e-12)
    luminosity = stefan_boltzmann_luminosity(1 * u.R_sun, 5772 * u.K)
    assert luminosity.to_value(u.L_sun) == pytest.approx(1.0, rel=0.01)


def test_integrated_model_flux_is_the_bolometric_flux():
    # Hogg 1999 (arXiv:astro-ph/9905116): F_bol = L / (4 pi D_L^2); integrating
    # f_nu = (1+z) pi R^2 B_nu((1+z) nu) / D_L^2 over nu must give it back.
    z, temperature, radius = 2.0, 9000.0, 500 * u.R_sun
    d_l = Planck18.luminosity_distance(z)
    omega = ((1 + z) * np.pi * radius**2 / d_l**2).to_value(u.dimensionless_unscaled)
    nu = np.geomspace(1e11, 1e17, 40001) * u.Hz
    f_nu = blackbody_flux_density(nu, temperature, omega, z).to(u.W / u.m**2 / u.Hz)
    total = trapezoid(f_nu.value, nu.value) * u.W / u.m**2
    expected = stefan_boltzmann_luminosity(radius, temperature) / (4 * np.pi * d_l**2)
    assert total.to_value(u.W / u.m**2) == pytest.approx(expected.to_value(u.W / u.m**2),
                                                          rel=1e-4)


CASES = [(1.0, 5000.0), (2.0, 8000.0), (3.0, 12000.0), (4.0, 10000.0), (5.0, 15000.0),
         (6.0, 20000.0)]


@pytest.mark.parametrize("z, temperature", CASES)
def test_noiseless_recovery_in_the_demo_filters_within_one_percent(z, temperature):
    # Synthetic knot: its fluxes are the model itself (no noise), so the fit must
    # return the temperature put in (the 1 % tolerance of the issue).
    flux = blackbody_flux_density(DEMO_PIVOTS, temperature, 3e-23, z)
    fit = fit_blackbody(DEMO_PIVOTS, flux, 0.05 * flux, z)
    assert fit.temperature.to_value(u.K) == pytest.approx(temperature, rel=0.01)
    assert fit.solid_angle.to_value(u.sr) == pytest.approx(3e-23, rel=0.01)
    assert fit.note == ""


def test_noisy_recovery_within_the_quoted_uncertainty_in_most_draws():
    # Synthetic knots at z = 1-6 in the demo filters, Gaussian noise of 8 % per
    # filter, 100 draws per redshift (600 in all). A 1-sigma uncertainty must hold
    # the true temperature in at least 68 % of the draws (Gaussian 1-sigma coverage,
    # 68.3 %); the chi2 scaling of the errors may only make it more cautious.
    rng = np.random.default_rng(20260715)
    hits = total = 0
    for z, temperature in CASES:
        truth = blackbody_flux_density(DEMO_PIVOTS, temperature, 3e-23, z)
        sigma = 0.08 * truth
        for _ in range(100):
            noisy = truth + sigma * rng.standard_normal(truth.size)
            fit = fit_blackbody(DEMO_PIVOTS, noisy, sigma, z)
            total += 1
            hits += abs(fit.temperature.to_value(u.K) - temperature) <= fit.temperature_err.to_value(u.K)
    print(f"coverage {hits / total:.3f}")
    assert hits / total >= 0.68


def test_dust_is_applied_in_the_rest_frame_and_recovered():
    # dust_extinction's G23 law (Gordon et al. 2023, ApJ 950, 86): A_lambda/A_V at the
    # rest wavelength, so a reddened model fitted with the same dust gives T back.
    from dust_extinction.parameter_averages import G23

    dust = Dust(a_v=0.5, law="G23")
    z = 3.0
    clean = blackbody_flux_density(DEMO_PIVOTS, 15000.0, 1e-23, z)
    dusty = blackbody_flux_density(DEMO_PIVOTS, 15000.0, 1e-23, z, dust=dust)
    rest = DEMO_PIVOTS / (1 + z)
    expected = 10 ** (-0.4 * 0.5 * G23(Rv=3.1)(rest))
    assert np.allclose(dusty / clean, expected, rtol=1e-10)
    fit = fit_blackbody(DEMO_PIVOTS, dusty, 0.03 * dusty, z, dust=dust)
    assert fit.temperature.to_value(u.K) == pytest.approx(15000.0, rel=0.01)
    # Ignoring the dust makes the knot look cooler (reddening, common practice).
    assert fit_blackbody(DEMO_PIVOTS, dusty, 0.03 * dusty, z).temperature < 15000 * u.K


def test_dust_outside_the_law_is_an_input_error():
    with pytest.raises(LensviewInputError, match="CCM89 extinction law covers"):
        blackbody_flux_density([0.9, 5.0] * u.um, 8000, 1e-23, 0.0, dust=Dust(0.3, "CCM89"))
    with pytest.raises(LensviewInputError, match="choose one of"):
        Dust(0.3, "mystery")
    with pytest.raises(LensviewInputError, match="non-negative"):
        Dust(-1.0)


def test_luminosity_and_radius_follow_the_magnification():
    z, temperature, radius = 2.9, 8000.0, 300 * u.R_sun
    d_l = Planck18.luminosity_distance(z)
    mu = 50.0
    omega = (mu * (1 + z) * np.pi * radius**2 / d_l**2).to_value(u.dimensionless_unscaled)
    flux = blackbody_flux_density(DEMO_PIVOTS, temperature, omega, z)
    fit = fit_blackbody(DEMO_PIVOTS, flux, 0.05 * flux, z)
    table = luminosity_and_radius(fit, [mu, -4 * mu, 0.0])
    assert table["radius"][0] == pytest.approx(300, rel=1e-3)
    assert table["radius"][1] == pytest.approx(150, rel=1e-3)  # R ~ |mu|^-1/2
    assert table["luminosity"][0] == pytest.approx(
        stefan_boltzmann_luminosity(radius, temperature).to_value(u.L_sun), rel=1e-3)
    assert np.isnan(table["luminosity"][2])
    assert table["luminosity_err"][0] > 0 and table["radius_err"][0] > 0


def test_too_few_filters_give_nan_with_a_reason():
    flux = [1.0, np.nan] * u.uJy
    fit = fit_blackbody([1.0, 2.0] * u.um, flux, [0.1, 0.1] * u.uJy, 2.0)
    assert np.isnan(fit.temperature) and "at least two" in fit.note
    with pytest.raises(LensviewInputError, match="one value per filter"):
        fit_blackbody([1.0, 2.0] * u.um, [1.0] * u.uJy, [0.1] * u.uJy, 2.0)


def test_a_filter_without_a_measurement_is_left_out_of_the_fit():
    # A knot outside one filter has NaN there (lensview.photometry.measure_filters);
    # the other three still fix the temperature of the noiseless model.
    flux = blackbody_flux_density(DEMO_PIVOTS, 9000.0, 2e-23, 2.5)
    flux[0] = np.nan * u.uJy
    fit = fit_blackbody(DEMO_PIVOTS, flux, 0.05 * np.nan_to_num(flux, nan=1.0 * u.uJy), 2.5)
    assert fit.temperature.to_value(u.K) == pytest.approx(9000.0, rel=0.01)
    assert fit.dof == 1


def test_fluxes_no_blackbody_can_match_are_flagged():
    # A flat f_nu over a factor four in wavelength is no blackbody at any temperature
    # (Planck law); the fit says so instead of quietly reporting a temperature.
    flux = np.full(4, 2.0) * u.uJy
    fit = fit_blackbody(DEMO_PIVOTS, flux, 0.01 * flux, 2.9)
    assert "describes these fluxes poorly" in fit.note
    assert fit.scale_factor > 1
