"""Fuzzed input for every reader: a result or a LensviewInputError, nothing else.

Each property builds a valid file, damages it (header edits, truncation,
random bytes, huge NAXIS claims, NaN/inf patches, random catalogue columns and
encodings, session JSON mutations) and reads it back. Allowed outcomes:

* ``LensviewInputError`` with a non-empty message;
* a result, which must not carry a silently wrong number:
  - a cutout or map read from a truncated or header-edited file holds exactly
    the original pixels; when the edit shrank an axis (NAXISn), exactly the
    first stored values in file order (the part read); scaling keywords
    (BSCALE, BZERO, BLANK) change the numbers on purpose (FITS standard 4.0,
    sec. 5.3) and are only required to end in a result or an input error;
  - NaN/inf pixels stay non-finite in a cutout or a map (masked parts of a
    model are NaN by design, see DEVELOPERS.md), never replaced by numbers,
    and every other pixel keeps its value; a map with no finite value is
    refused;
  - catalogue positions are finite, in range (0 <= RA < 360, |Dec| <= 90 deg)
    and equal to the values written (to 1e-9 deg) when the file was valid;
  - a restored session holds finite knot positions.

Any other exception fails the test; every example is bounded by a deadline,
so a hang fails too. Hypothesis runs derandomized without a database, so CI
sees the same cases every run. The counts of cases and outcomes are printed
by the last test (run ``pytest -s tests/test_fuzz.py`` to see them).
"""

import io
import json
import signal
from collections import Counter
from contextlib import contextmanager

import numpy as np
import pytest
from astropy.io import fits
from astropy.wcs import WCS
from hypothesis import HealthCheck, given, settings, strategies as st

from lensview.errors import LensviewInputError
from lensview.io import load_session, read_candidates, save_session
from lensview.io.fits import read_cutout, read_deflection

OUTCOMES = Counter()
FUZZ = settings(max_examples=120, deadline=4000, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

N = 24


def _wcs():
    wcs = WCS(naxis=2)
    wcs.wcs.ctype = ["RA---TAN", "DEC--TAN"]
    wcs.wcs.crval = [150.0, 2.0]
    wcs.wcs.crpix = [12.5, 12.5]
    wcs.wcs.cdelt = [-0.05 / 3600, 0.05 / 3600]
    return wcs


def _image():
    yy, xx = np.mgrid[:N, :N]
    return (np.exp(-((xx - 11.0) ** 2 + (yy - 13.0) ** 2) / 8.0) + 0.01 * xx).astype(np.float32)


IMAGE = _image()
ALPHA_X = (0.3 * (np.arange(N)[None, :] - 11.5) * np.ones((N, 1))).astype(np.float32)
ALPHA_Y = (0.3 * (np.arange(N)[:, None] - 11.5) * np.ones((1, N))).astype(np.float32)


def _bytes(hdul):
    buffer = io.BytesIO()
    hdul.writeto(buffer)
    return buffer.getvalue()


def _cutout_bytes():
    header = _wcs().to_header()
    header["PHOTZP"] = 28.0
    return _bytes(fits.HDUList([fits.PrimaryHDU(IMAGE, header)]))


def _cube_bytes():
    header = _wcs().to_header()
    header["BUNIT"] = "arcsec"
    return _bytes(fits.HDUList([fits.PrimaryHDU(np.stack([ALPHA_X, ALPHA_Y]), header)]))


def _two_hdu_bytes():
    header = _wcs().to_header()
    header["BUNIT"] = "arcsec"
    return _bytes(fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(ALPHA_X, header, name="ALPHA_X"),
                                fits.ImageHDU(ALPHA_Y, header, name="ALPHA_Y")]))


FILES = {"cutout": _cutout_bytes(), "cube": _cube_bytes(), "two-hdu": _two_hdu_bytes()}
KEYWORDS = ["SIMPLE", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "NAXIS3", "EXTEND", "CTYPE1", "CTYPE2",
            "CRVAL1", "CRVAL2", "CRPIX1", "CRPIX2", "CDELT1", "CDELT2", "CUNIT1", "BUNIT", "PHOTZP",
            "BSCALE", "BZERO", "BLANK", "XTENSION", "PCOUNT", "GCOUNT", "EXTNAME", "END", "Z_NORM",
            "LONPOLE", "RADESYS", "EQUINOX", "PC1_1", "PC2_2", "MAGZERO"]
