"""Reading FITS image cutouts and deflection maps, with every validation.

Files are opened with memory mapping, so large maps are paged in on use and
float32 data stay float32 (in the file's big-endian byte order; numpy reads
it directly). Inputs may be paths or, as uploads arrive in the app, bytes and
file-like objects.

Deflection models come in three layouts:

(a) two files, each with one 2-D map (x, then y);
(b) one file with two 2-D image HDUs: the HDUs named for the components
    (``ALPHA_X``/``ALPHA_Y``, ``DEFX``/``DEFY``, ...) if there are such
    names, otherwise the first two 2-D images, x then y;
(c) one file with a 3-D cube of two planes, plane 0 = x, plane 1 = y.

The components are along the map's own +x and +y pixel axes (DEVELOPERS.md).
Every problem with a file is a `~lensview.errors.LensviewInputError` whose
message names the file and says what to do.
"""

import io
import math
import os
import re
import warnings
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import astropy.constants as const
import astropy.units as u
from astropy.io import fits
from astropy.utils.exceptions import AstropyUserWarning
from astropy.wcs import WCS, FITSFixedWarning

from ..checks import DEFLECTION_UNITS, deflection_units
from ..errors import LensviewInputError

__all__ = [
    "Cutout",
    "DeflectionMaps",
    "read_cutout",
    "read_deflection",
    "zero_point_from_header",
    "DEFLECTION_UNITS",
    "WCS_TOLERANCE_PIXELS",
    "ZERO_POINT_KEYWORDS",
]

#: Largest disagreement (in pixels) allowed between the x and y map WCS.
WCS_TOLERANCE_PIXELS = 1e-3
#: Header keywords that carry an AB zero point directly, in order of preference.
ZERO_POINT_KEYWORDS = ("PHOTZP", "MAGZERO", "MAGZP", "ZP", "ZEROPNT")

# HDU names (upper case, letters and digits only) that mark the components.
_X_NAMES = {"ALPHAX", "ALPHA1", "DEFX", "DEFLX", "DEFLECTIONX", "AX"}
_Y_NAMES = {"ALPHAY", "ALPHA2", "DEFY", "DEFLY", "DEFLECTIONY", "AY"}
_BUNIT_WORDS = {
    "arcsec": "arcsec", "arcsecond": "arcsec", "arcseconds": "arcsec", "asec": "arcsec",
    "pix": "pixel", "pixel": "pixel", "pixels": "pixel",
}
# f_lambda * lambda**2 / c = f_nu, so for PHOTFLAM (erg/s/cm2/A per unit of
# the image) at PHOTPLAM (A): ZP_AB = -2.5 log10(PHOTFLAM) - 5 log10(PHOTPLAM)
# + 2.5 log10(c * 3631 Jy); the constant is -2.408 of the space-telescope
# relation (from memory), here computed from the AB definition (Oke & Gunn 1983).
_AB_PHOTFLAM_CONSTANT = 2.5 * math.log10(
    (const.c * 3631 * u.Jy).to_value(u.erg / u.s / u.cm**2 * u.AA))
_ROW_BLOCK = 256
_ANONYMOUS = "the uploaded data"


@dataclass
class Cutout:
    """An image cutout read from FITS.

    Attributes
    ----------
    data : ndarray
        The 2-D image (memory-mapped when read from a path).
    wcs : `~astropy.wcs.WCS`
        Its celestial WCS, distortions included.
    header : `~astropy.io.fits.Header`
        Header of the image HDU.
    path : str or None
        Path or upload name of the file; None for anonymous bytes.
    hdu_index : int
        Position of the image HDU in the file.
    zero_point : float or None
        AB zero point from the header (`zero_point_from_header` on the image
        header, then the primary header), None when the header has none.
    """

    data: np.ndarray
    wcs: WCS
    header: fits.Header
    path: str | None
    hdu_index: int
    zero_point: float | None


