"""Analytic lens profiles rendered onto WCS grids (tests and the demo).

Profiles live in the map's own intermediate world plane: for a TAN WCS the
plane coordinates (x East, y North, arcsec, about the reference point) are an
affine function of the pixel coordinates, so analytic and numerical
quantities share one frame exactly. Each profile is described for the map
normalisation D_ls/D_s = 1 and evaluates on offsets from its own centre:

* ``deflection(dx, dy)`` -> (alpha_x, alpha_y) in arcsec (East, North),
* ``convergence(dx, dy)``,
* ``jacobian(dx, dy)`` -> (a11, a12, a21, a22) = d alpha_i / d theta_j, by
  complex-step differentiation (Squire & Trapp 1998, SIAM Review 40, 110),
  exact to rounding because every deflection here is real-analytic.

Position angles are measured from North through East.
"""

import numpy as np
import astropy.units as u
from astropy import constants as const
from astropy.coordinates import SkyCoord
from astropy.wcs import WCS

__all__ = [
    "PointMass",
    "IsothermalSphere",
    "IsothermalEllipsoid",
    "NFW",
    "ExternalShear",
    "CompositeLens",
    "make_wcs",
    "plane_coordinates",
    "sky_to_plane",
    "plane_to_sky",
    "deflection_maps",
    "convergence_map",
    "magnification_map",
]

_STEP = 1e-30


def _arcsec(value):
    return float(u.Quantity(value, u.arcsec).to_value(u.arcsec))


def _angle(value):
    return float(u.Quantity(value, u.deg).to_value(u.rad))


class _Profile:
    """Shared behaviour: centre handling and complex-step Jacobians."""

    center: SkyCoord

    def jacobian(self, dx, dy):
        """(a11, a12, a21, a22) = d alpha_i / d theta_j at offsets (arcsec)."""
        dx = np.asarray(dx, dtype=float)
        dy = np.asarray(dy, dtype=float)
        ax_x, ay_x = self.deflection(dx + 1j * _STEP, dy + 0j)
        ax_y, ay_y = self.deflection(dx + 0j, dy + 1j * _STEP)
        return (np.imag(ax_x) / _STEP, np.imag(ax_y) / _STEP,
                np.imag(ay_x) / _STEP, np.imag(ay_y) / _STEP)

    def _rotate_in(self, dx, dy, pa):
        """Offsets along (major, minor) axes for a position angle pa (radians)."""
        s, c = np.sin(pa), np.cos(pa)
        return dx * s + dy * c, dx * c - dy * s

    def _rotate_out(self, a_major, a_minor, pa):
        s, c = np.sin(pa), np.cos(pa)
        return a_major * s + a_minor * c, a_major * c - a_minor * s


def _sqrt(z):
    return np.sqrt(z) if np.iscomplexobj(z) else np.sqrt(np.maximum(z, 0.0))


class PointMass(_Profile):
    """Point mass: alpha = theta_E^2 theta / |theta|^2 (Paczynski 1986, ApJ 304, 1).

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
    theta_e : `~astropy.units.Quantity`
        Einstein radius for D_ls/D_s = 1.
    """

    def __init__(self, center, theta_e):
        self.center = SkyCoord(center).icrs
        self.theta_e = _arcsec(theta_e)

    def deflection(self, dx, dy):
        r2 = dx * dx + dy * dy
        return self.theta_e**2 * dx / r2, self.theta_e**2 * dy / r2

    def convergence(self, dx, dy):
        return np.zeros(np.broadcast(dx, dy).shape)