VALUES = ["0", "1", "2", "3", "-1", "-32", "64", "8", "16", "999999999999", "2147483648",
          "1e308", "-1e308", "NAN", "'RA---SIN'", "'GARBAGE '", "'deg     '", "T", "F", "''",
          "'arcsec  '", "'pixel   '", "1.5", "0.0", "-0.0", "'\\x00'"]


def _record(kind, outcome):
    OUTCOMES[(kind, outcome)] += 1


def _edit_card(content, keyword, value):
    """Put ``keyword = value`` over the first card of that name (or the first card)."""
    data = bytearray(content)
    header_end = data.find(b"END" + b" " * 77)
    cards = range(0, max(header_end, 80), 80)
    for start in cards:
        if data[start:start + 8].rstrip() == keyword.encode():
            break
    else:
        start = 80 * (len(cards) // 2)
    card = f"{keyword:<8}= {value:>20}".encode("ascii", "replace")[:80].ljust(80)
    data[start:start + 80] = card
    return bytes(data)


def _same_pixels(result, original):
    return result.shape == original.shape and np.array_equal(result, original, equal_nan=True)


@contextmanager
def _no_hang(seconds=20):
    """Fail instead of waiting when a reader loops (some releases did on absurd headers)."""
    def stop(*_):
        raise AssertionError(f"the reader ran for more than {seconds} s: a hang")

    previous = signal.signal(signal.SIGALRM, stop)
    signal.alarm(seconds)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)


def _read(kind, content):
    with _no_hang():
        if kind == "cutout":
            return read_cutout(content)
        return read_deflection(content, units=None)


def _leading_values(got, original):
    """A smaller axis claim reads the first values of the same bytes, in file order."""
    flat = np.asarray(got).ravel()
    return flat.size <= original.size and np.array_equal(flat, original.ravel()[:flat.size],
                                                         equal_nan=True)


def _check_result(kind, result, edited_meaning, reshaped=False):
    """No silently wrong number in a result read from a damaged file.

    ``reshaped``: the edit shrank an axis, so the header announces fewer values;
    the result must then hold the first values of the original bytes (the part
    read), nothing else.
    """
    if kind == "cutout":
        data = np.asarray(result.data)
        if reshaped:
            assert _leading_values(data, IMAGE), "a cutout with a smaller axis read other numbers"
        elif not edited_meaning:
            assert _same_pixels(data, IMAGE), "a damaged cutout was read with other pixels"
    elif not edited_meaning:
        stored = np.stack([ALPHA_X, ALPHA_Y])
        for got, original in ((result.alpha_x, ALPHA_X), (result.alpha_y, ALPHA_Y)):
            if reshaped:
                # Each plane of a re-shaped cube is a run of the stored values.
                flat, values = np.asarray(got).ravel(), stored.ravel()
                assert any(np.array_equal(flat, values[k:k + flat.size])
                           for k in range(0, values.size - flat.size + 1)), \
                    "a map with a smaller axis read other numbers"
            else:
                assert _same_pixels(np.asarray(got), original), "a damaged map read other numbers"


def _outcome(kind, content, edited_meaning=False, reshaped=False):
    try:
        result = _read(kind, content)
    except LensviewInputError as error:
        assert str(error).strip(), "an input error without a message"
        _record(kind, "input error")
        return None
    _check_result(kind, result, edited_meaning, reshaped)
    _record(kind, "result")
    return result


# ---------------------------------------------------------------------------- FITS files
@FUZZ
@given(kind=st.sampled_from(sorted(FILES)), keyword=st.sampled_from(KEYWORDS),
       value=st.sampled_from(VALUES))
def test_header_edits(kind, keyword, value):
    content = _edit_card(FILES[kind], keyword, value)
    # Scaling keywords change the numbers on purpose (FITS 4.0 sec. 5.3); a smaller
    # axis length is honoured by reading fewer of the same bytes.
    meaning = keyword in ("BSCALE", "BZERO", "BLANK", "BUNIT")
    _outcome(kind, content, edited_meaning=meaning, reshaped=keyword.startswith("NAXIS"))


