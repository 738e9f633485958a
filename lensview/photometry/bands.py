"""Filters (bands): name, pivot wavelength, PSF width and AB zero point of a cutout.

A `Band` describes the filter one cutout was taken in; a `BandImage` is that
cutout with its WCS and band. The values come from the header or from the
user (the user's value always wins):

* name: ``FILTER`` (else ``FILTER1``/``FILTER2`` that are not a clear position);
* pivot wavelength: ``PHOTPLAM`` (Angstrom, the pivot wavelength of a
  flux-density calibration), else ``PIVOT_UM`` (micron, a keyword of our own);
* PSF FWHM: ``PSF_FWHM`` (arcsec, a keyword of our own), and the PSF's
  Moffat index ``PSF_BETA`` (our own; without it the PSF is taken as Gaussian);
* AB zero point: `lensview.photometry.zero_point` (``PHOTZP``, ``MAGZERO``,
  ``MAGZP``, ``ZP``, ``ZEROPNT``; ``PHOTFLAM`` with ``PHOTPLAM``; a flux-density
  ``BUNIT``).
"""

import math
from dataclasses import dataclass, replace

import numpy as np
import astropy.units as u
from astropy.wcs import WCS

from ..errors import LensviewInputError
from .frame import cutout_image, cutout_wcs
from .magnitudes import AB_ZERO_FLUX_DENSITY, zero_point as _zero_point, zero_point_value

__all__ = ["Band", "BandImage", "band_from_header", "band_image", "PIVOT_KEYWORDS",
           "PSF_KEYWORD", "PSF_BETA_KEYWORD", "NAME_KEYWORDS"]

#: Header keywords holding the pivot wavelength and the unit each is in.
PIVOT_KEYWORDS = (("PHOTPLAM", u.AA), ("PIVOT_UM", u.um))
#: Header keyword (our own) holding the PSF FWHM in arcsec.
PSF_KEYWORD = "PSF_FWHM"
#: Header keyword (our own) holding the Moffat index of the PSF.
PSF_BETA_KEYWORD = "PSF_BETA"
#: Header keywords holding the filter name, in order of preference.
NAME_KEYWORDS = ("FILTER", "FILTER1", "FILTER2")
_EMPTY_FILTER_WORDS = {"", "CLEAR", "CLEAR1L", "CLEAR2L", "CLEAR1S", "CLEAR2S", "OPEN", "N/A", "NONE"}