@dataclass
class DeflectionMaps:
    """The two deflection components of one lens model.

    Attributes
    ----------
    alpha_x, alpha_y : ndarray
        Components along the map's +x and +y pixel axes, 2-D, same shape
        (memory-mapped views when read from paths; NaNs kept).
    wcs : `~astropy.wcs.WCS`
        Celestial WCS of the maps.
    header : `~astropy.io.fits.Header`
        Header of the x map (of the cube for layout (c)).
    units : {"arcsec", "pixel"}
        Units of the values.
    source : str
        Where the maps came from, e.g. ``"model.fits[1], model.fits[2]"``.
    name : str or None
        A model name from the file name(s), None for anonymous bytes.
    """

    alpha_x: np.ndarray
    alpha_y: np.ndarray
    wcs: WCS
    header: fits.Header
    units: str
    source: str
    name: str | None = None


def read_cutout(path, hdu=None):
    """Read a FITS image cutout with a celestial WCS.

    Parameters
    ----------
    path : str, path-like, bytes or file-like
        The FITS file, or its content (e.g. an upload).
    hdu : int, str, tuple or None
        The image HDU by position, EXTNAME or (EXTNAME, EXTVER). None takes
        the first 2-D image HDU with a celestial WCS.

    Returns
    -------
    Cutout

    Raises
    ------
    LensviewInputError
        Missing file, not FITS, no 2-D image, no celestial WCS, or no finite
        pixel.
    """
    with _open_fits(path) as (hdul, label):
        if hdu is None:
            index, image, wcs = _first_celestial_image(hdul, label)
        else:
            index, image = _select_hdu(hdul, hdu, label)
            _require_2d(image, label, index, "an image cutout",
                        "Choose a 2-D image HDU, or save one plane of it as a 2-D image.")
            wcs = _celestial_wcs(image, hdul, label, index)
        data = _hdu_data(image, label, index)
        _require_finite(data, f"The image in {_where(label, index)}")
        header = image.header.copy()
        zero_point = zero_point_from_header(header)
        if zero_point is None and index != 0:
            zero_point = zero_point_from_header(hdul[0].header)
    wcs.array_shape = data.shape
    return Cutout(data=data, wcs=wcs, header=header, path=_path_text(path),
                  hdu_index=index, zero_point=zero_point)


def read_deflection(x, y=None, *, units="arcsec", hdu_x=None, hdu_y=None):
    """Read the two deflection components of a lens model.

    Parameters
    ----------
    x : str, path-like, bytes or file-like
        The x map, or (with ``y=None``) a file holding both components as
        two image HDUs or as a cube of two planes.
    y : str, path-like, bytes, file-like or None
        The y map, when the components are in two files.
    units : {"arcsec", "pixel"} or None
        Units of the deflection values. None takes them from the BUNIT
        keyword ("arcsec" or "pixel"). A BUNIT that names an angle or pixel
        unit different from ``units`` is an error, since the maps would be
        misread by the pixel scale.
    hdu_x, hdu_y : int, str, tuple or None
        HDUs (position, EXTNAME or (EXTNAME, EXTVER)) of the components, in
        file ``x`` and ``y`` respectively, or both in ``x`` when ``y`` is
        None. ``hdu_x`` alone may name a cube of two planes.

    Returns
    -------
    DeflectionMaps

    Raises
    ------
    LensviewInputError
        Missing file, not FITS, no celestial WCS, wrong dimensionality, x and
        y of different shape or WCS, an all-NaN map, or unknown units.
    """
    deflection_units(units, from_header=True)
    if y is None:
        maps = _read_one_file(x, hdu_x, hdu_y)
    else:
        maps = _read_two_files(x, y, hdu_x, hdu_y)
    (ax, wcs_x, header_x, where_x), (ay, wcs_y, header_y, where_y) = maps
    if ax.shape != ay.shape:
        raise LensviewInputError(
            f"The x map ({where_x}) is {_shape_text(ax.shape)} pixels but the y map "
            f"({where_y}) is {_shape_text(ay.shape)}; give the two components of the "
            "same model, on the same grid."
        )
    _require_same_wcs(wcs_x, wcs_y, ax.shape, where_x, where_y)
    _require_finite(ax, f"The x map ({where_x})")
    _require_finite(ay, f"The y map ({where_y})")
    resolved = _resolve_units(units, [(header_x, where_x), (header_y, where_y)])
    wcs_x.array_shape = ax.shape
    source = where_x if where_x == where_y else f"{where_x}, {where_y}"
    name = _model_name(x, y)
    return DeflectionMaps(alpha_x=ax, alpha_y=ay, wcs=wcs_x, header=header_x,
                          units=resolved, source=source, name=name)