class IsothermalSphere(_Profile):
    """Singular or cored isothermal sphere (Narayan & Bartelmann 1996,
    arXiv:astro-ph/9606001): kappa = theta_E / (2 sqrt(r^2 + r_c^2)),
    alpha(r) = theta_E (sqrt(r^2 + r_c^2) - r_c) / r.

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
    theta_e : `~astropy.units.Quantity`
        Einstein radius of the singular sphere for D_ls/D_s = 1.
    core : `~astropy.units.Quantity`
        Core radius (0 for the singular sphere).
    """

    def __init__(self, center, theta_e, core=0 * u.arcsec):
        self.center = SkyCoord(center).icrs
        self.theta_e = _arcsec(theta_e)
        self.core = _arcsec(core)

    @classmethod
    def from_velocity_dispersion(cls, sigma, z_lens, z_source, center, cosmology=None,
                                 core=0 * u.arcsec):
        """Sphere whose Einstein radius for ``z_source`` follows from ``sigma``.

        theta_E = 4 pi (sigma / c)^2 D_ls / D_s (Narayan & Bartelmann 1996).
        The returned profile is normalised to D_ls/D_s = 1, i.e. its
        ``theta_e`` is 4 pi (sigma/c)^2.
        """
        from .cosmology import distance_ratio

        distance_ratio(z_lens, z_source, cosmology)  # validates the redshifts
        theta_unit = 4 * np.pi * (u.Quantity(sigma, u.km / u.s) / const.c).decompose().value**2
        return cls(center, theta_unit * u.rad, core=core)

    def deflection(self, dx, dy):
        r2 = dx * dx + dy * dy
        r_soft = _sqrt(r2 + self.core**2)
        scale = self.theta_e * (r_soft - self.core) / r2
        return scale * dx, scale * dy

    def convergence(self, dx, dy):
        return self.theta_e / (2 * np.sqrt(np.asarray(dx)**2 + np.asarray(dy)**2 + self.core**2))


class IsothermalEllipsoid(_Profile):
    """Singular or cored isothermal ellipsoid (Kormann, Schneider &
    Bartelmann 1994, A&A 284, 285; Keeton 2001, arXiv:astro-ph/0102341).

    Normalised so that kappa = theta_E sqrt(q) / (2 sqrt(q^2 (x'^2 + s^2) + y'^2))
    with x' along the major axis; the singular ellipsoid's tangential critical
    curve is then the ellipse q^2 x'^2 + y'^2 = q theta_E^2 (semi-axes
    theta_E / sqrt(q) and theta_E sqrt(q)), and q -> 1 gives the sphere.

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
    theta_e : `~astropy.units.Quantity`
    q : float
        Axis ratio (minor/major), 0 < q <= 1.
    pa : `~astropy.units.Quantity`
        Position angle of the major axis, North through East.
    core : `~astropy.units.Quantity`
        Core radius s (0 for the singular ellipsoid).
    """

    def __init__(self, center, theta_e, q, pa, core=0 * u.arcsec):
        if not 0 < q <= 1:
            raise ValueError("axis ratio q must be in (0, 1]")
        self.center = SkyCoord(center).icrs
        self.theta_e = _arcsec(theta_e)
        self.q = float(q)
        self.pa = _angle(pa)
        self.core = _arcsec(core)

    def deflection(self, dx, dy):
        x, y = self._rotate_in(dx, dy, self.pa)
        q, s = self.q, self.core
        b = self.theta_e * np.sqrt(q)
        psi = _sqrt(q * q * (s * s + x * x) + y * y)
        if q > 1 - 1e-6:
            r_soft = _sqrt(x * x + y * y + s * s)
            scale = self.theta_e * (r_soft - s) / (x * x + y * y)
            a_major, a_minor = scale * x, scale * y
        else:
            qp = np.sqrt(1 - q * q)
            a_major = b / qp * np.arctan(qp * x / (psi + s))
            a_minor = b / qp * np.arctanh(qp * y / (psi + q * q * s))
        return self._rotate_out(a_major, a_minor, self.pa)

    def convergence(self, dx, dy):
        x, y = self._rotate_in(np.asarray(dx, float), np.asarray(dy, float), self.pa)
        q = self.q
        return self.theta_e * np.sqrt(q) / (2 * np.sqrt(q * q * (x * x + self.core**2) + y * y))