@dataclass(frozen=True)
class Band:
    """One filter of a multi-filter set.

    Attributes
    ----------
    name : str
        Filter name (unique within a set).
    pivot : `~astropy.units.Quantity`
        Pivot wavelength (length); the fluxes are taken as monochromatic
        flux densities at this wavelength.
    zero_point : float or None
        AB magnitude of one image unit; None when unknown.
    psf_fwhm : `~astropy.units.Quantity` or None
        FWHM of the PSF (angle); None when unknown.
    zero_point_source : str
        Where the zero point came from (a keyword or "user").
    psf_beta : float or None
        Moffat index of the PSF (Moffat 1969, A&A 3, 455); None for a Gaussian PSF.
    """

    name: str
    pivot: u.Quantity
    zero_point: float | None = None
    psf_fwhm: u.Quantity | None = None
    zero_point_source: str = ""
    psf_beta: float | None = None

    def __post_init__(self):
        if not isinstance(self.name, str) or not self.name.strip():
            raise LensviewInputError("A band needs a name, e.g. Band('blue', 0.9 * u.um, 27.5).")
        pivot = self.pivot
        if not (isinstance(pivot, u.Quantity) and pivot.unit.is_equivalent(u.um)
                and pivot.isscalar and math.isfinite(pivot.value) and pivot.value > 0):
            raise LensviewInputError(
                f"The pivot wavelength of band {self.name!r} must be a positive length, e.g. "
                f"1.5 * u.um; got {pivot!r}.")
        if self.zero_point is not None:
            object.__setattr__(self, "zero_point", zero_point_value(self.zero_point))
        if self.psf_fwhm is not None:
            psf = self.psf_fwhm
            if not (isinstance(psf, u.Quantity) and psf.unit.is_equivalent(u.arcsec)
                    and psf.isscalar and math.isfinite(psf.value) and psf.value > 0):
                raise LensviewInputError(
                    f"The PSF FWHM of band {self.name!r} must be a positive angle, e.g. "
                    f"0.1 * u.arcsec; got {psf!r}.")

        if self.psf_beta is not None and not (math.isfinite(float(self.psf_beta))
                                              and float(self.psf_beta) > 1):
            raise LensviewInputError(
                f"The Moffat index of band {self.name!r} must be a number above 1; got "
                f"{self.psf_beta!r}.")

    def enclosed_fraction(self, radius):
        """Fraction of a point source's light within ``radius`` (arcsec) of its centre.

        Gaussian PSF: ``1 - 2**(-4 (r / FWHM)**2)``; Moffat PSF of index beta:
        ``1 - (1 + r**2 / a**2)**(1 - beta)`` with ``a = FWHM / (2 sqrt(2**(1/beta) - 1))``
        (Moffat 1969, A&A 3, 455). NaN without a PSF FWHM.
        """
        r = np.asarray(radius, dtype=float)
        if self.psf_fwhm is None:
            return np.full(r.shape, np.nan)
        fwhm = self.psf_fwhm.to_value(u.arcsec)
        if self.psf_beta is None:
            return 1.0 - 2.0 ** (-4.0 * (r / fwhm) ** 2)
        beta = float(self.psf_beta)
        a = fwhm / (2.0 * math.sqrt(2.0 ** (1.0 / beta) - 1.0))
        return 1.0 - (1.0 + (r / a) ** 2) ** (1.0 - beta)

    @property
    def frequency(self):
        """Frequency of the pivot wavelength (Hz)."""
        return self.pivot.to(u.Hz, equivalencies=u.spectral())

    def unit_flux_density(self):
        """f_nu of one image unit, from the AB zero point (Oke & Gunn 1983, ApJ 266, 713)."""
        self.require_zero_point()
        return (AB_ZERO_FLUX_DENSITY * 10.0 ** (-0.4 * self.zero_point)).to(u.uJy)

    def require_zero_point(self):
        if self.zero_point is None:
            raise LensviewInputError(
                f"Band {self.name!r} has no photometric zero point: its header holds none of "
                "PHOTZP, MAGZERO, MAGZP, ZP, ZEROPNT, PHOTFLAM with PHOTPLAM, or a flux-density "
                "BUNIT. Give its AB zero point (zero_point= in the API, zp=... after the file "
                "with --cutout on the command line, or the zero-point box on the page).")


@dataclass(frozen=True)
class BandImage:
    """A cutout in one band: image, celestial WCS and `Band`."""

    data: np.ndarray
    wcs: WCS
    band: Band

    def __post_init__(self):
        image = cutout_image(self.data)
        object.__setattr__(self, "data", image)
        object.__setattr__(self, "wcs", cutout_wcs(self.wcs, image))


def _header_name(header):
    for key in NAME_KEYWORDS:
        value = header.get(key)
        if isinstance(value, str) and value.strip().upper() not in _EMPTY_FILTER_WORDS:
            return value.strip()
    return None


def _header_pivot(header):
    for key, unit in PIVOT_KEYWORDS:
        value = header.get(key)
        if isinstance(value, (int, float, np.number)) and not isinstance(value, bool):
            if math.isfinite(float(value)) and float(value) > 0:
                return float(value) * unit
    return None


def _header_psf(header):
    value = header.get(PSF_KEYWORD)
    if _positive_number(value):
        return float(value) * u.arcsec
    return None


def _header_beta(header):
    value = header.get(PSF_BETA_KEYWORD)
    return float(value) if _positive_number(value) and float(value) > 1 else None


def _header_zero_point_source(header):
    for key in ("PHOTZP", "MAGZERO", "MAGZP", "ZP", "ZEROPNT"):
        if _positive_number(header.get(key), allow_any_sign=True):
            return key
    if _positive_number(header.get("PHOTFLAM")) and _positive_number(header.get("PHOTPLAM")):
        return "PHOTFLAM/PHOTPLAM"
    return "BUNIT"