def zero_point_from_header(header):
    """AB zero point (mag) that a FITS header declares, if any.

    Looked for in this order: a keyword in `ZERO_POINT_KEYWORDS` (taken to
    be an AB zero point); PHOTFLAM with PHOTPLAM, ``ZP = -2.5 log10(PHOTFLAM)
    - 5 log10(PHOTPLAM) - 2.408`` (the space-telescope relation, from memory;
    the constant is computed here from the AB definition of Oke & Gunn
    1983); a BUNIT of flux density per pixel (e.g. ``nJy``), or of surface
    brightness (e.g. ``MJy/sr``) with the pixel area in PIXAR_SR or PIXAR_A2.

    Parameters
    ----------
    header : `~astropy.io.fits.Header` or mapping

    Returns
    -------
    float or None
        ``m_AB = zero_point - 2.5 log10(pixel value sum)``; None if the
        header holds none of the above.
    """
    for key in ZERO_POINT_KEYWORDS:
        value = _finite_number(header.get(key))
        if value is not None:
            return value
    photflam = _finite_number(header.get("PHOTFLAM"))
    photplam = _finite_number(header.get("PHOTPLAM"))
    if photflam is not None and photplam is not None and photflam > 0 and photplam > 0:
        return -2.5 * math.log10(photflam) - 5.0 * math.log10(photplam) + _AB_PHOTFLAM_CONSTANT
    return _zero_point_from_bunit(header)


# ---------------------------------------------------------------------------- opening


@contextmanager
def _open_fits(source):
    """Open a path, bytes or file-like as an HDU list; yield it with a label."""
    label = _label(source)
    if isinstance(source, (bytes, bytearray, memoryview)):
        target, memmap = io.BytesIO(bytes(source)), False
    elif isinstance(source, (str, os.PathLike)):
        # memmap=None maps the file like True, but lets astropy fall back to
        # reading scaled (BSCALE/BZERO/BLANK) data, which True refuses.
        target, memmap = os.fspath(source), None
        if not os.path.exists(target):
            hint = "" if os.path.isabs(target) else f" (relative paths start at {os.getcwd()})"
            raise LensviewInputError(f"There is no file {label}; check the path{hint}.")
        if os.path.isdir(target):
            raise LensviewInputError(
                f"{label} is a directory; give the FITS file inside it."
            )
    elif hasattr(source, "read"):
        # astropy closes the file object it reads; read the caller's upload
        # through a buffer of its own (getvalue() shares memory, no copy).
        if hasattr(source, "getvalue"):
            content = source.getvalue()
        else:
            if hasattr(source, "seek"):
                source.seek(0)
            content = source.read()
        if not isinstance(content, (bytes, bytearray)):
            raise LensviewInputError(
                f"{label} was opened as text; open the FITS file in binary mode ('rb')."
            )
        target, memmap = io.BytesIO(content), False
    else:
        raise LensviewInputError(
            f"Cannot read a FITS file from {type(source).__name__}; give a path, the "
            "file's bytes or an open binary file."
        )
    from .fits_structure import check_fits_structure

    if isinstance(target, io.BytesIO):
        view = target.getbuffer()
        check_fits_structure(lambda offset, n: bytes(view[offset:offset + n]), len(view), label)
        del view  # a live buffer view would keep the BytesIO from being read
    else:
        with open(target, "rb") as handle:
            def read_at(offset, n):
                handle.seek(offset)
                return handle.read(n)

            check_fits_structure(read_at, os.path.getsize(target), label)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", AstropyUserWarning)
            hdul = fits.open(target, memmap=memmap, lazy_load_hdus=False)
    except (OSError, ValueError, TypeError, EOFError, IndexError, KeyError, OverflowError,
            MemoryError) as error:
        raise _not_fits(label, error) from None
    try:
        yield hdul, label
    finally:
        hdul.close()


