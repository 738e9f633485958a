"""Region lists of curves and knots (writing, and reading the knots back).

``write_regions`` writes curves (one polygon per curve) and knots (points) in
one of three forms chosen by the file suffix:

- ``.fits``: a FITS region table written with the ``regions`` library, in
  the pixel frame of the given WCS (the cutout's), whose header carries a
  copy of that WCS. X and Y are 0-based pixel positions, the convention
  of ``regions.PixCoord`` and ``astropy.wcs`` and the one the ``regions``
  library reads back; the header keyword ``LVORIGIN = 0`` records it (add
  1 for 1-based FITS pixel numbers). A second table, ``REGION_TAGS``, has
  one row per region ``COMPONENT`` with its kind, plane, model, source
  redshift, closure, vertex count, label and pair id, because the region
  table itself admits only its standard columns.

  A FITS region table knows no open polyline (and the ``regions`` library
  writes no line regions to it), so an open curve v0 ... v(n-1) is written
  as the "there-and-back" polygon v0 ... v(n-1), v(n-2) ... v1: its
  outline is exactly the open curve, with no invented closing edge, and it
  encloses no area. ``NVERTEX`` and ``CLOSED`` in ``REGION_TAGS`` give the
  original polyline as the first ``NVERTEX`` vertices. Polygons shorter
  than the table's vertex columns are padded by repeating their last
  vertex (zero-length edges), because the zero padding of the ``regions``
  writer would read back as extra vertices at pixel (0, 0).
- ``.ecsv`` and ``.vot``: one row per curve vertex or knot, with sky
  coordinates in degrees (see `vertex_table`). Knot rows have kind
  ``"candidate"``.
"""

import math
from pathlib import Path

import numpy as np
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.table import Table
from astropy.wcs import WCS

from ..checks import celestial_wcs
from ..errors import LensviewInputError
from .files import (FITS_SUFFIXES, TABLE_FORMATS, VOTABLE_SUFFIXES, atomic_write, first_line,
                    lensview_version)
from .knots import NO_PAIR, as_candidate_table, candidate_result, label_text
from .tables import _export_meta, write_table_file

__all__ = ["write_regions", "vertex_table", "curve_list"]

_KINDS = ("tangential", "radial")
TAGS_EXTNAME = "REGION_TAGS"

