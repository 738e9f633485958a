"""Blackbody spectral energy distributions of lensed knots.

The model of a knot is a sphere of radius R radiating as a blackbody of
temperature T, at redshift z, magnified by |mu|, optionally behind dust in
its own rest frame.

Derivation. The spectral luminosity of the sphere is
``L_nu(nu_e) = 4 pi R^2 * pi B_nu(nu_e; T)`` (the surface flux of a
blackbody is pi B_nu). Hogg 1999 (arXiv:astro-ph/9905116, sec. 7, the
relation of f_nu to L_nu through the luminosity distance; eq. 22, number
from memory) gives the observed flux density
``f_nu(nu_o) = (1 + z) L_nu((1 + z) nu_o) / (4 pi D_L^2)``, so, lensed,

    f_nu(nu_o) = Omega * B_nu((1 + z) nu_o; T) * 10**(-0.4 A(lambda_o / (1 + z))),
    Omega = |mu| (1 + z) pi R^2 / D_L^2.

The fit is for log T and log Omega; a magnification then gives the radius
``R = D_L sqrt(Omega / (pi (1 + z) |mu|))`` and the bolometric luminosity
``L = 4 pi R^2 sigma T^4`` (Stefan-Boltzmann). Integrating f_nu over nu_o
returns ``L / (4 pi D_L^2)``, as it must. Luminosities are in nominal solar
luminosities and radii in nominal solar radii (IAU 2015 Resolution B3,
Prsa et al. 2016, AJ 152, 41), which are astropy's ``L_sun`` and ``R_sun``.
"""

import math
from dataclasses import dataclass, field

import numpy as np
import astropy.units as u
import astropy.constants as const
from astropy.table import Table
from scipy.optimize import curve_fit
from scipy.stats import chi2 as chi2_distribution

from .errors import LensviewInputError

__all__ = ["planck_nu", "Dust", "DUST_LAWS", "BlackbodyFit", "blackbody_flux_density",
           "fit_blackbody", "luminosity_and_radius", "stefan_boltzmann_luminosity"]

#: Extinction laws offered, by name, from the dust_extinction package
#: (Gordon et al. 2023, ApJ 950, 86; Fitzpatrick 1999, PASP 111, 63;
#: Cardelli, Clayton & Mathis 1989, ApJ 345, 245).
DUST_LAWS = ("G23", "F99", "CCM89")
#: Temperatures the fit may reach (K); outside it a blackbody is no description of a knot.
TEMPERATURE_RANGE = (1.0e3, 1.0e6)
#: Below this chi-square probability a fit is flagged as poor (common practice: 0.1 %).
POOR_FIT_PROBABILITY = 1e-3
_B_NU_UNIT = u.W / u.m**2 / u.Hz / u.sr
_H_OVER_K = (const.h / const.k_B).to_value(u.s * u.K)
_TWO_H_OVER_C2 = (2 * const.h / const.c**2).to_value(u.J * u.s**3 / u.m**2)


def planck_nu(frequency, temperature):
    """The Planck law per unit frequency, B_nu(T) = 2 h nu^3 / c^2 / (exp(h nu / k T) - 1).

    Parameters
    ----------
    frequency : `~astropy.units.Quantity`
        Frequency (or a wavelength, converted with `astropy.units.spectral`).
    temperature : `~astropy.units.Quantity` or float
        Temperature (K if a plain number).

    Returns
    -------
    `~astropy.units.Quantity`
        Specific intensity in W m-2 Hz-1 sr-1.
    """
    nu = _frequency_hz(frequency)
    t = u.Quantity(temperature, u.K).to_value(u.K)
    return _planck_nu_si(nu, t) * _B_NU_UNIT


def _planck_nu_si(nu, t):
    with np.errstate(over="ignore"):
        return _TWO_H_OVER_C2 * nu**3 / np.expm1(_H_OVER_K * nu / t)


def _frequency_hz(value):
    if not isinstance(value, u.Quantity):
        raise LensviewInputError(f"Give a frequency or a wavelength Quantity; got {value!r}.")
    return value.to_value(u.Hz, equivalencies=u.spectral())