def _not_fits(label, error):
    # astropy's hint about its own open() options means nothing to a user.
    reason = str(error).split(" If this is really a FITS file")[0]
    return LensviewInputError(
        f"{_start(label)} is not a readable FITS file ({reason}). Give a FITS image "
        "(.fits, .fits.gz); if it is one, it may be truncated or corrupt; "
        "download or write it again."
    )


def _label(source):
    return _path_text(source) or _ANONYMOUS


def _path_text(source):
    if isinstance(source, (str, os.PathLike)):
        return os.fspath(source)
    name = getattr(source, "name", None)
    return name if isinstance(name, str) and name else None


def _where(label, index):
    return f"HDU {index} of {label}" if label == _ANONYMOUS else f"{label}[{index}]"


def _start(label):
    """The label at the start of a sentence."""
    return "The uploaded data" if label == _ANONYMOUS else label


def _last_line(error):
    lines = [line.strip() for line in str(error).splitlines() if line.strip()]
    return lines[-1] if lines else type(error).__name__


# ---------------------------------------------------------------------------- HDUs


def _image_hdus(hdul):
    """(index, hdu) of the image HDUs that hold data."""
    return [(i, h) for i, h in enumerate(hdul)
            if isinstance(h, (fits.PrimaryHDU, fits.ImageHDU)) and h.shape]


def _inventory(hdul):
    parts = []
    for i, h in enumerate(hdul):
        kind = "image" if isinstance(h, (fits.PrimaryHDU, fits.ImageHDU)) else "table"
        shape = _shape_text(h.shape) if kind == "image" and h.shape else "no data"
        parts.append(f"{i} {h.name or '(unnamed)'} ({kind}, {shape})")
    return "; ".join(parts)


def _shape_text(shape):
    # FITS order (NAXIS1 x NAXIS2 ...) reads as width x height.
    return " x ".join(str(n) for n in reversed(shape))


def _select_hdu(hdul, spec, label):
    try:
        index = hdul.index_of(spec)
        hdu = hdul[index]
    except (KeyError, IndexError, TypeError, ValueError):
        raise LensviewInputError(
            f"{_start(label)} has no HDU {spec!r}. It holds: {_inventory(hdul)}. Give one of "
            "these by position or name."
        ) from None
    if not isinstance(hdu, (fits.PrimaryHDU, fits.ImageHDU)) or not hdu.shape:
        raise LensviewInputError(
            f"HDU {spec!r} of {label} holds no image data. It holds: "
            f"{_inventory(hdul)}. Choose an image HDU."
        )
    return index, hdu


def _require_2d(hdu, label, index, what, hint):
    if len(hdu.shape) != 2:
        raise LensviewInputError(
            f"{_start(_where(label, index))} is {len(hdu.shape)}-D "
            f"({_shape_text(hdu.shape)}); {what} must be 2-D. {hint}"
        )


def _hdu_data(hdu, label, index):
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", AstropyUserWarning)
            return hdu.data
    except (OSError, ValueError, TypeError, EOFError, KeyError, IndexError, OverflowError,
            MemoryError) as error:
        raise _not_fits(_where(label, index), error) from None


