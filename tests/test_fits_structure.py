"""The header walk before a FITS file is opened (layout keywords of FITS standard 4.0)."""

import io

import numpy as np
import pytest
from astropy.io import fits

from lensview.errors import LensviewInputError
from lensview.io.fits_structure import check_fits_structure
from lensview.io.fits import read_cutout


def _bytes(*hdus):
    buffer = io.BytesIO()
    fits.HDUList(list(hdus)).writeto(buffer)
    return buffer.getvalue()


def _check(content):
    check_fits_structure(lambda offset, n: content[offset:offset + n], len(content), "test.fits")


def _set(content, keyword, value):
    data = bytearray(content)
    start = next(k for k in range(0, len(data), 80) if data[k:k + 8].rstrip() == keyword.encode())
    data[start:start + 80] = f"{keyword:<8}= {value:>20}".encode().ljust(80)
    return bytes(data)


def test_valid_files_with_extensions_tables_and_an_empty_primary_pass():
    image = np.arange(12.0, dtype=np.float32).reshape(3, 4)
    table = fits.BinTableHDU.from_columns([fits.Column("x", "E", array=np.arange(5.0))])
    _check(_bytes(fits.PrimaryHDU(image), fits.ImageHDU(image), table))
    _check(_bytes(fits.PrimaryHDU(), fits.ImageHDU(image.astype(np.int16))))


@pytest.mark.parametrize("keyword, value, phrase", [
    ("NAXIS", "2147483648", "NAXIS = 2147483648"),   # FITS 4.0 sec. 4.4.1: 0 <= NAXIS <= 999
    ("NAXIS1", "-32", "NAXIS1"),
    ("BITPIX", "1", "BITPIX = 1"),                   # FITS 4.0 table 8
    ("NAXIS2", "99999", "truncated or corrupt"),
    ("BITPIX", "16", "padding"),                     # data blocks end in zeros (sec. 3.3.2)
])
def test_layout_keywords_out_of_the_standard_are_named(keyword, value, phrase):
    content = _bytes(fits.PrimaryHDU(np.ones((24, 24), np.float32)))
    with pytest.raises(LensviewInputError, match=phrase):
        _check(_set(content, keyword, value))


def test_a_truncated_file_on_disk_is_refused_before_reading(tmp_path):
    content = _bytes(fits.PrimaryHDU(np.ones((64, 64), np.float32)))
    path = tmp_path / "cut.fits"
    path.write_bytes(content[: len(content) - 3000])
    with pytest.raises(LensviewInputError, match="truncated"):
        read_cutout(path)