@dataclass(frozen=True)
class Dust:
    """Dust in the knot's rest frame: an extinction law of dust_extinction and A_V.

    Parameters
    ----------
    a_v : float
        V-band extinction (mag), zero or more.
    law : str
        One of `DUST_LAWS` (default "G23").
    r_v : float
        Total-to-selective extinction ratio (default 3.1, the Milky Way average
        of the laws' papers).
    """

    a_v: float
    law: str = "G23"
    r_v: float = 3.1

    def __post_init__(self):
        if not (isinstance(self.a_v, (int, float)) and math.isfinite(self.a_v) and self.a_v >= 0):
            raise LensviewInputError(f"A_V must be a non-negative number of magnitudes; got {self.a_v!r}.")
        if self.law not in DUST_LAWS:
            raise LensviewInputError(
                f"Unknown extinction law {self.law!r}; choose one of {', '.join(DUST_LAWS)}.")

    def _model(self):
        from dust_extinction import parameter_averages

        return getattr(parameter_averages, self.law)(Rv=self.r_v)

    def attenuation(self, wavelength_rest):
        """A_lambda (mag) at rest-frame wavelengths (Quantity)."""
        model = self._model()
        inverse_um = 1.0 / np.atleast_1d(wavelength_rest.to_value(u.um))
        low, high = model.x_range
        outside = (inverse_um < low) | (inverse_um > high)
        if outside.any():
            raise LensviewInputError(
                f"The {self.law} extinction law covers rest-frame wavelengths "
                f"{1 / high:.3g}-{1 / low:.3g} micron, but a filter reaches "
                f"{1 / inverse_um[outside][0]:.3g} micron in the knot's rest frame; choose "
                "another law (G23 covers the widest range) or no dust.")
        return self.a_v * np.asarray(model(inverse_um / u.um), dtype=float)

    def describe(self):
        return f"{self.law} (R_V = {self.r_v:g}), A_V = {self.a_v:g} mag, rest frame"


def blackbody_flux_density(wavelength, temperature, solid_angle, z, dust=None):
    """Observed f_nu of a redshifted blackbody: Omega B_nu((1+z) nu_o; T), dimmed by dust.

    Parameters
    ----------
    wavelength : `~astropy.units.Quantity`
        Observed wavelengths (or frequencies).
    temperature : `~astropy.units.Quantity` or float
        Rest-frame temperature (K).
    solid_angle : `~astropy.units.Quantity` or float
        Normalisation Omega = |mu| (1+z) pi R^2 / D_L^2 (sr).
    z : float
        Redshift.
    dust : `Dust`, optional
        Rest-frame extinction.

    Returns
    -------
    `~astropy.units.Quantity`
        f_nu in microjansky.
    """
    nu = _frequency_hz(wavelength)
    t = u.Quantity(temperature, u.K).to_value(u.K)
    omega = u.Quantity(solid_angle, u.sr).to_value(u.sr)
    flux = omega * _planck_nu_si(nu * (1 + z), t) * _dimming(wavelength, z, dust)
    return (flux * u.W / u.m**2 / u.Hz).to(u.uJy)


def _dimming(wavelength, z, dust):
    if dust is None or dust.a_v == 0:
        return 1.0
    rest = (wavelength.to(u.um, equivalencies=u.spectral())) / (1 + z)
    return 10.0 ** (-0.4 * dust.attenuation(rest))


@dataclass(frozen=True)
class BlackbodyFit:
    """Result of `fit_blackbody`.

    Attributes
    ----------
    temperature, temperature_err : `~astropy.units.Quantity`
        Rest-frame temperature and its 1-sigma uncertainty (K).
    solid_angle : `~astropy.units.Quantity`
        Omega = |mu| (1+z) pi R^2 / D_L^2 (sr).
    log_covariance : ndarray
        2x2 covariance of (ln T, ln Omega).
    chi2 : float
        Chi-square of the best fit; ``dof`` its degrees of freedom.
    scale_factor : float
        Factor applied to the uncertainties, sqrt(chi2 / dof) when above 1.
    z : float
        Redshift used.
    dust : `Dust` or None
    wavelength, flux, flux_err : `~astropy.units.Quantity`
        The points fitted (observed micron, microjansky).
    note : str
        Why there is no fit (NaN values); empty otherwise.
    """

    temperature: u.Quantity
    temperature_err: u.Quantity
    solid_angle: u.Quantity
    log_covariance: np.ndarray
    chi2: float
    dof: int
    scale_factor: float
    z: float
    dust: Dust | None
    wavelength: u.Quantity = field(repr=False)
    flux: u.Quantity = field(repr=False)
    flux_err: u.Quantity = field(repr=False)
    note: str = ""

    def model(self, wavelength):
        """The fitted observed f_nu (microjansky) at observed wavelengths."""
        return blackbody_flux_density(wavelength, self.temperature, self.solid_angle, self.z,
                                      self.dust)