def _first_celestial_image(hdul, label):
    images = _image_hdus(hdul)
    if not images:
        raise LensviewInputError(
            f"{_start(label)} holds no image data ({_inventory(hdul)}); give a FITS file "
            "with a 2-D image."
        )
    planes = [(i, h) for i, h in images if len(h.shape) == 2]
    if not planes:
        raise LensviewInputError(
            f"{_start(label)} holds no 2-D image ({_inventory(hdul)}); a cutout must "
            "be a 2-D image. Save one plane of it as a 2-D image."
        )
    problems = []
    for index, hdu in planes:
        try:
            return index, hdu, _celestial_wcs(hdu, hdul, label, index)
        except LensviewInputError as error:
            problems.append(str(error))
    if len(problems) == 1:
        raise LensviewInputError(problems[0])
    raise LensviewInputError(
        f"None of the 2-D images in {label} has a celestial WCS: " + " ".join(problems)
    )


# ---------------------------------------------------------------------------- WCS


def _celestial_wcs(hdu, hdul, label, index):
    """The celestial WCS of an image or cube HDU, on its first two axes."""
    where = _where(label, index)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FITSFixedWarning)
            wcs = WCS(hdu.header, fobj=hdul)
    except Exception as error:  # astropy.wcs raises many types for bad keywords
        raise LensviewInputError(
            f"The WCS of {where} cannot be read ({_last_line(error)}); fix its WCS keywords "
            "(CTYPE, CRVAL, CRPIX, CD or PC/CDELT)."
        ) from None
    ctypes = [c or "''" for c in wcs.wcs.ctype] or ["none"]
    if not wcs.has_celestial:
        raise LensviewInputError(
            f"{_start(where)} has no celestial WCS (CTYPE: {', '.join(ctypes)}); lensview "
            "needs RA/Dec axes such as RA---TAN / DEC--TAN. Use the file written "
            "with the sky coordinates of the map."
        )
    if sorted((wcs.wcs.lng, wcs.wcs.lat)) != [0, 1]:
        raise LensviewInputError(
            f"The celestial axes of {where} are not its first two axes (CTYPE: "
            f"{', '.join(ctypes)}); put RA/Dec on the image axes 1 and 2."
        )
    return wcs if wcs.naxis == 2 else wcs.celestial


def _require_same_wcs(wcs_x, wcs_y, shape, where_x, where_y):
    ny, nx = shape
    px = np.array([0.0, nx - 1, 0.0, nx - 1, (nx - 1) / 2])
    py = np.array([0.0, 0.0, ny - 1, ny - 1, (ny - 1) / 2])
    try:
        bx, by = wcs_y.world_to_pixel(wcs_x.pixel_to_world(px, py))
        offset = float(np.max(np.hypot(np.asarray(bx) - px, np.asarray(by) - py)))
    except Exception:  # a WCS that cannot invert the other's positions differs from it
        offset = math.inf
    if not offset <= WCS_TOLERANCE_PIXELS:
        raise LensviewInputError(
            f"The x map ({where_x}) and the y map ({where_y}) have different WCS: "
            f"their grids disagree by up to {offset:.3g} pixels. Give the two "
            "components of the same model, written on the same grid."
        )


# ---------------------------------------------------------------------------- deflection layouts


def _read_two_files(x, y, hdu_x, hdu_y):
    return [_read_component(source, spec, role)
            for source, spec, role in ((x, hdu_x, "x"), (y, hdu_y, "y"))]


def _read_component(source, spec, role):
    with _open_fits(source) as (hdul, label):
        if spec is None:
            images = _image_hdus(hdul)
            if not images:
                raise LensviewInputError(
                    f"The {role} map file {label} holds no image data "
                    f"({_inventory(hdul)}); give a FITS file with a 2-D map."
                )
            index, hdu = images[0]
        else:
            index, hdu = _select_hdu(hdul, spec, label)
        if len(hdu.shape) != 2:
            raise LensviewInputError(
                f"The {role} map {_where(label, index)} is {len(hdu.shape)}-D "
                f"({_shape_text(hdu.shape)}); with two files each must hold one 2-D "
                "map. For a cube of both components give it alone, without y."
            )
        return _component(hdul, hdu, label, index)


