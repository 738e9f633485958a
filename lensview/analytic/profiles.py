"""Analytic lens profiles on offsets from their centres (East, North, arcsec).

Each profile is described for the map normalisation D_ls/D_s = 1 and gives
``deflection``, ``convergence`` and ``jacobian`` (complex-step derivatives,
Squire & Trapp 1998, SIAM Review 40, 110)."""

import numpy as np
import astropy.units as u
from astropy import constants as const
from astropy.coordinates import SkyCoord

from ..checks import finite_number
from ..errors import LensviewInputError

_STEP = 1e-30  # complex step, arcsec
_SERIES_TERMS = 24  # |w| < 0.05 in the NFW series: 0.05**24 ~ 6e-32
_SERIES_LIMIT = 0.05

def centre_coord(value):
    if not isinstance(value, SkyCoord) or not value.isscalar:
        raise LensviewInputError(
            "A lens centre must be a single SkyCoord, e.g. SkyCoord(150.1 * u.deg, 2.2 * u.deg).")
    return value.icrs


def arcsec_value(value, name, *, positive=False, allow_zero=False):
    try:
        number = u.Quantity(value, u.arcsec)
    except (u.UnitsError, TypeError) as error:
        raise LensviewInputError(
            f"{name} must be an angle, e.g. 2 * u.arcsec; got {value!r}.") from error
    number = float(number.to_value(u.arcsec))
    if not np.isfinite(number) or (positive and (number < 0 or (number == 0 and not allow_zero))):
        need = "zero or positive" if allow_zero else "positive"
        raise LensviewInputError(f"{name} must be a finite, {need} angle; got {value!r}.")
    return number


def position_angle_rad(value, name="pa"):
    try:
        return float(u.Quantity(value, u.deg).to_value(u.rad))
    except (u.UnitsError, TypeError) as error:
        raise LensviewInputError(
            f"{name} must be an angle (North through East), e.g. 30 * u.deg; "
            f"got {value!r}.") from error


def plane_offsets(x, y):
    """Offsets as float arrays in arcsec (Quantity or plain numbers)."""
    def one(value):
        if isinstance(value, u.Quantity):
            return np.asarray(value.to_value(u.arcsec), dtype=float)
        return np.asarray(value, dtype=float)
    return np.broadcast_arrays(one(x), one(y))


def _sqrt(z):
    return np.sqrt(z) if np.iscomplexobj(z) else np.sqrt(np.maximum(z, 0.0))


class _Profile:
    """Shared behaviour: unit handling and complex-step Jacobians.

    Subclasses implement ``_deflection(x, y)`` with operations that are
    complex-analytic in x and y, so that the complex step applies.
    """

    center: SkyCoord

    def deflection(self, x, y):
        """Deflection at offsets from the centre.

        Parameters
        ----------
        x, y : array_like or `~astropy.units.Quantity`
            Offsets East and North of the centre (plain numbers in arcsec).

        Returns
        -------
        alpha_x, alpha_y : ndarray
            Deflection along East and North in arcsec, for D_ls/D_s = 1.
        """
        x, y = plane_offsets(x, y)
        with np.errstate(divide="ignore", invalid="ignore"):
            return self._deflection(x, y)

    def convergence(self, x, y):
        """Convergence kappa at offsets from the centre (for D_ls/D_s = 1).

        Parameters
        ----------
        x, y : array_like or `~astropy.units.Quantity`
            Offsets East and North of the centre (plain numbers in arcsec).

        Returns
        -------
        ndarray
        """
        x, y = plane_offsets(x, y)
        with np.errstate(divide="ignore", invalid="ignore"):
            return self._convergence(x, y)

    def jacobian(self, x, y):
        """Derivatives a_ij = d alpha_i / d theta_j (complex step, exact to rounding).

        Parameters
        ----------
        x, y : array_like or `~astropy.units.Quantity`
            Offsets East and North of the centre (plain numbers in arcsec).

        Returns
        -------
        a11, a12, a21, a22 : ndarray
            d alpha_x/dx, d alpha_x/dy, d alpha_y/dx, d alpha_y/dy, for
            D_ls/D_s = 1.
        """
        x, y = plane_offsets(x, y)
        with np.errstate(divide="ignore", invalid="ignore"):
            ax_x, ay_x = self._deflection(x + 1j * _STEP, y + 0j)
            ax_y, ay_y = self._deflection(x + 0j, y + 1j * _STEP)
            # Where the deflection itself is undefined (a singular centre) the step
            # would return a meaningless number instead.
            ax, ay = self._deflection(x, y)
        undefined = ~(np.isfinite(ax) & np.isfinite(ay))
        return tuple(np.where(undefined, np.nan, np.imag(part) / _STEP)
                     for part in (ax_x, ax_y, ay_x, ay_y))

    @staticmethod
    def _to_axes(x, y, pa):
        """Offsets along the axis at position angle pa and the one 90 degrees East of it."""
        s, c = np.sin(pa), np.cos(pa)
        return x * s + y * c, x * c - y * s

    @staticmethod
    def _from_axes(a_major, a_minor, pa):
        s, c = np.sin(pa), np.cos(pa)
        return a_major * s + a_minor * c, a_major * c - a_minor * s


