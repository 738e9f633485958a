import io
import math

import numpy as np
import pytest
import astropy.units as u
from astropy.coordinates import SkyCoord
from astropy.io import fits
from astropy.wcs import WCS

from lensview.errors import LensviewInputError
from lensview.io.fits import (
    Cutout,
    DeflectionMaps,
    read_cutout,
    read_deflection,
    zero_point_from_header,
)

NY, NX = 24, 32
PIXEL_DEG = 0.05 / 3600
ROTATION_DEG = 27.0


def sky_wcs(rotation_deg=ROTATION_DEG, crval=(150.1, 2.2), naxis=2):
    """A TAN WCS with a rotated PC matrix, RA increasing to the left."""
    wcs = WCS(naxis=naxis)
    c, s = math.cos(math.radians(rotation_deg)), math.sin(math.radians(rotation_deg))
    pc = np.eye(naxis)
    pc[:2, :2] = [[c, -s], [s, c]]
    wcs.wcs.pc = pc
    wcs.wcs.cdelt = [-PIXEL_DEG, PIXEL_DEG] + [1.0] * (naxis - 2)
    wcs.wcs.crpix = [NX / 2 + 0.3, NY / 2 - 0.7] + [1.0] * (naxis - 2)
    wcs.wcs.crval = list(crval) + [0.0] * (naxis - 2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"] + [""] * (naxis - 2)
    return wcs


def maps(dtype=np.float32):
    yy, xx = np.mgrid[0:NY, 0:NX]
    ax = (0.01 * (xx - NX / 2) + 0.001 * yy).astype(dtype)
    ay = (0.02 * (yy - NY / 2) - 0.002 * xx).astype(dtype)
    ax[3, 4] = np.nan  # a hole in the model, allowed
    return ax, ay


def image_hdu(data, wcs=None, name=None, primary=False, **cards):
    header = (wcs or sky_wcs()).to_header()
    for key, value in cards.items():
        header[key] = value
    cls = fits.PrimaryHDU if primary else fits.ImageHDU
    hdu = cls(data, header=header)
    if name:
        hdu.name = name
    return hdu


def write(path, *hdus):
    hdus = list(hdus)
    if not isinstance(hdus[0], fits.PrimaryHDU):
        hdus.insert(0, fits.PrimaryHDU())
    fits.HDUList(hdus).writeto(path)
    return path


@pytest.fixture
def layouts(tmp_path):
    """The same model written in each supported layout."""
    ax, ay = maps()
    two_x = write(tmp_path / "model_x.fits", image_hdu(ax, primary=True))
    two_y = write(tmp_path / "model_y.fits", image_hdu(ay, primary=True))
    hdus = write(tmp_path / "hdus.fits", image_hdu(ax), image_hdu(ay))
    named = write(tmp_path / "named.fits",
                  image_hdu(ay, name="ALPHA_Y"), image_hdu(ax, name="ALPHA_X"))
    swapped = write(tmp_path / "swapped.fits",
                    image_hdu(ay, name="DEFY"), image_hdu(ax, name="DEFX"))
    cube = write(tmp_path / "cube.fits",
                 image_hdu(np.stack([ax, ay]), wcs=sky_wcs(naxis=3), primary=True))
    return {"two files": (two_x, two_y), "two HDUs": (hdus, None),
            "named HDUs in reverse": (named, None), "DEFX/DEFY reversed": (swapped, None),
            "cube": (cube, None)}, (ax, ay)


def test_every_layout_gives_the_same_maps(layouts):
    files, (ax, ay) = layouts
    reference = sky_wcs()
    pixels = np.array([[0, 0], [NX - 1, 0], [0, NY - 1], [NX - 1, NY - 1], [7.5, 3.25]], float)
    expected_sky = reference.pixel_to_world(pixels[:, 0], pixels[:, 1])
    for layout, (x, y) in files.items():
        result = read_deflection(x, y)
        assert isinstance(result, DeflectionMaps), layout
        # Values bit-identical, NaN hole kept as NaN.
        np.testing.assert_array_equal(result.alpha_x, ax, err_msg=layout)
        np.testing.assert_array_equal(result.alpha_y, ay, err_msg=layout)
        assert np.isnan(result.alpha_x[3, 4]), layout
        assert result.units == "arcsec"
        assert result.wcs.naxis == 2 and result.wcs.has_celestial
        # The rotated grid is preserved: same sky positions at the same pixels
        # (FITS WCS Paper II, Calabretta & Greisen 2002, through astropy.wcs).
        sky = result.wcs.pixel_to_world(pixels[:, 0], pixels[:, 1])
        assert np.max(sky.separation(expected_sky).to_value(u.arcsec)) < 1e-9, layout


def test_float32_stays_float32_and_is_memory_mapped(layouts):
    files, _ = layouts
    for layout, (x, y) in files.items():
        result = read_deflection(x, y)
        for component in (result.alpha_x, result.alpha_y):
            assert component.dtype.kind == "f" and component.dtype.itemsize == 4, layout
            # Backed by the file mapping, not a copy (astropy memmap=True).
            base = component
            while isinstance(base, np.ndarray) and base.base is not None:
                base = base.base
            assert type(base).__name__ == "mmap", layout


def test_float64_and_scaled_integer_maps(tmp_path):
    ax, ay = maps(np.float64)
    result = read_deflection(write(tmp_path / "d.fits", image_hdu(ax), image_hdu(ay)))
    assert result.alpha_x.dtype.itemsize == 8
    # BSCALE/BZERO data are scaled by astropy (FITS standard 4.0, section 5.3).
    raw = np.arange(NX * NY, dtype=np.int16).reshape(NY, NX)
    hx = image_hdu(raw.copy())
    hy = image_hdu(raw.copy())
    for hdu in (hx, hy):
        hdu.scale("int16", bscale=0.5, bzero=10.0)
        hdu.data = raw.copy()
        hdu.header["BSCALE"], hdu.header["BZERO"] = 0.5, 10.0
    path = tmp_path / "scaled.fits"
    fits.HDUList([fits.PrimaryHDU(), hx, hy]).writeto(path)
    result = read_deflection(path)
    np.testing.assert_allclose(result.alpha_x, 0.5 * raw + 10.0)


def test_source_and_name(layouts):
    files, _ = layouts
    two = read_deflection(*files["two files"])
    assert two.name == "model"
    assert "model_x.fits" in two.source and "model_y.fits" in two.source
    cube = read_deflection(files["cube"][0])
    assert cube.name == "cube" and "cube.fits[0]" in cube.source


def test_bytes_and_file_objects(layouts):
    files, (ax, ay) = layouts
    hdus_path = files["two HDUs"][0]
    content = hdus_path.read_bytes()
    from_bytes = read_deflection(content)
    np.testing.assert_array_equal(from_bytes.alpha_y, ay)
    assert from_bytes.name is None
    buffer = io.BytesIO(content)
    buffer.name = "upload.fits"
    from_buffer = read_deflection(buffer)
    np.testing.assert_array_equal(from_buffer.alpha_x, ax)
    assert from_buffer.name == "upload"
    x_path, y_path = files["two files"]
    mixed = read_deflection(io.BytesIO(x_path.read_bytes()), y_path)
    np.testing.assert_array_equal(mixed.alpha_y, ay)


def test_explicit_hdus(tmp_path):
    ax, ay = maps()
    kappa = np.ones_like(ax)
    path = write(tmp_path / "many.fits", image_hdu(kappa, name="KAPPA"),
                 image_hdu(ay, name="B"), image_hdu(ax, name="A"))
    result = read_deflection(path, hdu_x="A", hdu_y=2)
    np.testing.assert_array_equal(result.alpha_x, ax)
    np.testing.assert_array_equal(result.alpha_y, ay)
    cube = write(tmp_path / "cube_ext.fits", image_hdu(kappa),
                 image_hdu(np.stack([ax, ay]), wcs=sky_wcs(naxis=3), name="DEFL"))
    result = read_deflection(cube, hdu_x="DEFL")
    np.testing.assert_array_equal(result.alpha_y, ay)
    with pytest.raises(LensviewInputError, match="give both hdu_x and hdu_y"):
        read_deflection(path, hdu_x="A")
    with pytest.raises(LensviewInputError, match="without hdu_x"):
        read_deflection(path, hdu_y="A")
    with pytest.raises(LensviewInputError, match="has no HDU 'NOPE'"):
        read_deflection(path, hdu_x="NOPE", hdu_y=2)
    with pytest.raises(LensviewInputError, match="holds no image data"):
        read_deflection(path, hdu_x=0, hdu_y=2)


def test_units(tmp_path):
    ax, ay = maps()
    pix = write(tmp_path / "pix.fits", image_hdu(ax, BUNIT="pixel"), image_hdu(ay, BUNIT="pixel"))
    assert read_deflection(pix, units=None).units == "pixel"
    assert read_deflection(pix, units="pixel").units == "pixel"
    with pytest.raises(LensviewInputError, match="declares BUNIT = 'pixel' but units='arcsec'"):
        read_deflection(pix)
    arcsec = write(tmp_path / "as.fits",
                   image_hdu(ax, BUNIT="arcsec"), image_hdu(ay, BUNIT="arcsec"))
    assert read_deflection(arcsec, units=None).units == "arcsec"
    bare = write(tmp_path / "bare.fits", image_hdu(ax), image_hdu(ay))
    with pytest.raises(LensviewInputError, match="Pass units='arcsec' or units='pixel'"):
        read_deflection(bare, units=None)
    degrees = write(tmp_path / "deg.fits", image_hdu(ax, BUNIT="deg"), image_hdu(ay, BUNIT="deg"))
    with pytest.raises(LensviewInputError, match="BUNIT = 'deg'"):
        read_deflection(degrees)
    # A BUNIT that is no angle says nothing about the units and is ignored.
    odd = write(tmp_path / "odd.fits", image_hdu(ax, BUNIT="whatever"), image_hdu(ay))
    assert read_deflection(odd, units="pixel").units == "pixel"
    for bad in ("degrees", "ARCSEC", "mas", 1.0):
        with pytest.raises(LensviewInputError, match="Unknown deflection units"):
            read_deflection(bare, units=bad)


# ------------------------------------------------------------ bad inputs, one error each


def test_missing_file(tmp_path):
    with pytest.raises(LensviewInputError, match="There is no file .*absent.fits"):
        read_deflection(tmp_path / "absent.fits")
    with pytest.raises(LensviewInputError, match="There is no file"):
        read_cutout(str(tmp_path / "absent.fits"))
    with pytest.raises(LensviewInputError, match="is a directory"):
        read_cutout(tmp_path)
    with pytest.raises(LensviewInputError, match="Cannot read a FITS file from int"):
        read_cutout(42)


@pytest.mark.parametrize("content", [b"", b"ra,dec\n150.1,2.2\n", bytes(range(256)) * 40])
def test_not_fits(tmp_path, content):
    path = tmp_path / "not.fits"
    path.write_bytes(content)
    with pytest.raises(LensviewInputError, match="is not a readable FITS file"):
        read_deflection(path)
    with pytest.raises(LensviewInputError, match="is not a readable FITS file"):
        read_cutout(content)


def test_truncated_fits(tmp_path):
    ax, _ = maps()
    whole = write(tmp_path / "whole.fits", image_hdu(ax, primary=True)).read_bytes()
    path = tmp_path / "cut.fits"
    path.write_bytes(whole[:2880 + 100])
    with pytest.raises(LensviewInputError, match="truncated or corrupt"):
        read_cutout(path)


@pytest.mark.parametrize("ctype", [None, ["LINEAR", "LINEAR"], ["RA---TAN", "FREQ"]])
def test_no_celestial_wcs(tmp_path, ctype):
    ax, ay = maps()
    header = fits.Header()
    if ctype:
        header["CTYPE1"], header["CTYPE2"] = ctype
    hx = fits.ImageHDU(ax, header=header)
    hy = fits.ImageHDU(ay, header=header)
    path = write(tmp_path / "lin.fits", hx, hy)
    # An RA axis without its Dec partner is refused by wcslib itself.
    phrase = "Unmatched celestial axes" if ctype and ctype[1] == "FREQ" else "has no celestial WCS"
    with pytest.raises(LensviewInputError, match=phrase):
        read_deflection(path)
    with pytest.raises(LensviewInputError, match=phrase):
        read_cutout(path)


def test_singular_wcs(tmp_path):
    ax, ay = maps()
    path = write(tmp_path / "flat.fits", image_hdu(ax, CDELT1=0.0), image_hdu(ay, CDELT1=0.0))
    with pytest.raises(LensviewInputError, match="singular"):
        read_deflection(path)


@pytest.mark.parametrize("shape, phrase", [
    ((NX,), "holds no 2-D map or cube"),
    ((2, 1, NY, NX), "holds no 2-D map or cube"),
    ((3, NY, NX), "has 3 planes"),
    ((1, NY, NX), "has 1 planes"),
])
def test_wrong_dimensionality_one_file(tmp_path, shape, phrase):
    data = np.zeros(shape, np.float32)
    header = fits.Header()
    path = write(tmp_path / "dims.fits", fits.PrimaryHDU(data, header=header))
    with pytest.raises(LensviewInputError, match=phrase):
        read_deflection(path)


def test_wrong_dimensionality_two_files_and_cutout(tmp_path):
    ax, ay = maps()
    one_d = write(tmp_path / "line.fits", fits.PrimaryHDU(np.zeros(NX, np.float32)))
    plane = write(tmp_path / "plane.fits", image_hdu(ay, primary=True))
    with pytest.raises(LensviewInputError, match="each must hold one 2-D map"):
        read_deflection(one_d, plane)
    cube = write(tmp_path / "cube4.fits", fits.PrimaryHDU(np.zeros((2, 2, NY, NX), np.float32)))
    with pytest.raises(LensviewInputError, match="holds no 2-D image"):
        read_cutout(cube)
    with pytest.raises(LensviewInputError, match="is 4-D"):
        read_cutout(cube, hdu=0)
    with pytest.raises(LensviewInputError, match="needs two components"):
        read_deflection(plane)


def test_shapes_differ(tmp_path):
    ax, ay = maps()
    x = write(tmp_path / "x.fits", image_hdu(ax, primary=True))
    y = write(tmp_path / "y.fits", image_hdu(ay[:-1], primary=True))
    with pytest.raises(LensviewInputError, match="is 32 x 24 pixels but the y map .* is 32 x 23"):
        read_deflection(x, y)


@pytest.mark.parametrize("change", ["shift", "rotation", "frame"])
def test_wcs_differ(tmp_path, change):
    ax, ay = maps()
    other = sky_wcs()
    if change == "shift":
        other.wcs.crpix = other.wcs.crpix + [0.01, 0.0]  # 0.01 pixel, above the 1e-3 tolerance
    elif change == "rotation":
        other = sky_wcs(rotation_deg=ROTATION_DEG + 1.0)
    else:
        other.wcs.ctype = ["GLON-TAN", "GLAT-TAN"]
    x = write(tmp_path / "x.fits", image_hdu(ax, primary=True))
    y = write(tmp_path / "y.fits", image_hdu(ay, wcs=other, primary=True))
    with pytest.raises(LensviewInputError, match="have different WCS"):
        read_deflection(x, y)


def test_wcs_differing_below_tolerance_is_accepted(tmp_path):
    ax, ay = maps()
    other = sky_wcs()
    other.wcs.crpix = other.wcs.crpix + [1e-5, 0.0]  # rounding-level change, far below 1e-3 pixel
    x = write(tmp_path / "x.fits", image_hdu(ax, primary=True))
    y = write(tmp_path / "y.fits", image_hdu(ay, wcs=other, primary=True))
    assert read_deflection(x, y).alpha_x.shape == (NY, NX)


def test_same_grid_in_another_frame_is_accepted(tmp_path):
    ax, ay = maps()
    # The y map in FK5 J2000 at the ICRS position of the x map's reference point:
    # the grids agree to well below a pixel (astropy coordinates as reference).
    centre = SkyCoord(150.1 * u.deg, 2.2 * u.deg, frame="icrs").fk5
    other = sky_wcs(crval=(centre.ra.deg, centre.dec.deg))
    other.wcs.radesys = "FK5"
    other.wcs.equinox = 2000.0
    x = write(tmp_path / "x.fits", image_hdu(ax, primary=True))
    y = write(tmp_path / "y.fits", image_hdu(ay, wcs=other, primary=True))
    # The FK5-ICRS offset (~20 mas) is absorbed by the transformed reference point;
    # what remains is the frames' relative rotation, far below 1e-3 pixel here.
    result = read_deflection(x, y)
    assert result.alpha_x.shape == (NY, NX)


def test_all_nan_map(tmp_path):
    ax, ay = maps()
    empty = np.full_like(ay, np.nan)
    path = write(tmp_path / "nan.fits", image_hdu(ax), image_hdu(empty))
    with pytest.raises(LensviewInputError, match=r"The y map .* holds no finite values"):
        read_deflection(path)
    with pytest.raises(LensviewInputError, match="holds no finite values"):
        read_cutout(write(tmp_path / "nan_image.fits", image_hdu(empty, primary=True)))


# ------------------------------------------------------------------------ cutouts


def test_cutout_first_celestial_image(tmp_path):
    image = np.random.default_rng(1).normal(size=(NY, NX)).astype(np.float32)
    table = fits.BinTableHDU.from_columns([fits.Column(name="a", format="E", array=[1.0])])
    no_wcs = fits.ImageHDU(np.zeros((NY, NX), np.float32), name="NOWCS")
    path = write(tmp_path / "cut.fits", table, no_wcs, image_hdu(image, name="SCI", PHOTZP=28.9))
    cutout = read_cutout(path)
    assert isinstance(cutout, Cutout)
    assert cutout.hdu_index == 3
    assert cutout.path == str(path)
    assert cutout.zero_point == pytest.approx(28.9)
    assert cutout.data.dtype.itemsize == 4
    np.testing.assert_array_equal(cutout.data, image)
    assert cutout.wcs.array_shape == (NY, NX)
    reference = sky_wcs()
    # Rotated WCS preserved (FITS WCS Paper II through astropy.wcs as reference).
    np.testing.assert_allclose(cutout.wcs.pixel_scale_matrix, reference.pixel_scale_matrix,
                               rtol=1e-12)
    sky = cutout.wcs.pixel_to_world(NX - 1, NY - 1)
    assert sky.separation(reference.pixel_to_world(NX - 1, NY - 1)).to_value(u.arcsec) < 1e-9
    assert read_cutout(path, hdu="SCI").hdu_index == 3
    assert read_cutout(path, hdu=("SCI", 1)).hdu_index == 3
    with pytest.raises(LensviewInputError, match="has no celestial WCS"):
        read_cutout(path, hdu="NOWCS")
    with pytest.raises(LensviewInputError, match="holds no image data"):
        read_cutout(path, hdu=1)
    with pytest.raises(LensviewInputError, match="has no HDU 9"):
        read_cutout(path, hdu=9)


def test_cutout_from_bytes_and_upload(tmp_path):
    image = np.arange(NX * NY, dtype=np.float32).reshape(NY, NX)
    path = write(tmp_path / "c.fits", image_hdu(image, primary=True))
    content = path.read_bytes()
    for source in (content, bytearray(content), io.BytesIO(content)):
        cutout = read_cutout(source)
        np.testing.assert_array_equal(cutout.data, image)
        assert cutout.path is None
    upload = io.BytesIO(content)
    upload.name = "field.fits"
    upload.read(100)  # a half-read upload is rewound
    assert read_cutout(upload).path == "field.fits"
    assert not upload.closed
    with open(path, "rb") as handle:
        np.testing.assert_array_equal(read_cutout(handle).data, image)
    with open(path, encoding="latin-1") as handle:
        with pytest.raises(LensviewInputError, match="binary mode"):
            read_cutout(handle)


def test_cutout_zero_point_from_primary_header(tmp_path):
    image = np.ones((NY, NX), np.float32)
    primary = fits.PrimaryHDU()
    primary.header["PHOTFLAM"] = 1.5e-20
    primary.header["PHOTPLAM"] = 8000.0
    path = write(tmp_path / "zp.fits", primary, image_hdu(image, name="SCI"))
    expected = -2.5 * math.log10(1.5e-20) - 5 * math.log10(8000.0) - 2.408
    assert read_cutout(path).zero_point == pytest.approx(expected, abs=1e-3)
    plain = write(tmp_path / "plain.fits", image_hdu(image, primary=True))
    assert read_cutout(plain).zero_point is None


def test_cutout_keeps_sip_distortion(tmp_path):
    wcs = sky_wcs()
    wcs.wcs.ctype = ["RA---TAN-SIP", "DEC--TAN-SIP"]
    from astropy.wcs import Sip
    a = np.zeros((3, 3))
    b = np.zeros((3, 3))
    a[2, 0] = 2e-4
    b[0, 2] = -1e-4
    wcs.sip = Sip(a, b, None, None, wcs.wcs.crpix)
    header = wcs.to_header(relax=True)
    image = fits.PrimaryHDU(np.ones((NY, NX), np.float32), header=header)
    path = write(tmp_path / "sip.fits", image)
    cutout = read_cutout(path)
    assert cutout.wcs.sip is not None
    sky = cutout.wcs.pixel_to_world(NX - 1, NY - 1)
    assert sky.separation(wcs.pixel_to_world(NX - 1, NY - 1)).to_value(u.arcsec) < 1e-9


# ------------------------------------------------------------------------ zero points


def test_zero_point_keywords_in_order():
    assert zero_point_from_header(fits.Header()) is None
    assert zero_point_from_header({"MAGZERO": 25.0, "ZP": 24.0}) == 25.0
    assert zero_point_from_header({"ZEROPNT": 23.9}) == 23.9
    assert zero_point_from_header({"PHOTZP": "n/a", "MAGZP": 26.5}) == 26.5
    assert zero_point_from_header({"ZP": float("nan")}) is None
    assert zero_point_from_header({"PHOTFLAM": 0.0, "PHOTPLAM": 5000.0}) is None


def test_zero_point_from_photflam_matches_ab_definition():
    photflam, photplam = 1.1e-19, 15000.0
    zp = zero_point_from_header({"PHOTFLAM": photflam, "PHOTPLAM": photplam})
    # Space-telescope relation (from memory):
    # ZP_AB = -2.5 log10(PHOTFLAM) - 5 log10(PHOTPLAM) - 2.408.
    relation = -2.5 * math.log10(photflam) - 5 * math.log10(photplam) - 2.408
    assert zp == pytest.approx(relation, abs=5e-4)
    # Independent: f_lambda = PHOTFLAM at PHOTPLAM for one unit of image value, turned
    # into f_nu by astropy's spectral-density equivalency (reference library), then
    # m_AB = -2.5 log10(f_nu / 3631 Jy) (Oke & Gunn 1983).
    f_lambda = photflam * u.erg / u.s / u.cm**2 / u.AA
    f_nu = f_lambda.to(u.Jy, equivalencies=u.spectral_density(photplam * u.AA))
    assert zp == pytest.approx(-2.5 * math.log10(f_nu.to_value(u.Jy) / 3631), abs=1e-9)
    # astropy's ABmag uses the -48.60 form (3630.8 Jy): 7e-5 mag away (reference library).
    ab = f_lambda.to(u.ABmag, equivalencies=u.spectral_density(photplam * u.AA))
    assert zp == pytest.approx(ab.value, abs=1e-4)


def test_zero_point_from_flux_density_units():
    # 1 nJy per pixel: m_AB = -2.5 log10(1e-9 / 3631) = 31.4 (Oke & Gunn 1983).
    assert zero_point_from_header({"BUNIT": "nJy"}) == pytest.approx(-2.5 * math.log10(1e-9 / 3631))
    assert zero_point_from_header({"BUNIT": "nJy"}) == pytest.approx(31.40, abs=0.01)
    area_sr = (0.03 * u.arcsec) ** 2
    header = {"BUNIT": "MJy/sr", "PIXAR_SR": area_sr.to_value(u.sr)}
    expected = -2.5 * math.log10(1e6 * area_sr.to_value(u.sr) / 3631)
    assert zero_point_from_header(header) == pytest.approx(expected, rel=1e-12)
    header = {"BUNIT": "MJy/sr", "PIXAR_A2": 0.03**2}
    assert zero_point_from_header(header) == pytest.approx(expected, rel=1e-12)
    assert zero_point_from_header({"BUNIT": "MJy/sr"}) is None
    assert zero_point_from_header({"BUNIT": "ELECTRONS/S"}) is None