def _component(hdul, hdu, label, index):
    wcs = _celestial_wcs(hdu, hdul, label, index)
    data = _hdu_data(hdu, label, index)
    return data, wcs, hdu.header.copy(), _where(label, index)


def _read_one_file(source, hdu_x, hdu_y):
    with _open_fits(source) as (hdul, label):
        if hdu_x is None and hdu_y is None:
            return _auto_layout(hdul, label)
        if hdu_x is not None and hdu_y is None:
            index, hdu = _select_hdu(hdul, hdu_x, label)
            if len(hdu.shape) == 3:
                return _cube(hdul, hdu, label, index)
            raise LensviewInputError(
                f"hdu_x={hdu_x!r} selects {_where(label, index)} "
                f"({len(hdu.shape)}-D); in one file give both hdu_x and hdu_y, "
                "or hdu_x alone for a cube of two planes."
            )
        if hdu_x is None:
            raise LensviewInputError(
                f"hdu_y={hdu_y!r} was given without hdu_x; give both, or neither to "
                f"let lensview find the components in {label}."
            )
        pair = []
        for spec, role in ((hdu_x, "x"), (hdu_y, "y")):
            index, hdu = _select_hdu(hdul, spec, label)
            _require_2d(hdu, label, index, f"the {role} map",
                        "Choose 2-D image HDUs, or give a cube of two planes as hdu_x alone.")
            pair.append(_component(hdul, hdu, label, index))
        return pair


def _auto_layout(hdul, label):
    images = _image_hdus(hdul)
    planes = [(i, h) for i, h in images if len(h.shape) == 2]
    cubes = [(i, h) for i, h in images if len(h.shape) == 3]
    if len(planes) >= 2:
        (ix, hx), (iy, hy) = _pick_components(planes)
        return [_component(hdul, hx, label, ix), _component(hdul, hy, label, iy)]
    if cubes:
        index, hdu = cubes[0]
        return _cube(hdul, hdu, label, index)
    if len(planes) == 1:
        raise LensviewInputError(
            f"{_start(label)} holds a single 2-D map ({_inventory(hdul)}); a deflection model "
            "needs two components. Give the y map as a second file, or a file with "
            "two image HDUs or a cube of two planes; if the map is a convergence or a "
            "potential, say so (header keyword LENSMAP, kind= of load_model, --map-kind, or "
            "the page's 'Map holds')."
        )
    found = _inventory(hdul) if images else "no image data"
    raise LensviewInputError(
        f"{_start(label)} holds no 2-D map or cube of two planes ({found}); a deflection "
        "model is two 2-D maps (x and y) or a 3-D cube of two planes."
    )


def _pick_components(planes):
    """x and y HDUs: by name if the names say, else the first two in order."""
    def key(hdu):
        return re.sub(r"[^A-Z0-9]", "", hdu.name.upper())

    named_x = [p for p in planes if key(p[1]) in _X_NAMES]
    named_y = [p for p in planes if key(p[1]) in _Y_NAMES]
    if len(named_x) == 1 and len(named_y) == 1:
        return named_x[0], named_y[0]
    first, second = planes[:2]
    if key(first[1]) in _Y_NAMES or key(second[1]) in _X_NAMES:
        return second, first
    return first, second


def _cube(hdul, hdu, label, index):
    where = _where(label, index)
    planes = hdu.shape[0]
    if planes != 2:
        raise LensviewInputError(
            f"The cube {where} has {planes} planes ({_shape_text(hdu.shape)}); a "
            "deflection cube needs exactly two, plane 1 = x and plane 2 = y "
            "(NAXIS3 = 2)."
        )
    wcs = _celestial_wcs(hdu, hdul, label, index)
    data = _hdu_data(hdu, label, index)
    header = hdu.header.copy()
    return [(data[0], wcs, header, where), (data[1], wcs.deepcopy(), header, where)]