def _check_points(wavelength, flux, flux_err):
    if not (isinstance(wavelength, u.Quantity) and wavelength.unit.is_equivalent(u.um, u.spectral())):
        raise LensviewInputError("wavelength must be a Quantity of observed wavelengths, e.g. [0.9, 1.5] * u.um.")
    for name, value in (("flux", flux), ("flux_err", flux_err)):
        if not (isinstance(value, u.Quantity) and value.unit.is_equivalent(u.uJy)):
            raise LensviewInputError(f"{name} must be a flux density Quantity (e.g. in u.uJy); got {value!r}.")
    lam = np.atleast_1d(wavelength.to(u.um, equivalencies=u.spectral()))
    f = np.atleast_1d(flux.to(u.uJy))
    e = np.atleast_1d(flux_err.to(u.uJy))
    if not lam.shape == f.shape == e.shape:
        raise LensviewInputError(
            f"wavelength, flux and flux_err must have one value per filter; got {lam.size}, "
            f"{f.size} and {e.size}.")
    return lam, f, e


def fit_blackbody(wavelength, flux, flux_err, z, *, dust=None):
    """Fit a redshifted blackbody to observed flux densities.

    Weighted least squares (`scipy.optimize.curve_fit`, uncertainties taken
    as absolute) in log10 T and log10 Omega, started from the best point of
    a temperature grid (Omega solved linearly there). When chi2 / dof > 1
    the uncertainties are scaled up by sqrt(chi2 / dof), the scale factor
    of the Particle Data Group's averages (Review of Particle Physics,
    Introduction, "Averages and fits"), so a poor fit is not over-trusted.

    Parameters
    ----------
    wavelength : `~astropy.units.Quantity`
        Observed pivot wavelengths of the filters.
    flux, flux_err : `~astropy.units.Quantity`
        f_nu and its 1-sigma error in each filter; non-finite values or
        errors, and non-positive errors, leave the filter out.
    z : float
        Source redshift.
    dust : `Dust`, optional
        Rest-frame extinction applied to the model.

    Returns
    -------
    BlackbodyFit
        With NaN values and a note when fewer than two filters are usable.
    """
    lam, f, e = _check_points(wavelength, flux, flux_err)
    try:
        z = float(z)
    except (TypeError, ValueError):
        z = float("nan")
    if not (math.isfinite(z) and z >= 0):
        raise LensviewInputError(f"The redshift must be a number >= 0; got {z!r}.")
    if dust is not None and not isinstance(dust, Dust):
        raise LensviewInputError("dust must be a lensview.sed.Dust or None.")
    usable = np.isfinite(f.value) & np.isfinite(e.value) & (e.value > 0)
    nan_fit = dict(temperature=np.nan * u.K, temperature_err=np.nan * u.K,
                   solid_angle=np.nan * u.sr, log_covariance=np.full((2, 2), np.nan),
                   chi2=np.nan, dof=0, scale_factor=np.nan, z=z, dust=dust,
                   wavelength=lam, flux=f, flux_err=e)
    if usable.sum() < 2:
        return BlackbodyFit(**nan_fit, note=f"only {int(usable.sum())} filter(s) measured; "
                                            "a temperature needs at least two")
    x = lam[usable]
    y, sigma = f.value[usable], e.value[usable]
    nu_rest = x.to_value(u.Hz, equivalencies=u.spectral()) * (1 + z)
    dimming = np.broadcast_to(_dimming(x, z, dust), nu_rest.shape)
    # microjansky per (W m-2 Hz-1): the fit works on numbers of order the data.
    to_ujy = (1 * u.W / u.m**2 / u.Hz).to_value(u.uJy)

    def shape(log_t):
        return _planck_nu_si(nu_rest, 10.0**log_t) * dimming * to_ujy

    def model(_, log_t, log_omega):
        return 10.0**log_omega * shape(log_t)

    best = None
    weights = 1.0 / sigma**2
    for log_t in np.linspace(math.log10(TEMPERATURE_RANGE[0]) + 0.05,
                             math.log10(TEMPERATURE_RANGE[1]) - 0.05, 81):
        s = shape(log_t)
        denominator = np.sum(weights * s * s)
        if not denominator > 0:
            continue
        omega = max(np.sum(weights * s * y) / denominator, 1e-300)
        chi2 = float(np.sum(weights * (y - omega * s) ** 2))
        if best is None or chi2 < best[0]:
            best = (chi2, log_t, math.log10(omega))
    if best is None or best[2] <= -299:
        return BlackbodyFit(**nan_fit, note="no positive blackbody matches the fluxes")
    bounds = ([math.log10(TEMPERATURE_RANGE[0]), -np.inf], [math.log10(TEMPERATURE_RANGE[1]), np.inf])
    try:
        params, covariance = curve_fit(model, nu_rest, y, p0=best[1:], sigma=sigma,
                                       absolute_sigma=True, bounds=bounds, x_scale=[0.1, 0.1])
    except (RuntimeError, ValueError) as error:
        return BlackbodyFit(**nan_fit, note=f"the fit did not converge ({error})")
    residual = (y - model(None, *params)) / sigma
    chi2 = float(np.sum(residual**2))
    dof = int(usable.sum() - 2)
    scale = math.sqrt(chi2 / dof) if dof > 0 and chi2 > dof else 1.0
    log_covariance = np.asarray(covariance) * (math.log(10) * scale) ** 2
    temperature = 10.0 ** params[0]
    note = ""
    if not np.all(np.isfinite(log_covariance)):
        note = "the temperature is not constrained by these filters"
    elif abs(params[0] - bounds[0][0]) < 1e-3 or abs(params[0] - bounds[1][0]) < 1e-3:
        note = "the temperature ran to the edge of the allowed range"
    elif dof > 0 and chi2_distribution.sf(chi2, dof) < POOR_FIT_PROBABILITY:
        note = (f"a blackbody describes these fluxes poorly (chi2 = {chi2:.3g} for {dof} degrees "
                "of freedom); the temperature is only indicative")
    return BlackbodyFit(
        temperature=temperature * u.K,
        temperature_err=temperature * math.sqrt(max(log_covariance[0, 0], 0.0)) * u.K,
        solid_angle=10.0 ** params[1] * u.sr, log_covariance=log_covariance, chi2=chi2,
        dof=dof, scale_factor=scale, z=z, dust=dust, wavelength=lam, flux=f, flux_err=e,
        note=note)