class PointMass(_Profile):
    """Point mass: alpha = theta_E^2 theta / |theta|^2 (Paczynski 1986, ApJ 304, 1).

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
    theta_e : `~astropy.units.Quantity`
        Einstein radius for D_ls/D_s = 1.
    """

    def __init__(self, center, theta_e):
        self.center = centre_coord(center)
        self.theta_e = arcsec_value(theta_e, "theta_e", positive=True)

    def _deflection(self, x, y):
        r2 = x * x + y * y
        return self.theta_e**2 * x / r2, self.theta_e**2 * y / r2

    def _convergence(self, x, y):
        # All the mass sits at the centre.
        return np.where((x == 0) & (y == 0), np.inf, 0.0)


class IsothermalSphere(_Profile):
    """Singular or cored isothermal sphere (Narayan & Bartelmann 1996,
    arXiv:astro-ph/9606001, sec. 3).

    kappa = theta_E / (2 sqrt(r^2 + r_c^2)) and
    alpha(r) = theta_E (sqrt(r^2 + r_c^2) - r_c) / r, evaluated as
    theta_E r / (sqrt(r^2 + r_c^2) + r_c) to avoid cancellation inside the core.

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
    theta_e : `~astropy.units.Quantity`
        Einstein radius of the singular sphere for D_ls/D_s = 1.
    core : `~astropy.units.Quantity`
        Core radius r_c (0 for the singular sphere).
    """

    def __init__(self, center, theta_e, core=0 * u.arcsec):
        self.center = centre_coord(center)
        self.theta_e = arcsec_value(theta_e, "theta_e", positive=True)
        self.core = arcsec_value(core, "core", positive=True, allow_zero=True)

    @classmethod
    def from_velocity_dispersion(cls, sigma, z_lens, z_source, center, cosmology=None,
                                 core=0 * u.arcsec):
        """Singular (or cored) sphere of a given one-dimensional velocity dispersion.

        theta_E = 4 pi (sigma / c)^2 D_ls / D_s (Narayan & Bartelmann 1996,
        eq. for the singular isothermal sphere).

        Parameters
        ----------
        sigma : `~astropy.units.Quantity`
            Velocity dispersion.
        z_lens, z_source : float
            Redshifts of the lens and of the source the Einstein radius is for.
        center : `~astropy.coordinates.SkyCoord`
        cosmology : `~astropy.cosmology.Cosmology`, optional
            Default `~astropy.cosmology.Planck18`.
        core : `~astropy.units.Quantity`
            Core radius.

        Returns
        -------
        IsothermalSphere
            Normalised to D_ls/D_s = 1 like every profile here, so its
            ``theta_e`` is 4 pi (sigma/c)^2; ``source_theta_e`` holds the
            Einstein radius for ``z_source`` (arcsec Quantity) and
            ``z_lens``, ``z_source`` the redshifts.
        """
        from ..cosmology import distance_ratio

        try:
            sigma = u.Quantity(sigma, u.km / u.s)
        except (u.UnitsError, TypeError) as error:
            raise LensviewInputError(
                f"sigma must be a velocity, e.g. 250 * u.km / u.s; got {sigma!r}.") from error
        if not np.isfinite(sigma.value) or sigma.value <= 0:
            raise LensviewInputError(f"sigma must be a positive velocity; got {sigma!r}.")
        ratio = distance_ratio(z_lens, z_source, cosmology)
        unit_theta_e = (4 * np.pi * (sigma / const.c).decompose() ** 2).value * u.rad
        sphere = cls(center, unit_theta_e.to(u.arcsec), core=core)
        sphere.z_lens, sphere.z_source = float(z_lens), float(z_source)
        sphere.source_theta_e = sphere.theta_e * ratio * u.arcsec
        return sphere

    def _deflection(self, x, y):
        r2 = x * x + y * y
        scale = self.theta_e / (_sqrt(r2 + self.core**2) + self.core)
        return scale * x, scale * y

    def _convergence(self, x, y):
        return self.theta_e / (2 * np.sqrt(x * x + y * y + self.core**2))