class NFW(_Profile):
    """Navarro-Frenk-White halo in projection (Wright & Brainerd 2000, ApJ 534,
    34; Bartelmann 1996, A&A 313, 697).

    With x = r / r_s: alpha = 4 kappa_s r_s h(x) / x,
    h(x) = ln(x/2) + 2/sqrt(1-x^2) artanh sqrt((1-x)/(1+x))   (x < 1),
    h(x) = ln(x/2) + 2/sqrt(x^2-1) arctan sqrt((x-1)/(x+1))   (x > 1),
    and the mean convergence inside x is 4 kappa_s h(x) / x^2.

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
    kappa_s : float
        Characteristic convergence rho_s r_s / Sigma_cr for D_ls/D_s = 1.
    r_s : `~astropy.units.Quantity`
        Scale radius.
    """

    def __init__(self, center, kappa_s, r_s):
        self.center = SkyCoord(center).icrs
        self.kappa_s = float(kappa_s)
        self.r_s = _arcsec(r_s)

    @staticmethod
    def _h(x):
        inner = 2 / _sqrt(1 - x * x + 0j) * np.arctanh(_sqrt((1 - x) / (1 + x) + 0j))
        outer = 2 / _sqrt(x * x - 1 + 0j) * np.arctan(_sqrt((x - 1) / (x + 1) + 0j))
        with np.errstate(invalid="ignore", divide="ignore"):
            branch = np.where(np.real(x) < 1, inner, outer)
        # Both forms tend to 1 at x = 1, where each is 0/0.
        branch = np.where(np.isclose(np.real(x), 1.0, rtol=0, atol=1e-12), 1.0, branch)
        h = np.log(x / 2) + branch
        return h if np.iscomplexobj(x) else np.real(h)

    def deflection(self, dx, dy):
        r2 = dx * dx + dy * dy
        r = _sqrt(r2)
        x = r / self.r_s
        scale = 4 * self.kappa_s * self.r_s * self._h(x) / x / r
        return scale * dx, scale * dy

    def mean_convergence(self, r):
        """Mean convergence inside radius r (arcsec)."""
        x = np.asarray(r, float) / self.r_s
        return 4 * self.kappa_s * self._h(x) / x**2

    def convergence(self, dx, dy):
        x = np.sqrt(np.asarray(dx, float)**2 + np.asarray(dy, float)**2) / self.r_s
        with np.errstate(invalid="ignore", divide="ignore"):
            f_small = np.arctanh(np.sqrt(np.clip(1 - x * x, 0, None))) / np.sqrt(np.clip(1 - x * x, 1e-300, None))
            f_large = np.arctan(np.sqrt(np.clip(x * x - 1, 0, None))) / np.sqrt(np.clip(x * x - 1, 1e-300, None))
        f = np.where(x < 1, f_small, np.where(x > 1, f_large, 1.0))
        with np.errstate(invalid="ignore", divide="ignore"):
            kappa = 2 * self.kappa_s * (1 - f) / (x * x - 1)
        return np.where(np.isclose(x, 1.0), 2 * self.kappa_s / 3, kappa)


class ExternalShear(_Profile):
    """External shear, potential (gamma/2) r^2 cos 2(phi - phi_gamma) (Keeton 2001).

    Parameters
    ----------
    gamma : float
        Shear strength for D_ls/D_s = 1.
    pa : `~astropy.units.Quantity`
        Position angle (North through East) of the principal axis x' of the
        potential (gamma/2)(x'^2 - y'^2): images are compressed along it and
        stretched across it.
    center : `~astropy.coordinates.SkyCoord`
        Origin of the (otherwise translation-free) deflection field.
    """

    def __init__(self, gamma, pa, center):
        self.center = SkyCoord(center).icrs
        self.gamma = float(gamma)
        self.pa = _angle(pa)

    def deflection(self, dx, dy):
        x, y = self._rotate_in(dx, dy, self.pa)
        return self._rotate_out(self.gamma * x, -self.gamma * y, self.pa)

    def convergence(self, dx, dy):
        return np.zeros(np.broadcast(dx, dy).shape)


class CompositeLens:
    """Sum of profiles, evaluated on plane coordinates of one WCS."""

    def __init__(self, profiles):
        self.profiles = list(profiles)

    def __iter__(self):
        return iter(self.profiles)


def _flatten(profiles):
    out = []
    for item in (profiles if isinstance(profiles, (list, tuple, CompositeLens)) else [profiles]):
        out.extend(_flatten(item.profiles) if isinstance(item, CompositeLens) else [item])
    return out


# ---------------------------------------------------------------------------- grids
def make_wcs(center, shape, pixel_scale, rotation=0 * u.deg, flip_east=True):
    """A TAN WCS centred on ``center``.

    Parameters
    ----------
    center : `~astropy.coordinates.SkyCoord`
    shape : tuple of int
        (ny, nx).
    pixel_scale : `~astropy.units.Quantity`
        Angle per pixel.
    rotation : `~astropy.units.Quantity`
        Position angle of the +y pixel axis, North through East.
    flip_east : bool
        True for the usual orientation with East to the left (+x West).
    """
    center = SkyCoord(center).icrs
    ny, nx = shape
    scale = u.Quantity(pixel_scale, u.deg).value
    th = _angle(rotation)
    sign = -1.0 if flip_east else 1.0
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [center.ra.deg, center.dec.deg]
    wcs.wcs.crpix = [(nx + 1) / 2, (ny + 1) / 2]
    wcs.wcs.cd = scale * np.array([[sign * np.cos(th), np.sin(th)],
                                   [-sign * np.sin(th), np.cos(th)]])
    wcs.wcs.set()
    return wcs