@FUZZ
@given(kind=st.sampled_from(sorted(FILES)), fraction=st.floats(0.0, 0.999))
def test_truncations(kind, fraction):
    content = FILES[kind]
    _outcome(kind, content[: int(fraction * len(content))])


@FUZZ
@given(kind=st.sampled_from(sorted(FILES)), naxis=st.sampled_from(["NAXIS1", "NAXIS2", "NAXIS3"]),
       value=st.sampled_from(["99999", "2147483647", "4294967296", "9999999999999999"]))
def test_huge_naxis_claims(kind, naxis, value):
    _outcome(kind, _edit_card(FILES[kind], naxis, value))


@FUZZ
@given(content=st.one_of(st.binary(max_size=6000),
                         st.binary(min_size=2880, max_size=2880).map(lambda b: b"SIMPLE  =" + b)))
def test_random_bytes(content):
    for kind in ("cutout", "cube"):
        _outcome(kind, content)


@FUZZ
@given(kind=st.sampled_from(sorted(FILES)), row=st.integers(0, N - 1), col=st.integers(0, N - 1),
       size=st.integers(1, 6), value=st.sampled_from([np.nan, np.inf, -np.inf]))
def test_nan_and_inf_patches(kind, row, col, size, value):
    image, ax, ay = IMAGE.copy(), ALPHA_X.copy(), ALPHA_Y.copy()
    patch = (slice(row, row + size), slice(col, col + size))
    header = _wcs().to_header()
    if kind == "cutout":
        image[patch] = value
        content = _bytes(fits.HDUList([fits.PrimaryHDU(image, header)]))
    else:
        ax[patch] = value
        header["BUNIT"] = "arcsec"
        content = _bytes(fits.HDUList([fits.PrimaryHDU(np.stack([ax, ay]), header)]))
    try:
        result = _read("cutout" if kind == "cutout" else "cube", content)
    except LensviewInputError as error:
        assert str(error).strip()
        _record(f"{kind} with NaN/inf", "input error")
        return
    _record(f"{kind} with NaN/inf", "result")
    data, original = ((np.asarray(result.data), image) if kind == "cutout"
                      else (np.asarray(result.alpha_x), ax))
    assert not np.isfinite(data[patch]).any(), "NaN/inf pixels became numbers"
    keep = np.isfinite(original)
    assert np.array_equal(data[keep], original[keep]), "pixels beside a NaN patch changed"


# ---------------------------------------------------------------------------- catalogues
COLUMN_NAMES = ["ra", "dec", "RA", "DEC", "RAJ2000", "DEJ2000", "x", "y", "label", "name", "id",
                "pair_id", "mag", "flux", "ALPHA_J2000", "DELTA_J2000", "", "ra ", "a,b", "é"]
CELL = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**20, 10**20),
                 st.text(max_size=12), st.sampled_from(["12:30:45.1", "-7:25:13", "nan", "", "--"]))


@FUZZ
@given(names=st.tuples(st.booleans(), st.lists(st.sampled_from(COLUMN_NAMES), min_size=1, max_size=5))
       .map(lambda t: (["ra", "dec"] if t[0] else []) + t[1]),
       rows=st.lists(st.lists(st.one_of(CELL, st.floats(0, 90)), min_size=7, max_size=7),
                     max_size=6),
       encoding=st.sampled_from(["utf-8", "utf-16", "latin-1", "utf-8-sig", "cp1252"]),
       suffix=st.sampled_from([".csv", ".ecsv", ".vot"]))