class IsothermalEllipsoid(_Profile):
    """Singular or cored isothermal ellipsoid (Kormann, Schneider & Bartelmann
    1994, A&A 284, 285; deflection in the form of Keeton 2001,
    arXiv:astro-ph/0102341, sec. 3.1 with alpha = 1).

    Normalisation: with x' along the major axis and y' across it,

        kappa = theta_E / (2 sqrt(q x'^2 + y'^2 / q + q s^2))
              = theta_E sqrt(q) / (2 sqrt(q^2 (x'^2 + s^2) + y'^2)),

    so the singular ellipsoid (s = 0) has its tangential critical curve, the
    contour kappa = 1/2 (gamma = kappa for isothermal profiles), on the
    ellipse q x'^2 + y'^2 / q = theta_E^2 (semi-axes theta_E / sqrt(q) and
    theta_E sqrt(q), area pi theta_E^2), and q = 1 is the sphere of the same
    theta_E. With b = theta_E sqrt(q), q' = sqrt(1 - q^2) and
    psi = sqrt(q^2 (s^2 + x'^2) + y'^2), the deflection is
    alpha_x' = (b / q') arctan(q' x' / (psi + s)),
    alpha_y' = (b / q') artanh(q' y' / (psi + q^2 s)).

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
    theta_e : `~astropy.units.Quantity`
        Einstein radius (as above) for D_ls/D_s = 1.
    q : float
        Axis ratio (minor/major), 0 < q <= 1.
    pa : `~astropy.units.Quantity`
        Position angle of the major axis, North through East.
    core : `~astropy.units.Quantity`
        Core radius s (0 for the singular ellipsoid).
    """

    def __init__(self, center, theta_e, q, pa, core=0 * u.arcsec):
        self.center = centre_coord(center)
        self.theta_e = arcsec_value(theta_e, "theta_e", positive=True)
        q = finite_number(q, "The axis ratio q", low=0.0)
        if q > 1:
            raise LensviewInputError(
                f"The axis ratio q = minor/major must be in (0, 1]; got {q}. Use 1/q and turn "
                "the position angle by 90 degrees.")
        self.q = q
        self.pa = position_angle_rad(pa)
        self.core = arcsec_value(core, "core", positive=True, allow_zero=True)

    def _deflection(self, x, y):
        major, minor = self._to_axes(x, y, self.pa)
        q, s = self.q, self.core
        if q == 1.0:
            scale = self.theta_e / (_sqrt(major * major + minor * minor + s * s) + s)
            a_major, a_minor = scale * major, scale * minor
        else:
            b = self.theta_e * np.sqrt(q)
            q_prime = np.sqrt((1 - q) * (1 + q))
            psi = _sqrt(q * q * (s * s + major * major) + minor * minor)
            a_major = b / q_prime * np.arctan(q_prime * major / (psi + s))
            a_minor = b / q_prime * np.arctanh(q_prime * minor / (psi + q * q * s))
        return self._from_axes(a_major, a_minor, self.pa)

    def _convergence(self, x, y):
        major, minor = self._to_axes(x, y, self.pa)
        q = self.q
        return self.theta_e * np.sqrt(q) / (
            2 * np.sqrt(q * q * (major * major + self.core**2) + minor * minor))


