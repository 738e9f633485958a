"""The demo's components seen through each invented filter.

The magnitudes of `scenario.HOST` and `scenario.KNOTS` are those of the
reference filter; in another filter each component is brighter or fainter by
its SED: the compact object C a blackbody of `COMPACT_TEMPERATURE` at the
source redshift (`lensview.sed.blackbody_flux_density`), the host, the clumps,
the members and the field galaxies power laws f_nu ~ lambda**slope. Fluxes
are taken at the filters' pivot wavelengths (no bandpass integration), the
same convention the SED fit uses.
"""

import math
from dataclasses import dataclass

import astropy.units as u

from .scenario import (CLUMP_SLOPE, COMPACT_TEMPERATURE, FIELD_SLOPE, FILTERS, HOST,
                       HOST_SLOPE, MEMBER_SLOPE, REFERENCE_FILTER, Z_SOURCE)

__all__ = ["Look", "filter_look", "REFERENCE_LOOK", "compact_magnitude"]


def _reference():
    return next(f for f in FILTERS if f.name == REFERENCE_FILTER)


def _power_law_offset(pivot_um, slope):
    """Magnitude change from the reference filter for f_nu ~ lambda**slope."""
    return -2.5 * slope * math.log10(pivot_um / _reference().pivot_um)


def _blackbody_offset(pivot_um):
    from ..sed import blackbody_flux_density

    here = blackbody_flux_density(pivot_um * u.um, COMPACT_TEMPERATURE, 1.0, Z_SOURCE)
    there = blackbody_flux_density(_reference().pivot_um * u.um, COMPACT_TEMPERATURE, 1.0,
                                   Z_SOURCE)
    return -2.5 * math.log10(float(here / there))


def compact_magnitude(pivot_um):
    """Intrinsic AB magnitude of the compact object C at a wavelength (micron)."""
    from .scenario import KNOTS

    return next(k for k in KNOTS if k.label == "C").mag + _blackbody_offset(pivot_um)


@dataclass(frozen=True)
class Look:
    """How one filter renders the scene: grid, PSF, zero point, noise and
    the components' magnitude changes from the reference filter."""

    name: str
    index: int
    pivot_um: float
    psf_fwhm: float
    zero_point: float
    scale: float
    rotation: float
    sky_sigma: float
    file: str
    compact_offset: float
    clump_offset: float
    host_offset: float
    member_offset: float
    field_offset: float

    @property
    def host_mag(self):
        return HOST["mag"] + self.host_offset

    def knot_offset(self, knot):
        return self.compact_offset if knot.label == "C" else self.clump_offset


def filter_look(demo_filter):
    """The `Look` of one `scenario.DemoFilter`."""
    reference = demo_filter.name == REFERENCE_FILTER
    pivot = demo_filter.pivot_um

    def offset(value):
        return 0.0 if reference else value

    return Look(name=demo_filter.name, index=FILTERS.index(demo_filter), pivot_um=pivot,
                psf_fwhm=demo_filter.psf_fwhm, zero_point=demo_filter.zero_point,
                scale=demo_filter.scale, rotation=demo_filter.rotation,
                sky_sigma=demo_filter.sky_sigma, file=demo_filter.file,
                compact_offset=offset(_blackbody_offset(pivot)),
                clump_offset=offset(_power_law_offset(pivot, CLUMP_SLOPE)),
                host_offset=offset(_power_law_offset(pivot, HOST_SLOPE)),
                member_offset=offset(_power_law_offset(pivot, MEMBER_SLOPE)),
                field_offset=offset(_power_law_offset(pivot, FIELD_SLOPE)))


REFERENCE_LOOK = filter_look(_reference())
