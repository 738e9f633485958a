"""The per-knot figure of "what is the knot": its SED and its luminosity across models.

Left: the flux densities measured in each filter (points with 1-sigma bars,
arrows for non-detections) and the fitted redshifted blackbody, against
observed wavelength, with the rest-frame wavelength on the top axis. Right:
the delensed bolometric luminosity of each model (and realisation) on a log
axis, with the single-star limits of `lensview.nature` drawn as lines.

Built on `matplotlib.figure.Figure` without pyplot, like `lensview.figures`.
"""

import numpy as np
import astropy.units as u
from matplotlib.figure import Figure
from matplotlib.ticker import FormatStrFormatter, NullFormatter

from ..errors import LensviewInputError
from ..style import model_colours

__all__ = ["render_knot_figure", "render_knot_figures"]

_POINT_COLOUR = "#1B1B1B"
_CURVE_COLOUR = "#B5502E"
_LIMIT_STYLE = dict(color="#5A5A5A", lw=1.0)


def render_knot_figure(result, candidate, *, figsize=(8.4, 3.4)):
    """Figure of one knot from a `lensview.nature.KnotNature` result.

    Parameters
    ----------
    result : `~lensview.nature.KnotNature`
    candidate : int
        0-based knot index (the ``candidate`` column).
    figsize : tuple
        Figure size in inches.

    Returns
    -------
    `~matplotlib.figure.Figure`
    """
    from ..nature import COOL_STAR_LUMINOSITY, FEW_STARS, eddington_luminosity, MAX_STELLAR_MASS

    rows = result.summary[np.asarray(result.summary["candidate"]) == candidate]
    if len(rows) != 1:
        raise LensviewInputError(f"There is no knot {candidate} in this result.")
    row = rows[0]
    fit = result.fits[int(np.flatnonzero(np.asarray(result.summary["candidate"]) == candidate)[0])]
    fig = Figure(figsize=figsize, layout="constrained")
    sed_ax, lum_ax = fig.subplots(1, 2, width_ratios=(1.35, 1))

    lam = fit.wavelength.to_value(u.um)
    flux = fit.flux.to_value(u.uJy)
    err = fit.flux_err.to_value(u.uJy)
    detected = np.isfinite(flux) & np.isfinite(err) & (flux > 2 * err)
    sed_ax.errorbar(lam[detected], flux[detected], yerr=err[detected], fmt="s", ms=5,
                    color=_POINT_COLOUR, capsize=2, label="measured")
    upper = np.isfinite(err) & ~detected
    if upper.any():
        sed_ax.errorbar(lam[upper], 2 * err[upper], yerr=0.3 * 2 * err[upper], uplims=True,
                        fmt="none", color=_POINT_COLOUR, label="2-sigma limit")
    if np.isfinite(fit.temperature):
        grid = np.geomspace(0.6 * np.nanmin(lam), 1.6 * np.nanmax(lam), 200) * u.um
        sed_ax.plot(grid, fit.model(grid).to_value(u.uJy), color=_CURVE_COLOUR, lw=1.5,
                    label=f"blackbody {row['temperature']:.0f} ± {row['temperature_err']:.0f} K")
    sed_ax.set_xscale("log")
    sed_ax.set_yscale("log")
    shown = flux[detected]
    if shown.size:
        # Keep the measured points readable where the curve plunges on the Wien side.
        sed_ax.set_ylim(shown.min() / 10, shown.max() * 4)
    sed_ax.set_xlabel("observed wavelength (micron)")
    sed_ax.set_ylabel("f_nu (microjansky)")
    z = fit.z
    top = sed_ax.secondary_xaxis("top", functions=(lambda x: x / (1 + z), lambda x: x * (1 + z)))
    top.set_xlabel(f"rest-frame wavelength at z = {z:g} (micron)")
    for axis in (sed_ax.xaxis, top.xaxis):
        axis.set_major_formatter(FormatStrFormatter("%g"))
        axis.set_minor_formatter(NullFormatter())
    sed_ax.set_xticks(lam[np.isfinite(lam)])
    top.set_xticks(lam[np.isfinite(lam)] / (1 + z))
    top.xaxis.set_major_formatter(FormatStrFormatter("%.2g"))
    sed_ax.legend(fontsize=7, frameon=False, loc="lower center")
    sed_ax.set_title(f"knot {row['label']}", fontsize=9, loc="left")

    per = result.per_model[np.asarray(result.per_model["candidate"]) == candidate]
    names = [str(n) for n in per["model"]]
    lum = np.asarray(per["luminosity"], float)
    lum_err = np.asarray(per["luminosity_err"], float)
    models = [n for n in names if not n.startswith("realisation")]
    colours = model_colours(models)
    ypos = np.arange(len(names))
    for k, name in enumerate(names):
        if not np.isfinite(lum[k]) or lum[k] <= 0:
            continue
        low = lum[k] / (1 + lum_err[k] / lum[k]) if np.isfinite(lum_err[k]) else lum[k]
        high = lum[k] * (1 + lum_err[k] / lum[k]) if np.isfinite(lum_err[k]) else lum[k]
        colour = colours.get(name, "#7F7F7F")
        lum_ax.errorbar([lum[k]], [k], xerr=[[lum[k] - low], [high - lum[k]]], fmt="o", ms=4,
                        color=colour, capsize=2)
    eddington = eddington_luminosity(MAX_STELLAR_MASS).to_value(u.L_sun)
    lum_ax.axvline(eddington, ls="-", **_LIMIT_STYLE)
    lum_ax.axvline(COOL_STAR_LUMINOSITY.to_value(u.L_sun), ls="--", **_LIMIT_STYLE)
    lum_ax.axvline(FEW_STARS * float(row["single_star_limit"]), ls=":", **_LIMIT_STYLE)
    lum_ax.text(eddington, len(names) - 0.4, " L_Edd(300 M_sun)", fontsize=6, rotation=90,
                va="top", ha="right", color="#5A5A5A")
    lum_ax.text(COOL_STAR_LUMINOSITY.to_value(u.L_sun), len(names) - 0.4, " cool-star limit",
                fontsize=6, rotation=90, va="top", ha="right", color="#5A5A5A")
    lum_ax.text(FEW_STARS * float(row["single_star_limit"]), len(names) - 0.4,
                f" {FEW_STARS} such stars", fontsize=6, rotation=90, va="top", ha="right",
                color="#5A5A5A")
    lum_ax.set_xscale("log")
    lum_ax.set_yticks(ypos, names if len(names) <= 12 else [""] * len(names), fontsize=7)
    lum_ax.set_ylim(-0.7, len(names) - 0.3)
    finite = lum[np.isfinite(lum) & (lum > 0)]
    if finite.size:
        span = np.array([finite.min(), finite.max(), eddington, COOL_STAR_LUMINOSITY.value])
        lum_ax.set_xlim(span.min() / 5, span.max() * 5)
    lum_ax.set_xlabel("delensed luminosity (nominal L_sun)")
    lum_ax.set_title(str(row["verdict"]), fontsize=7, loc="left", wrap=True)
    return fig


def render_knot_figures(result):
    """One figure per knot of a `lensview.nature.KnotNature`, as (label, Figure) pairs."""
    return [(str(row["label"]), render_knot_figure(result, int(row["candidate"])))
            for row in result.summary]