def _g(w):
    """g(w) = artanh(sqrt w) / sqrt w = sum_k w^k / (2k + 1), analytic through w = 0.

    For w < 0 it equals arctan(sqrt(-w)) / sqrt(-w). Real part of w chooses
    the form; complex arguments (the complex step) follow the same branch.
    """
    w = np.asarray(w)
    real = np.real(w)
    series = np.zeros_like(w)
    for k in range(_SERIES_TERMS - 1, -1, -1):  # Horner
        series = series * w + 1.0 / (2 * k + 1)
    root_pos = _sqrt(np.where(real > 0, w, 1.0))
    root_neg = _sqrt(np.where(real < 0, -w, 1.0))
    positive = np.arctanh(root_pos) / root_pos
    negative = np.arctan(root_neg) / root_neg
    closed_form = np.where(real > 0, positive, negative)
    return np.where(np.abs(w) < _SERIES_LIMIT, series, closed_form)


class NFW(_Profile):
    """Navarro-Frenk-White halo in projection (Wright & Brainerd 2000, ApJ 534,
    34; Bartelmann 1996, A&A 313, 697).

    With x = r / r_s and F(x) = arccosh(1/x) / sqrt(1 - x^2) (x < 1),
    arccos(1/x) / sqrt(x^2 - 1) (x > 1), F(1) = 1:
    kappa = 2 kappa_s (1 - F) / (x^2 - 1), the mean convergence inside x is
    4 kappa_s h(x) / x^2 with h(x) = ln(x/2) + F(x), and alpha = 4 kappa_s r_s h / x.
    Here F = 2 g(w) / (1 + x) with w = (1 - x) / (1 + x) and g the series of
    artanh(sqrt w)/sqrt w, which is smooth through x = 1; h for x < 1/2 is
    summed in a form without the cancellation of ln(x/2) against F.

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
    kappa_s : float
        Characteristic convergence rho_s r_s / Sigma_cr for D_ls/D_s = 1.
    r_s : `~astropy.units.Quantity`
        Scale radius.
    """

    def __init__(self, center, kappa_s, r_s):
        self.center = centre_coord(center)
        self.kappa_s = finite_number(kappa_s, "kappa_s", low=0.0)
        self.r_s = arcsec_value(r_s, "r_s", positive=True)

    @staticmethod
    def _h(x):
        w = (1 - x) / (1 + x)
        general = np.log(x / 2) + 2 * _g(w) / (1 + x)
        # x < 1/2: h = [(e - 1) ln(x/2) + ln(1 + (e - 1)/2)] / e with e = sqrt(1 - x^2),
        # e - 1 = -x^2 / (1 + e); both terms are small, nothing cancels.
        small = np.real(x) < 0.5
        xs = np.where(small, x, 0.25)
        e = _sqrt(1 - xs * xs)
        e_minus_1 = -xs * xs / (1 + e)
        inner = (e_minus_1 * np.log(xs / 2) + np.log1p(e_minus_1 / 2)) / e
        return np.where(small, inner, general)

    def _deflection(self, x, y):
        r = _sqrt(x * x + y * y)
        xi = r / self.r_s
        # alpha / r = 4 kappa_s h(xi) / xi^2 -> 0 like ln(xi) at the centre.
        scale = np.where(np.real(r) == 0, 0.0, 4 * self.kappa_s * self._h(xi) / (xi * xi))
        return scale * x, scale * y

    def mean_convergence(self, r):
        """Mean convergence inside a radius.

        Parameters
        ----------
        r : array_like or `~astropy.units.Quantity`
            Radius (plain numbers in arcsec).

        Returns
        -------
        ndarray
            4 kappa_s h(x) / x^2 with x = r / r_s (Wright & Brainerd 2000).
        """
        r, _ = plane_offsets(r, 0.0)
        x = r / self.r_s
        with np.errstate(divide="ignore", invalid="ignore"):
            return 4 * self.kappa_s * self._h(x) / x**2

    def _convergence(self, x, y):
        xi = np.sqrt(x * x + y * y) / self.r_s
        w = (1 - xi) / (1 + xi)
        # (1 - F) / (x^2 - 1) = (1 + w)^2 / 4 * sum_{k>=1} c_k w^(k-1), c_k = 4k / (4k^2 - 1).
        series = np.zeros_like(w)
        for k in range(_SERIES_TERMS, 0, -1):
            series = series * w + 4.0 * k / (4.0 * k * k - 1)
        near_one = (1 + w) ** 2 / 4 * series
        general = (1 - 2 * _g(w) / (1 + xi)) / (xi * xi - 1)
        return 2 * self.kappa_s * np.where(np.abs(w) < _SERIES_LIMIT, near_one, general)