def write_regions(path, curves, candidates=None, *, wcs, overwrite=True):
    """Write curves and candidates as a region list.

    Parameters
    ----------
    path : str or path-like
        Output file; the suffix chooses the form: ``.fits`` (FITS region
        table in the pixels of ``wcs``, with the WCS in the header), ``.ecsv``
        or ``.vot`` (one row per vertex or point, see `vertex_table`). See
        the module notes for how open curves are written to FITS.
    curves : sequence of `~lensview.lens.curves.Curve`
        Critical curves and/or caustics (``plane="source"``).
    candidates : `~astropy.coordinates.SkyCoord` or `~astropy.table.Table`, optional
        Positions, or a table with ``ra``, ``dec``, ``label`` and optional
        ``pair_id``.
    wcs : `~astropy.wcs.WCS`
        The cutout's celestial WCS: the pixel frame of the FITS table and of
        the ``x``, ``y`` columns of the vertex tables (None is allowed for
        ``.ecsv``/``.vot``, which then carry sky coordinates only).
    overwrite : bool
        Replace an existing file.

    Returns
    -------
    str
        The path written.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in FITS_SUFFIXES + (".ecsv",) + VOTABLE_SUFFIXES:
        raise LensviewInputError(
            f"Cannot tell the region format of {path.name!r} from its suffix; use .fits (FITS "
            "region table), .ecsv or .vot (vertex tables with sky coordinates).")
    curves = curve_list(curves)
    candidates = as_candidate_table(candidates) if candidates is not None else None
    if suffix in FITS_SUFFIXES:
        if wcs is None:
            raise LensviewInputError(
                "A FITS region table is written in pixels; pass wcs= (the cutout's WCS).")
        _write_region_fits(path, curves, candidates, celestial_wcs(wcs, "The region list"), overwrite)
    else:
        table = vertex_table(curves, candidates, wcs=None if wcs is None else celestial_wcs(wcs, "The region list"))
        table.meta = _export_meta(table.meta, None)
        write_table_file(table, path, TABLE_FORMATS[suffix], overwrite)
    return str(path)


def vertex_table(curves, candidates=None, *, wcs=None):
    """One row per curve vertex and per candidate, with sky coordinates.

    Parameters
    ----------
    curves : sequence of `~lensview.lens.curves.Curve`
    candidates : `~astropy.coordinates.SkyCoord` or `~astropy.table.Table`, optional
    wcs : `~astropy.wcs.WCS`, optional
        Adds 0-based pixel columns ``x``, ``y`` in this frame.

    Returns
    -------
    `~astropy.table.Table`
        Columns ``kind`` ("tangential", "radial" or "candidate"), ``plane``
        ("image", or "source" for caustics), ``curve_id`` (position in
        ``curves``; -1 for candidates), ``vertex`` (index along the curve, or
        the candidate's position in the list), ``closed``, ``cusp``,
        ``model``, ``z_source`` (NaN for candidates), ``ra``, ``dec`` (deg),
        ``label``, ``pair_id`` (-1: no pair) and, with ``wcs``, ``x``, ``y``.
    """
    curves = curve_list(curves)
    candidates = as_candidate_table(candidates) if candidates is not None else None
    columns = {name: [] for name in ("kind", "plane", "curve_id", "vertex", "closed", "cusp",
                                     "model", "z_source", "ra", "dec", "label", "pair_id")}

    def extend(n, **values):
        for name, value in values.items():
            columns[name].append(np.broadcast_to(np.asarray(value), (n,)))

    for curve_id, curve in enumerate(curves):
        n = len(curve.sky)
        cusp = np.zeros(n, bool)
        cusp[np.asarray(curve.cusps, int)] = True
        extend(n, kind=curve.kind, plane=curve.plane, curve_id=curve_id, vertex=np.arange(n),
               closed=bool(curve.closed), cusp=cusp, model=str(curve.model),
               z_source=float(curve.z_source), ra=curve.sky.icrs.ra.deg, dec=curve.sky.icrs.dec.deg,
               label="", pair_id=NO_PAIR)
    if candidates is not None and len(candidates):
        n = len(candidates)
        extend(n, kind="candidate", plane="image", curve_id=-1, vertex=np.arange(n), closed=False,
               cusp=False, model="", z_source=np.nan, ra=candidates["ra"].quantity.to_value(u.deg),
               dec=candidates["dec"].quantity.to_value(u.deg), label=np.asarray(candidates["label"]),
               pair_id=np.asarray(candidates["pair_id"]))
    dtypes = {"kind": str, "plane": str, "curve_id": np.int64, "vertex": np.int64, "closed": bool,
              "cusp": bool, "model": str, "z_source": float, "ra": float, "dec": float,
              "label": str, "pair_id": np.int64}
    table = Table()
    for name, parts in columns.items():
        table[name] = np.concatenate(parts).astype(dtypes[name]) if parts \
            else np.zeros(0, dtype="U1" if dtypes[name] is str else dtypes[name])
    table["ra"].unit = u.deg
    table["dec"].unit = u.deg
    table.meta["content"] = "lensview region list: curve vertices and candidate points"
    if wcs is not None:
        x, y = wcs.world_to_pixel(SkyCoord(table["ra"], table["dec"], frame="icrs"))
        table["x"] = np.asarray(x, float) * u.pix
        table["y"] = np.asarray(y, float) * u.pix
        table.meta["pixel_origin"] = 0
        table.meta["wcs"] = {key: value for key, value in wcs.to_header(relax=True).items()}
    return table


def curve_list(curves):
    from ..lens.curves import Curve

    curves = list(curves) if curves is not None else []
    for k, curve in enumerate(curves):
        if not isinstance(curve, Curve):
            raise LensviewInputError(
                f"Item {k} of curves is a {type(curve).__name__}, not a Curve; pass the lists "
                "returned by DeflectionField.critical_curves or .caustics.")
    return curves




def _write_region_fits(path, curves, candidates, wcs, overwrite):
    from astropy.io import fits
    from regions import PixCoord, PointPixelRegion, PolygonPixelRegion, Regions

    outlines = [_polygon_outline(curve.to_pixels(wcs), curve.closed) for curve in curves]
    width = max([len(xy) for xy in outlines], default=1)
    regions, tags = [], []
    for curve_id, (curve, xy) in enumerate(zip(curves, outlines)):
        padded = np.vstack([xy, np.repeat(xy[-1:], width - len(xy), axis=0)])
        region = PolygonPixelRegion(PixCoord(padded[:, 0], padded[:, 1]))
        region.meta["component"] = len(regions) + 1
        regions.append(region)
        tags.append((region.meta["component"], curve.kind, curve.plane, str(curve.model),
                     float(curve.z_source), bool(curve.closed), len(curve.sky), curve_id, "", NO_PAIR))
    if candidates is not None and len(candidates):
        x, y = wcs.world_to_pixel(SkyCoord(candidates["ra"], candidates["dec"], frame="icrs"))
        for k in range(len(candidates)):
            region = PointPixelRegion(PixCoord(float(x[k]), float(y[k])))
            region.meta["component"] = len(regions) + 1
            regions.append(region)
            tags.append((region.meta["component"], "candidate", "image", "", math.nan, False, 1, -1,
                         str(candidates["label"][k]), int(candidates["pair_id"][k])))
    if not regions:
        raise LensviewInputError("There is nothing to write: give at least one curve or candidate.")

    header = fits.Header()
    for key, value, comment in (
            ("EXTNAME", "REGION", ""), ("HDUNAME", "REGION", ""), ("HDUCLASS", "ASC", ""),
            ("HDUCLAS1", "REGION", ""), ("HDUCLAS2", "STANDARD", ""), ("HDUVERS", "1.2.0", ""),
            ("HDUDOC", "ASC-FITS-REGION-1.2: Rots, McDowell: FITS REGION Binary Table Design", ""),
            ("CONTENT", "REGION", ""), ("ORIGIN", f"lensview {lensview_version()}", "with astropy regions"),
            ("LVORIGIN", 0, "X,Y 0-based; add 1 for FITS pixel numbers")):
        header[key] = (value, comment)
    header.update(wcs.to_header(relax=True))

    tag_table = Table(rows=tags, names=("COMPONENT", "KIND", "PLANE", "MODEL", "Z_SOURCE", "CLOSED",
                                        "NVERTEX", "CURVE_ID", "LABEL", "PAIR_ID"),
                      dtype=(np.int64, "U10", "U6", str, float, bool, np.int64, np.int64, str, np.int64))
    tag_hdu = fits.table_to_hdu(tag_table)
    tag_hdu.header["EXTNAME"] = TAGS_EXTNAME
    tag_hdu.header["COMMENT"] = "One row per COMPONENT of the REGION table; NVERTEX vertices of " \
                                "each polygon are the curve, the rest outline an open curve or pad."

    def write(target):
        Regions(regions).write(target, format="fits", header=header, overwrite=True)
        with fits.open(target, mode="append") as hdul:
            hdul.append(tag_hdu)

    atomic_write(path, write, overwrite)


def _polygon_outline(xy, closed):
    """Vertices of a polygon whose outline is the curve (there and back if open)."""
    if closed or len(xy) < 3:
        return xy
    return np.vstack([xy, xy[-2:0:-1]])


def candidates_from_region_hdu(label, hdul, wcs):
    import warnings

    from astropy.table import QTable
    from regions import PointPixelRegion, Regions

    hdu = hdul["REGION"]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            regions = Regions.parse(QTable.read(hdu), format="fits")
    except Exception as error:  # the regions parser raises its own error types
        raise LensviewInputError(
            f"{label!r}: the REGION table could not be parsed ({first_line(error)}).") from error
    tags = {}
    if TAGS_EXTNAME in [h.name for h in hdul]:
        for row in Table.read(hdul[TAGS_EXTNAME]):
            tags[int(row["COMPONENT"])] = row
    points = []
    for region in regions:
        component = region.meta.get("component")
        tag = tags.get(int(component)) if component is not None else None
        if tag is not None and label_text(tag["KIND"]) != "candidate":
            continue
        if isinstance(region, PointPixelRegion):
            points.append((region.center.x, region.center.y, tag))
    if not points:
        raise LensviewInputError(
            f"{label!r} holds no candidate points (only curves or other shapes); mark candidates "
            "and export them, or choose another file.")
    frame = region_wcs(hdu.header) or (None if wcs is None else celestial_wcs(wcs, "The region list"))
    if frame is None:
        raise LensviewInputError(
            f"{label!r} carries no WCS for its pixel positions; pass the cutout's WCS (wcs=...).")
    origin = float(hdu.header.get("LVORIGIN", 0))
    x = np.array([p[0] for p in points]) - origin
    y = np.array([p[1] for p in points]) - origin
    sky = frame.pixel_to_world(x, y)
    labels = [label_text(p[2]["LABEL"]) if p[2] is not None else "" for p in points]
    pairs = [int(p[2]["PAIR_ID"]) if p[2] is not None else NO_PAIR for p in points]
    return candidate_result(sky.icrs.ra.deg, sky.icrs.dec.deg, labels, pairs)


def region_wcs(header):
    import warnings

    if "CTYPE1" not in header:
        return None
    image_header = header.copy()
    for key in ("NAXIS1", "NAXIS2"):
        image_header.remove(key, ignore_missing=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        wcs = WCS(image_header)
    return wcs.celestial if wcs.has_celestial else None