def test_catalogues_with_random_columns_and_encodings(names, rows, encoding, suffix):
    lines = [",".join(f'"{n}"' if "," in n else n for n in names)]
    lines += [",".join(str(v) for v in row[: len(names)]) for row in rows]
    text = "\n".join(lines) + "\n"
    if suffix == ".ecsv":
        text = "# %ECSV 1.0\n# ---\n# delimiter: ','\n" + text
    if suffix == ".vot":
        text = "<?xml version='1.0'?><VOTABLE><RESOURCE><TABLE>" + text + "</TABLE></RESOURCE></VOTABLE>"
    content = text.encode(encoding, errors="replace")
    upload = io.BytesIO(content)
    upload.name = "knots" + suffix
    try:
        with _no_hang():
            table = read_candidates(upload, wcs=_wcs())
    except LensviewInputError as error:
        assert str(error).strip()
        _record("catalogue", "input error")
        return
    _record("catalogue", "result")
    ra, dec = np.asarray(table["ra"], float), np.asarray(table["dec"], float)
    assert np.all(np.isfinite(ra)) and np.all(np.isfinite(dec)), "a knot without a position"
    assert np.all((ra >= 0) & (ra < 360)) and np.all(np.abs(dec) <= 90), "a position off the sky"


@FUZZ
@given(ra=st.lists(st.floats(0, 359.999), min_size=1, max_size=5),
       dec=st.lists(st.floats(-90, 90), min_size=5, max_size=5),
       encoding=st.sampled_from(["utf-8", "utf-8-sig", "utf-16"]),
       cut=st.one_of(st.none(), st.floats(0, 1)))
def test_valid_catalogues_read_their_numbers_or_fail(ra, dec, encoding, cut):
    text = "ra,dec,label\n" + "".join(f"{r!r},{d!r},K{k}\n" for k, (r, d) in enumerate(zip(ra, dec)))
    content = text.encode(encoding)
    if cut is not None:
        content = content[: int(cut * len(content))]
    upload = io.BytesIO(content)
    upload.name = "knots.csv"
    try:
        table = read_candidates(upload)
    except LensviewInputError as error:
        assert str(error).strip()
        _record("valid or cut catalogue", "input error")
        return
    _record("valid or cut catalogue", "result")
    n = len(table)
    assert n <= len(ra)
    # Rows read are the rows written (a cut inside the last number may shorten it: only
    # complete files are compared number for number).
    if cut is None:
        assert n == len(ra)
        np.testing.assert_allclose(np.asarray(table["ra"], float), ra, atol=1e-9, rtol=0)
        np.testing.assert_allclose(np.asarray(table["dec"], float), dec[:n], atol=1e-9, rtol=0)
    else:
        assert np.all(np.isfinite(np.asarray(table["ra"], float)))


# ---------------------------------------------------------------------------- sessions
def _session_document():
    from astropy.table import Table

    knots = Table({"ra": [150.0, 150.0001], "dec": [2.0, 2.0002], "label": ["K1", "K2"],
                   "pair_id": [0, 0]})
    record = {"z_lens": 0.4, "z_source": 2.5, "cutout": None, "models": [],
              "cosmology": None, "display": {"stretch": "asinh", "colormap": "gray_r",
                                             "limits": "zscale"},
              "candidates": knots}
    return json.loads(save_session(None, record))


SESSION = _session_document()
JSON_VALUE = st.recursive(
    st.one_of(st.none(), st.booleans(), st.integers(-10**30, 10**30),
              st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=8)),
    lambda children: st.lists(children, max_size=3) | st.dictionaries(st.text(max_size=6), children,
                                                                       max_size=3),
    max_leaves=6)


def _paths(document, prefix=()):
    yield prefix
    if isinstance(document, dict):
        for key, value in document.items():
            yield from _paths(value, prefix + (key,))
    elif isinstance(document, list):
        for index, value in enumerate(document):
            yield from _paths(value, prefix + (index,))


PATHS = list(_paths(SESSION))


def _mutate(document, path, action, value):
    document = json.loads(json.dumps(document))
    if not path:
        return value if action == "replace" else document
    parent = document
    for step in path[:-1]:
        parent = parent[step]
    if action == "delete":
        del parent[path[-1]]
    else:
        parent[path[-1]] = value
    return document


@FUZZ
@given(mutations=st.lists(st.tuples(st.sampled_from(PATHS), st.sampled_from(["replace", "delete"]),
                                    JSON_VALUE), min_size=1, max_size=3),
       special=st.sampled_from([None, "NaN", "Infinity", "-Infinity", "1e999"]))
