"""Reading the bundled demo back through the library's own readers."""

from pathlib import Path

from astropy.io import fits
from astropy.table import Table

from ..errors import LensviewInputError
from .scenario import CANDIDATE_FILE, CUTOUT_FILE, DEMO_DIRECTORY, FILTERS, GRIDS


def load_demo(directory=None):
    """Load the demo scenario through `lensview.io.fits` and `lensview.io`.

    Parameters
    ----------
    directory : str or path-like, optional
        Folder written by `generate_demo`; default `DEMO_DIRECTORY`.

    Returns
    -------
    cutout : `~lensview.io.fits.Cutout`
        The image of the arc.
    fields : list of `~lensview.DeflectionField`
        The three lens models, in the order of `MODEL_NAMES`, with the lens
        redshift and normalisation read from the map headers (``Z_LENS``,
        ``Z_NORM``).
    candidates : `~astropy.table.Table`
        The marked knots (``ra``, ``dec``, ``label``, ``pair_id``, ``note``);
        ``meta`` holds the redshifts and the truth model's compact-object
        images.

    Raises
    ------
    LensviewInputError
        If a demo file is missing.
    """
    from ..lens.field import DeflectionField
    from ..io import read_candidates
    from ..io.fits import read_cutout

    directory = DEMO_DIRECTORY if directory is None else Path(directory)
    needed = [directory / name for grid in GRIDS for name in grid.files]
    needed += [directory / CUTOUT_FILE, directory / CANDIDATE_FILE]
    missing = [p.name for p in needed if not p.is_file()]
    if missing:
        raise LensviewInputError(
            f"The demo files {', '.join(missing)} are missing from {directory}; write them with "
            f"`lensview demo {directory}` (or lensview.demo.generate_demo).")
    cutout = read_cutout(directory / CUTOUT_FILE)
    fields = []
    for grid in GRIDS:
        paths = [directory / name for name in grid.files]
        header = fits.getheader(paths[0], ext=0)
        z_norm = header.get("Z_NORM")
        fields.append(DeflectionField.from_fits(
            *paths, units="arcsec", z_lens=float(header["Z_LENS"]),
            z_norm=None if z_norm is None else float(z_norm), name=grid.name))
    candidates = read_candidates(directory / CANDIDATE_FILE)
    written = Table.read(directory / CANDIDATE_FILE, format="ascii.ecsv")
    candidates["note"] = written["note"]
    candidates.meta.update(written.meta)
    return cutout, fields, candidates




def load_demo_filters(directory=None):
    """The demo field in each of its invented filters, blue to red.

    Parameters
    ----------
    directory : str or path-like, optional
        Folder written by `generate_demo`; default `DEMO_DIRECTORY`.

    Returns
    -------
    list of `~lensview.photometry.BandImage`
        One per filter of `FILTERS`, with name, pivot wavelength, PSF FWHM
        and AB zero point read from the headers; the reference filter is the
        cutout `load_demo` returns.

    Raises
    ------
    LensviewInputError
        If a demo file is missing.
    """
    import lensview as lv

    directory = DEMO_DIRECTORY if directory is None else Path(directory)
    paths = [directory / f.file for f in FILTERS]
    missing = [p.name for p in paths if not p.is_file()]
    if missing:
        raise LensviewInputError(
            f"The demo files {', '.join(missing)} are missing from {directory}; write them with "
            f"`lensview demo {directory}` (or lensview.demo.generate_demo).")
    return [lv.band_image(lv.read_cutout(path)) for path in paths]