def _matrix(wcs):
    return wcs.celestial.pixel_scale_matrix * 3600.0  # arcsec per pixel


def _origin(wcs):
    return np.asarray(wcs.celestial.wcs.crpix, float) - 1.0


def plane_coordinates(wcs, shape):
    """Plane coordinates (x East, y North, arcsec) of every pixel."""
    ny, nx = shape
    py, px = np.mgrid[0:ny, 0:nx].astype(float)
    return _pixels_to_plane(wcs, px, py)


def _pixels_to_plane(wcs, px, py):
    m = _matrix(wcs)
    ox, oy = _origin(wcs)
    dx, dy = px - ox, py - oy
    return m[0, 0] * dx + m[0, 1] * dy, m[1, 0] * dx + m[1, 1] * dy


def sky_to_plane(wcs, coords):
    """Plane coordinates (arcsec) of sky positions on a map's WCS."""
    px, py = wcs.celestial.world_to_pixel(coords)
    return _pixels_to_plane(wcs, np.asarray(px, float), np.asarray(py, float))


def plane_to_sky(wcs, x, y):
    """Sky positions of plane coordinates (arcsec) of a map's WCS."""
    m = np.linalg.inv(_matrix(wcs))
    ox, oy = _origin(wcs)
    x, y = np.asarray(x, float), np.asarray(y, float)
    px = m[0, 0] * x + m[0, 1] * y + ox
    py = m[1, 0] * x + m[1, 1] * y + oy
    return wcs.celestial.pixel_to_world(px, py).icrs


def _plane_deflection(profiles, wcs, shape):
    x, y = plane_coordinates(wcs, shape)
    ax = np.zeros(shape)
    ay = np.zeros(shape)
    for profile in _flatten(profiles):
        cx, cy = sky_to_plane(wcs, profile.center)
        with np.errstate(divide="ignore", invalid="ignore"):
            bx, by = profile.deflection(x - cx, y - cy)
        ax += bx
        ay += by
    return ax, ay


def deflection_maps(profiles, wcs, shape, *, dtype=np.float64):
    """Deflection maps in the file convention: components along the map's +x
    and +y pixel axes, in arcsec.

    Parameters
    ----------
    profiles : profile, list of profiles or `CompositeLens`
    wcs : `~astropy.wcs.WCS`
        TAN WCS of the map.
    shape : tuple of int
        (ny, nx).
    dtype : numpy dtype
        Output type (float32 for files like published ones).

    Returns
    -------
    alpha_x, alpha_y : ndarray
    """
    east, north = _plane_deflection(profiles, wcs, shape)
    m = _matrix(wcs)
    inverse = np.linalg.inv(m)
    # Plane (East, North) -> pixels along +x, +y, then arcsec along each axis.
    px = inverse[0, 0] * east + inverse[0, 1] * north
    py = inverse[1, 0] * east + inverse[1, 1] * north
    scales = np.sqrt((m**2).sum(axis=0))
    return (px * scales[0]).astype(dtype), (py * scales[1]).astype(dtype)


def convergence_map(profiles, wcs, shape):
    """Exact convergence (for D_ls/D_s = 1) at every pixel."""
    x, y = plane_coordinates(wcs, shape)
    kappa = np.zeros(shape)
    for profile in _flatten(profiles):
        cx, cy = sky_to_plane(wcs, profile.center)
        with np.errstate(divide="ignore", invalid="ignore"):
            kappa += profile.convergence(x - cx, y - cy)
    return kappa


def magnification_map(profiles, wcs, shape, scaling=1.0):
    """Exact signed magnification 1/det(I - f a) at every pixel."""
    x, y = plane_coordinates(wcs, shape)
    total = [np.zeros(shape) for _ in range(4)]
    for profile in _flatten(profiles):
        cx, cy = sky_to_plane(wcs, profile.center)
        with np.errstate(divide="ignore", invalid="ignore"):
            for k, term in enumerate(profile.jacobian(x - cx, y - cy)):
                total[k] += term
    a11, a12, a21, a22 = (scaling * t for t in total)
    with np.errstate(divide="ignore", invalid="ignore"):
        return 1.0 / ((1 - a11) * (1 - a22) - a12 * a21)