def _positive_number(value, allow_any_sign=False):
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)):
        return False
    return math.isfinite(float(value)) and (allow_any_sign or float(value) > 0)


def band_from_header(header, *, name=None, pivot=None, zero_point=None, psf_fwhm=None,
                     psf_beta=None, what="the cutout"):
    """The `Band` a FITS header declares, with the user's values taking precedence.

    Parameters
    ----------
    header : `~astropy.io.fits.Header` or mapping
        Header of the cutout (image HDU; merge in the primary header first
        if the keywords live there).
    name : str, optional
        Filter name; default the ``FILTER`` keyword.
    pivot : `~astropy.units.Quantity`, optional
        Pivot wavelength; default ``PHOTPLAM`` (Angstrom) or ``PIVOT_UM`` (micron).
    zero_point : float, optional
        AB zero point; default from the header (see module notes). A missing
        zero point is allowed here and reported by `Band.require_zero_point`.
    psf_fwhm : `~astropy.units.Quantity`, optional
        PSF FWHM; default ``PSF_FWHM`` (arcsec).
    psf_beta : float, optional
        Moffat index of the PSF; default ``PSF_BETA`` (a header without it: Gaussian).
    what : str
        How to call the cutout in messages (e.g. its file name).

    Returns
    -------
    Band

    Raises
    ------
    LensviewInputError
        Without a name or a pivot wavelength from either the header or the user.
    """
    header = {} if header is None else header
    name = name if name is not None else _header_name(header)
    if not name:
        raise LensviewInputError(
            f"The filter of {what} is unknown: its header has no FILTER keyword. Give the "
            "band's name (name= in the API, name=... after the file with --cutout).")
    if pivot is None:
        pivot = _header_pivot(header)
    elif not isinstance(pivot, u.Quantity):
        raise LensviewInputError(
            f"The pivot wavelength of {name!r} must be a length Quantity, e.g. 1.5 * u.um; "
            f"got {pivot!r}.")
    if pivot is None:
        raise LensviewInputError(
            f"The pivot wavelength of filter {name!r} ({what}) is unknown: its header has no "
            "PHOTPLAM (Angstrom) or PIVOT_UM (micron). Give it (pivot= in the API, "
            "pivot=1.5um after the file with --cutout).")
    source = "user"
    if zero_point is None:
        zero_point = _zero_point(header) if header else None
        source = "" if zero_point is None else _header_zero_point_source(header)
    if psf_fwhm is None:
        psf_fwhm = _header_psf(header)
    elif not isinstance(psf_fwhm, u.Quantity):
        psf_fwhm = float(psf_fwhm) * u.arcsec
    if psf_beta is None:
        psf_beta = _header_beta(header)
    return Band(name=str(name), pivot=pivot.to(u.um), zero_point=zero_point, psf_fwhm=psf_fwhm,
                zero_point_source=source, psf_beta=psf_beta)


def band_image(cutout, *, name=None, pivot=None, zero_point=None, psf_fwhm=None, psf_beta=None):
    """A `BandImage` from a cutout read with `lensview.read_cutout`.

    The band is read from the image header, then from the primary header
    for keywords missing there (zero points are already merged that way by
    `read_cutout`); the user's values win.

    Parameters
    ----------
    cutout : `~lensview.io.fits.Cutout`
        A cutout (``data``, ``wcs``, ``header``, ``zero_point``, ``path``).
    name, pivot, zero_point, psf_fwhm, psf_beta
        As in `band_from_header`.

    Returns
    -------
    BandImage
    """
    what = cutout.path or "the uploaded cutout"
    band = band_from_header(cutout.header, name=name, pivot=pivot, zero_point=zero_point,
                            psf_fwhm=psf_fwhm, psf_beta=psf_beta, what=what)
    if band.zero_point is None and getattr(cutout, "zero_point", None) is not None:
        band = replace(band, zero_point=float(cutout.zero_point), zero_point_source="primary header")
    return BandImage(np.asarray(cutout.data, dtype=float), cutout.wcs, band)
