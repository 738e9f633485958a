"""The invented demo scenario in ``sample_images/``.

Everything here is invented: the cluster (the "Lantern cluster", a name of
our own), its position, its redshift, its member galaxies, the lensed
background galaxy and every number below. Nothing is taken from a real
object, survey or publication.

The scenario
    A massive cluster at z = 0.45 lenses a clumpy star-forming galaxy at
    z = 2.9 into a giant arc that crosses the tangential critical curve at a
    fold. Three deliberately different lens models of the cluster are written
    as deflection maps, each on its own grid, pixel scale and rotated WCS, one
    in each file layout that `lensview.io.fits` reads:

    * ``isothermal`` (the truth): a cored isothermal ellipsoid halo plus
      cored isothermal member galaxies; two files, normalised to
      D_ls/D_s = 1;
    * ``NFW shear``: an NFW halo, external shear and lighter members; one
      file with two image HDUs, normalised to a source at z = 2.0
      (``Z_NORM`` in the headers);
    * ``perturbed``: the truth with a shifted, rotated halo, a heavier
      member near the arc and a dark subhalo; a two-plane cube, normalised
      to D_ls/D_s = 1.

    The cutout is rendered by ray tracing its pixels (supersampled) through
    the truth model to the source (a Sersic disk with Gaussian star-forming
    clumps; clumps too small for the sub-pixels are drawn through the local
    lens mapping at each of their images), adding a compact unresolved
    object placed just inside the fold caustic, whose two images merge on
    the critical curve, the cluster members' light (Sersic profiles) and
    faint field galaxies, convolving with a Moffat PSF and adding sky noise
    from a seeded generator. The same scene is rendered in four invented
    filters (`FILTERS`), each with its own WCS, PSF and zero point; the
    compact object is a blackbody of `COMPACT_TEMPERATURE` at the source
    redshift, the other parts have power-law SEDs. Positions that matter (the fold, the compact
    object's distance from the caustic, the mirrored clump's images) are
    computed with the library itself, on the truth model's float32 maps as
    they are written to disk.

Modules: `scenario` (the invented numbers), `maps` (lens models on disk),
`fold` (the fold and the images of a source), `render` (the cutout),
`colours` (the components through each filter), `generate` (writing the
files), `loading` (`load_demo`, `load_demo_filters`), `readme`.

`generate_demo` writes the files deterministically: the same seed gives the
same bytes (no dates or checksums in the headers). `load_demo` reads them
back through `lensview.io.fits` and `lensview.io`.
"""

from .generate import generate_demo, library_versions
from .loading import load_demo, load_demo_filters
from .scenario import (CANDIDATE_FILE, CLUSTER_NAME, COMPACT_TEMPERATURE, CUTOUT_FILE, DEFAULT_SEED,
                       DEMO_DIRECTORY, FILTERS, GRIDS, MODEL_NAMES, README_FILE, REFERENCE_FILTER,
                       TRUTH_MODEL, VERSIONS_FILE, Z_LENS, Z_SOURCE, lens_profiles)

__all__ = [
    "DEMO_DIRECTORY",
    "DEFAULT_SEED",
    "CLUSTER_NAME",
    "Z_LENS",
    "Z_SOURCE",
    "TRUTH_MODEL",
    "MODEL_NAMES",
    "CUTOUT_FILE",
    "CANDIDATE_FILE",
    "README_FILE",
    "VERSIONS_FILE",
    "GRIDS",
    "generate_demo",
    "load_demo",
    "load_demo_filters",
    "FILTERS",
    "REFERENCE_FILTER",
    "COMPACT_TEMPERATURE",
    "lens_profiles",
    "library_versions",
]
