"""The demo's lens models as deflection maps on disk, one per file layout."""


import numpy as np
import astropy.units as u
from astropy.io import fits

from .. import analytic
from ..cosmology import distance_ratio
from .scenario import CLUSTER_NAME, Z_LENS, lens_profiles, scenario_sky


def _map_grid(grid, size_factor):
    """WCS and shape of one model's maps (same field of view at any size)."""
    n = scaled_size(grid.size, size_factor)
    wcs = analytic.make_wcs(scenario_sky(*grid.centre), (n, n), grid.scale * grid.size / n * u.arcsec,
                            rotation=grid.rotation * u.deg)
    return wcs, (n, n)


def scaled_size(size, size_factor):
    return max(int(round(size * size_factor)), 32)


def model_maps(grid, size_factor):
    """float32 deflection maps (arcsec along the map's pixel axes) as written."""
    wcs, shape = _map_grid(grid, size_factor)
    alpha_x, alpha_y = analytic.deflection_maps(lens_profiles(grid.name), wcs, shape)
    if grid.z_norm is not None:
        # Maps made for a source at z_norm hold ratio(z_norm) times the D_ls/D_s = 1 maps.
        ratio = distance_ratio(Z_LENS, grid.z_norm)
        alpha_x, alpha_y = alpha_x * ratio, alpha_y * ratio
    return alpha_x.astype(np.float32), alpha_y.astype(np.float32), wcs


def _map_header(grid, wcs, component=None):
    header = wcs.to_header()
    header["BUNIT"] = ("arcsec", "deflection along the map's own pixel axes")
    header["OBJECT"] = (CLUSTER_NAME, "invented demo cluster")
    header["MODEL"] = (grid.name, "lens model (invented)")
    header["Z_LENS"] = (Z_LENS, "lens redshift")
    if grid.z_norm is None:
        header["DLS_DS"] = (1.0, "maps normalised to D_ls/D_s = 1")
    else:
        header["Z_NORM"] = (grid.z_norm, "maps are the deflections for a source at this z")
    if component is not None:
        header["COMPONEN"] = (component, "deflection component along this pixel axis")
    header["ORIGIN"] = ("lensview demo", "invented data, see sample_images/README.md")
    return header


def write_model(directory, grid, alpha_x, alpha_y, wcs):
    paths = [directory / name for name in grid.files]
    if grid.layout == "two files":
        for path, data, component in zip(paths, (alpha_x, alpha_y), ("x", "y")):
            fits.PrimaryHDU(data, _map_header(grid, wcs, component)).writeto(path, overwrite=True)
    elif grid.layout.startswith("one file, two"):
        hdus = [fits.PrimaryHDU(header=_map_header(grid, wcs))]
        for data, component in ((alpha_x, "x"), (alpha_y, "y")):
            hdus.append(fits.ImageHDU(data, _map_header(grid, wcs, component),
                                      name=f"ALPHA_{component.upper()}"))
        fits.HDUList(hdus).writeto(paths[0], overwrite=True)
    else:
        header = _map_header(grid, wcs)
        header["PLANE1"] = ("x", "first plane: deflection along pixel axis 1")
        header["PLANE2"] = ("y", "second plane: deflection along pixel axis 2")
        fits.PrimaryHDU(np.stack([alpha_x, alpha_y]), header).writeto(paths[0], overwrite=True)
    return paths


