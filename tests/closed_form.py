"""Closed-form lenses in map pixels, written from their published formulas.

Tests use these instead of lensview's own analytic module, so that checks of
the core do not lean on other project code.
"""

import numpy as np
from astropy.wcs import WCS


def make_wcs(n_x, n_y, scale_arcsec=0.05, rotation_deg=0.0, crval=(150.0, 2.0)):
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = list(crval)
    wcs.wcs.crpix = [n_x / 2 + 1, n_y / 2 + 1]
    th = np.radians(rotation_deg)
    s = scale_arcsec / 3600
    wcs.wcs.cd = [[-s * np.cos(th), s * np.sin(th)], [s * np.sin(th), s * np.cos(th)]]
    return wcs


def grid(n, x0, y0):
    y, x = np.mgrid[0:n, 0:n].astype(float)
    return x - x0, y - y0


def sie(n, theta_e, q, pa, x0, y0):
    """Singular isothermal ellipsoid deflection in pixels (Kormann, Schneider &
    Bartelmann 1994; Keeton 2001, arXiv:astro-ph/0102341), normalised so that
    kappa = theta_e sqrt(q) / (2 sqrt(q^2 x'^2 + y'^2))."""
    x, y = grid(n, x0, y0)
    c, s = np.cos(pa), np.sin(pa)
    xp, yp = c * x + s * y, -s * x + c * y
    qp = np.sqrt(1 - q * q)
    psi = np.hypot(q * xp, yp)
    psi[psi == 0] = 1e-12
    axp = theta_e * np.sqrt(q) / qp * np.arctan(qp * xp / psi)
    ayp = theta_e * np.sqrt(q) / qp * np.arctanh(qp * yp / psi)
    return c * axp - s * ayp, s * axp + c * ayp


def sie_curve_distance(xy, theta_e, q, pa, x0, y0):
    """Distance of points from the kappa = 1/2 ellipse q^2 x'^2 + y'^2 = q theta_e^2."""
    x, y = xy[:, 0] - x0, xy[:, 1] - y0
    c, s = np.cos(pa), np.sin(pa)
    xp, yp = c * x + s * y, -s * x + c * y
    r = np.hypot(q * xp, yp)
    return (r - theta_e * np.sqrt(q)) / (np.hypot(q * q * xp, yp) / r)


def cored_sphere(n, theta_e, core, x0, y0):
    """Cored isothermal sphere: alpha(r) = theta_e (sqrt(r^2 + rc^2) - rc) / r
    (Narayan & Bartelmann 1996, arXiv:astro-ph/9606001, sec. 3)."""
    x, y = grid(n, x0, y0)
    r = np.hypot(x, y)
    r[r == 0] = 1e-12
    alpha = theta_e * (np.sqrt(r * r + core * core) - core) / r
    return alpha * x / r, alpha * y / r


def nfw_alpha(r, kappa_s, r_s):
    """NFW deflection (Wright & Brainerd 2000, ApJ 534, 34; Bartelmann 1996):
    alpha(x) = 4 kappa_s r_s h(x)/x with h(x) = ln(x/2) + F(x), x = r/r_s."""
    x = r / r_s
    with np.errstate(invalid="ignore", divide="ignore"):
        f_small = 2 / np.sqrt(1 - x * x) * np.arctanh(np.sqrt(np.clip((1 - x) / (1 + x), 0, None)))
        f_large = 2 / np.sqrt(x * x - 1) * np.arctan(np.sqrt(np.clip((x - 1) / (1 + x), 0, None)))
    h = np.log(x / 2) + np.where(x < 1, f_small, np.where(x > 1, f_large, 1.0))
    return 4 * kappa_s * r_s * h / x