class ExternalShear(_Profile):
    """External shear with potential (gamma/2) r^2 cos 2(phi - phi_gamma)
    (Keeton 2001, arXiv:astro-ph/0102341).

    Parameters
    ----------
    gamma : float
        Shear strength for D_ls/D_s = 1.
    pa : `~astropy.units.Quantity`
        Position angle (North through East) of the axis x' of the potential
        (gamma/2)(x'^2 - y'^2): images are compressed along it and stretched
        across it.
    center : `~astropy.coordinates.SkyCoord`
        Origin of the deflection field alpha = Gamma theta.
    """

    def __init__(self, gamma, pa, center):
        self.center = centre_coord(center)
        self.gamma = finite_number(gamma, "gamma")
        self.pa = position_angle_rad(pa)

    def _deflection(self, x, y):
        along, across = self._to_axes(x, y, self.pa)
        return self._from_axes(self.gamma * along, -self.gamma * across, self.pa)

    def _convergence(self, x, y):
        return np.zeros(np.broadcast(x, y).shape)


class CompositeLens(_Profile):
    """Sum of profiles.

    Evaluated on offsets from ``center`` (default: the first member's
    centre); the members' centres are placed with the gnomonic projection
    about it. Rendering onto a map (`deflection_maps` and friends) places
    every member in the map's own plane instead.

    Parameters
    ----------
    profiles : iterable of profiles (composites allowed)
    center : `~astropy.coordinates.SkyCoord`, optional
    """

    def __init__(self, profiles, center=None):
        self.profiles = flatten_profiles(list(profiles))
        if not self.profiles:
            raise LensviewInputError("A CompositeLens needs at least one profile.")
        self.center = self.profiles[0].center if center is None else centre_coord(center)
        from ..geometry import TangentPlane

        plane = TangentPlane(self.center)
        self._shifts = [tuple(float(v.to_value(u.arcsec)) for v in plane.to_plane(p.center))
                        for p in self.profiles]

    def __iter__(self):
        return iter(self.profiles)

    def __len__(self):
        return len(self.profiles)

    def _deflection(self, x, y):
        ax, ay = 0.0, 0.0
        for profile, (cx, cy) in zip(self.profiles, self._shifts):
            bx, by = profile._deflection(x - cx, y - cy)
            ax, ay = ax + bx, ay + by
        return ax, ay

    def _convergence(self, x, y):
        return sum(p._convergence(x - cx, y - cy)
                   for p, (cx, cy) in zip(self.profiles, self._shifts))


def flatten_profiles(profiles):
    if isinstance(profiles, _Profile) and not isinstance(profiles, CompositeLens):
        return [profiles]
    out = []
    for item in (profiles.profiles if isinstance(profiles, CompositeLens) else profiles):
        if isinstance(item, CompositeLens):
            out.extend(item.profiles)
        elif isinstance(item, _Profile):
            out.append(item)
        else:
            raise LensviewInputError(
                f"Expected lens profiles from lensview.analytic; got {type(item).__name__}.")
    return out