# ---------------------------------------------------------------------------- values and units


def _require_finite(data, what):
    if not np.issubdtype(data.dtype, np.floating):
        return
    # Row blocks keep the boolean temporaries small on big memory-mapped maps.
    for start in range(0, data.shape[0], _ROW_BLOCK):
        if np.isfinite(data[start:start + _ROW_BLOCK]).any():
            return
    raise LensviewInputError(
        f"{what} holds no finite values (all NaN or infinite); check that the right "
        "file and HDU were given."
    )


def _resolve_units(units, headers):
    declared = {}
    for header, where in headers:
        raw = header.get("BUNIT")
        declared[where] = (raw, _bunit_meaning(raw))
    if units is None:
        meanings = {meaning for _, meaning in declared.values()}
        if len(meanings) == 1 and meanings <= set(DEFLECTION_UNITS):
            return meanings.pop()
        found = "; ".join(f"{where}: BUNIT = {raw!r}" for where, (raw, _) in declared.items())
        raise LensviewInputError(
            f"units=None asks for the units in the header, but they are not a single "
            f"'arcsec' or 'pixel' ({found}). Pass units='arcsec' or units='pixel'."
        )
    for where, (raw, meaning) in declared.items():
        if meaning is not None and meaning != units:
            raise LensviewInputError(
                f"{where} declares BUNIT = {raw!r} but units={units!r} was given; "
                f"pass the units the map is in (units=None follows the header)."
            )
    return units


def _bunit_meaning(raw):
    """'arcsec', 'pixel', 'other' (another angle) or None (absent or not an angle)."""
    if not isinstance(raw, str) or not raw.strip():
        return None
    word = raw.strip().lower()
    if word in _BUNIT_WORDS:
        return _BUNIT_WORDS[word]
    unit = u.Unit(raw.strip(), format="fits", parse_strict="silent")
    if isinstance(unit, u.UnrecognizedUnit):
        return None
    if unit == u.arcsec:
        return "arcsec"
    if unit == u.pix:
        return "pixel"
    return "other" if unit.is_equivalent(u.rad) else None


def _finite_number(value):
    if isinstance(value, (bool, np.bool_)) or value is None:
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


def _zero_point_from_bunit(header):
    raw = header.get("BUNIT")
    if not isinstance(raw, str) or not raw.strip():
        return None
    unit = u.Unit(raw.strip(), format="fits", parse_strict="silent")
    if isinstance(unit, u.UnrecognizedUnit):
        return None
    if unit.is_equivalent(u.Jy):
        per_pixel = unit.to(u.Jy)
    elif unit.is_equivalent(u.Jy / u.sr):
        area = _finite_number(header.get("PIXAR_SR"))
        if area is None:
            arcsec2 = _finite_number(header.get("PIXAR_A2"))
            area = None if arcsec2 is None else (arcsec2 * u.arcsec**2).to_value(u.sr)
        if area is None or area <= 0:
            return None
        per_pixel = unit.to(u.Jy / u.sr) * area
    else:
        return None
    # m_AB = -2.5 log10(f_nu / 3631 Jy) (Oke & Gunn 1983).
    return -2.5 * math.log10(per_pixel / 3631.0)


def _model_name(x, y):
    def stem(source):
        path = _path_text(source)
        if path is None:
            return None
        name = Path(path).name
        return re.sub(r"(\.(fits|fit|fts))?(\.(gz|fz|bz2))?$", "", name, flags=re.IGNORECASE)

    first = stem(x)
    if y is None or first is None:
        return first
    second = stem(y) or ""
    common = os.path.commonprefix([first, second]).rstrip("_-. ")
    return common or first