def test_session_mutations(mutations, special):
    document = SESSION
    for path, action, value in mutations:
        try:
            document = _mutate(document, path, action, value)
        except (KeyError, IndexError, TypeError):
            continue  # an earlier mutation removed this path
    text = json.dumps(document)
    if special is not None:
        text = text.replace("150.0001", special, 1)
    try:
        with _no_hang():
            session = load_session(text)
    except LensviewInputError as error:
        assert str(error).strip()
        _record("session", "input error")
        return
    _record("session", "result")
    table = session.candidate_table()
    assert np.all(np.isfinite(np.asarray(table["ra"], float)))
    assert np.all(np.isfinite(np.asarray(table["dec"], float)))


@FUZZ
@given(content=st.binary(max_size=400))
def test_session_random_bytes(content):
    try:
        load_session(content)
    except LensviewInputError as error:
        assert str(error).strip()
        _record("session bytes", "input error")
        return
    _record("session bytes", "result")


# ---------------------------------------------------------------------------- the page
def test_knots_on_the_page_survive_every_failed_upload():
    """Damaged files of each kind into every uploader: a message each time, the knots kept."""
    from pathlib import Path

    from streamlit.testing.v1 import AppTest

    from lensview.page import state as page_state

    app = AppTest.from_file(str(Path(__file__).resolve().parents[1] / "app.py"), default_timeout=240)
    app.run()
    app.button(key="lv_mark_demo").click()
    app.run()
    marked = [(m["ra"], m["dec"], m["label"]) for m in app.session_state[page_state.CANDIDATES]]
    assert len(marked) > 2
    bad_fits = [
        ("cut.fits", FILES["cutout"][: len(FILES["cutout"]) // 2]),
        ("huge.fits", _edit_card(FILES["cutout"], "NAXIS1", "2147483647")),
        ("bitpix.fits", _edit_card(FILES["cube"], "BITPIX", "16")),
        ("noise.fits", bytes(range(256)) * 12),
    ]
    errors = 0
    for name, content in bad_fits:
        # The knot list and session uploaders on the tab "Download and restore".
        app.file_uploader(key="lv_up_catalogue").set_value((name, content, "application/fits"))
        app.run()
        app.button(key="lv_cat_replace").click()
        app.run()
        errors += any(e.value for e in app.error)
        app.file_uploader(key="lv_up_session").set_value(
            ("s.json", content[:300], "application/json"))
        app.run()
        app.button(key="lv_restore").click()
        app.run()
        errors += any(e.value for e in app.error)
        now = [(m["ra"], m["dec"], m["label"]) for m in app.session_state[page_state.CANDIDATES]]
        assert now == marked, name
    # And as the cutout and a model of "My files".
    app.radio(key="lv_source").set_value("My files")
    app.run()
    for name, content in bad_fits:
        for slot in ("cutout", "model_0"):
            widget = next(w for w in app.file_uploader if w.key.startswith(f"lv_up_{slot}_"))
            widget.set_value((name, content, "application/fits") if slot == "cutout"
                             else [(name, content, "application/fits")])
            app.run()
            assert not app.exception, app.exception[0].message if app.exception else ""
            errors += any(e.value for e in app.error)
            now = [(m["ra"], m["dec"], m["label"]) for m in app.session_state[page_state.CANDIDATES]]
            assert now == marked, (name, slot)
    OUTCOMES[("page upload", "input error")] += errors
    assert errors == 4 * len(bad_fits)


# ---------------------------------------------------------------------------- summary
def test_zz_fuzz_summary():
    """Report the counts (printed with ``-s``); every reader saw both kinds of outcome."""
    kinds = sorted({kind for kind, _ in OUTCOMES})
    lines = ["fuzz cases by reader: " + "; ".join(
        f"{kind}: {OUTCOMES[(kind, 'result')]} results, {OUTCOMES[(kind, 'input error')]} input errors"
        for kind in kinds)]
    lines.append(f"total {sum(OUTCOMES.values())} cases")
    print("\n" + "\n".join(lines))
    if not OUTCOMES:
        pytest.skip("run with the fuzz tests above to count their cases")
    for kind in ("cutout", "cube", "catalogue", "session"):
        assert OUTCOMES[(kind, "input error")] > 0, kind