def stefan_boltzmann_luminosity(radius, temperature):
    """L = 4 pi R^2 sigma T^4, in nominal solar luminosities (IAU 2015 Resolution B3)."""
    radius = u.Quantity(radius, u.R_sun)
    temperature = u.Quantity(temperature, u.K)
    return (4 * np.pi * radius**2 * const.sigma_sb * temperature**4).to(u.L_sun)


def luminosity_and_radius(fit, mu, *, cosmology=None):
    """Delensed bolometric luminosity and Stefan-Boltzmann radius for magnifications.

    Parameters
    ----------
    fit : BlackbodyFit
    mu : float or array
        Signed magnifications (one per model or realisation); |mu| is used.
    cosmology : `~astropy.cosmology.Cosmology`, optional
        Default `astropy.cosmology.Planck18`.

    Returns
    -------
    `~astropy.table.Table`
        One row per magnification: ``mu``, ``abs_mu``, ``luminosity`` and
        ``luminosity_err`` (L_sun), ``log_luminosity`` and
        ``log_luminosity_err`` (dex), ``radius`` and ``radius_err`` (R_sun).
        NaN where |mu| is zero or not finite, or the fit failed.
    """
    if not isinstance(fit, BlackbodyFit):
        raise LensviewInputError("fit must be the result of lensview.sed.fit_blackbody.")
    if cosmology is None:
        from astropy.cosmology import Planck18 as cosmology
    mu = np.atleast_1d(np.asarray(mu, dtype=float))
    abs_mu = np.where(np.isfinite(mu) & (mu != 0), np.abs(mu), np.nan)
    z = fit.z
    d_l = cosmology.luminosity_distance(z) if z > 0 else np.nan * u.Mpc
    omega = fit.solid_angle.to_value(u.sr)
    radius = (d_l * np.sqrt(omega / (np.pi * (1 + z) * abs_mu))).to(u.R_sun)
    luminosity = stefan_boltzmann_luminosity(radius, fit.temperature)
    cov = fit.log_covariance
    ln_r_err = 0.5 * math.sqrt(max(cov[1, 1], 0.0)) if np.isfinite(cov).all() else np.nan
    ln_l_var = cov[1, 1] + 16 * cov[0, 0] + 8 * cov[0, 1]
    ln_l_err = math.sqrt(max(ln_l_var, 0.0)) if np.isfinite(ln_l_var) else np.nan
    table = Table()
    table["mu"] = mu
    table["abs_mu"] = abs_mu
    table["luminosity"] = luminosity
    table["luminosity_err"] = luminosity * ln_l_err
    table["log_luminosity"] = np.log10(luminosity.to_value(u.L_sun)) * u.dex
    table["log_luminosity_err"] = np.full(mu.shape, ln_l_err / math.log(10)) * u.dex
    table["radius"] = radius
    table["radius_err"] = radius * ln_r_err
    return table
