"""A walk over a FITS file's headers before it is opened.

Some astropy releases inside our requirements loop for a very long time on
absurd structural keywords (NAXIS = 2147483648, a negative NAXISn or
GCOUNT), and a truncated file is read with zero-filled data by others. This
walk reads only the header blocks (never the data, so big files stay on disk
for the memory-mapped read), checks the keywords that fix the layout against
the FITS standard 4.0 (sec. 4.4.1: BITPIX, NAXIS, NAXISn, PCOUNT, GCOUNT) and
the announced data sizes against the file's length, and raises a
`LensviewInputError` that says what is wrong. Anything it does not
understand is left to astropy's reader.
"""

from ..errors import LensviewInputError

__all__ = ["check_fits_structure"]

_BLOCK = 2880
_CARD = 80
_BITPIX = (8, 16, 32, 64, -32, -64)
_MAX_HEADER_BLOCKS = 10_000
_MAX_HDUS = 1000


def _integer(raw):
    """The card value as an int, or None when it is not a whole number."""
    text = raw.split(b"/", 1)[0].strip()
    try:
        return int(text)
    except ValueError:
        return None


def _header_cards(read_at, offset):
    """Keyword -> raw value of one header starting at ``offset``; the end offset, or None."""
    cards = {}
    position = offset
    for _ in range(_MAX_HEADER_BLOCKS):
        block = read_at(position, _BLOCK)
        if len(block) < _BLOCK:
            return None, None
        position += _BLOCK
        for start in range(0, _BLOCK, _CARD):
            card = block[start:start + _CARD]
            key = card[:8].rstrip()
            if key == b"END":
                return cards, position
            if card[8:10] == b"= " and key not in cards:
                cards[key] = card[10:]
    return None, None


def check_fits_structure(read_at, size, label):
    """Check the layout keywords of every header against the standard and the file size.

    Parameters
    ----------
    read_at : callable
        ``read_at(offset, n)`` returns up to ``n`` bytes from ``offset``.
    size : int
        Length of the file in bytes.
    label : str
        How messages name the file.

    Raises
    ------
    LensviewInputError
        For a layout keyword outside the standard, or data announced beyond
        the end of the file (a truncated file).
    """
    offset = 0
    for index in range(_MAX_HDUS):
        if offset >= size:
            return
        cards, data_start = _header_cards(read_at, offset)
        if cards is None:
            if index == 0:
                return  # no header at all: astropy's reader says it is not FITS
            rest = read_at(offset, _BLOCK)
            if rest.strip(b"\0 "):
                # Data left over after the announced sizes: a layout keyword (BITPIX,
                # NAXISn) was changed, and the data would be read with another meaning.
                raise LensviewInputError(
                    f"{label} holds {size - offset} bytes after the data its headers announce, "
                    "and they are no FITS header: a header is damaged (BITPIX or NAXISn do not "
                    "fit the data). Write the file again from the program that made it.")
            return
        where = label if index == 0 else f"HDU {index} of {label}"
        naxis = _integer(cards.get(b"NAXIS", b""))
        if naxis is None:
            return
        if not 0 <= naxis <= 999:
            raise LensviewInputError(
                f"{where} claims NAXIS = {naxis}; FITS allows 0 to 999 axes. The header is "
                "damaged: write the file again from the program that made it.")
        bitpix = _integer(cards.get(b"BITPIX", b""))
        if bitpix not in _BITPIX:
            raise LensviewInputError(
                f"{where} has BITPIX = {cards.get(b'BITPIX', b'').strip().decode('ascii', 'replace')}; "
                "FITS allows 8, 16, 32, 64, -32 or -64. The header is damaged: write the file "
                "again from the program that made it.")
        lengths = []
        for axis in range(1, naxis + 1):
            length = _integer(cards.get(b"NAXIS%d" % axis, b""))
            if length is None or length < 0:
                raise LensviewInputError(
                    f"{where} gives no valid NAXIS{axis} (a whole number >= 0) for its "
                    f"{naxis} axes. The header is damaged: write the file again.")
            lengths.append(length)
        pcount = _integer(cards.get(b"PCOUNT", b"0"))
        gcount = _integer(cards.get(b"GCOUNT", b"1"))
        if pcount is None or pcount < 0 or gcount is None or gcount < 0:
            raise LensviewInputError(
                f"{where} has PCOUNT or GCOUNT below 0 or not a whole number; the header is "
                "damaged: write the file again.")
        # Random groups (NAXIS1 = 0) count the other axes only (FITS 4.0 sec. 6); a
        # primary array without groups has no PCOUNT/GCOUNT in its size (sec. 4.4.1.1).
        groups = bool(lengths) and lengths[0] == 0 and naxis > 1
        axes = lengths[1:] if groups else lengths
        if index == 0 and not groups:
            pcount, gcount = 0, 1
        elements = 0
        if naxis:
            elements = 1
            for length in axes:
                elements *= length
        nbytes = abs(bitpix) // 8 * gcount * (pcount + elements)
        available = size - data_start
        if nbytes > available:
            raise LensviewInputError(
                f"{where} announces {nbytes} bytes of data ({' x '.join(map(str, lengths))} "
                f"values of BITPIX {bitpix}) but the file holds only {max(available, 0)} after the "
                "header: it is truncated or corrupt. Copy or download it again.")
        offset = data_start + -(-nbytes // _BLOCK) * _BLOCK
        padding = read_at(data_start + nbytes, offset - data_start - nbytes)
        if padding.strip(b"\0"):
            # The standard fills data blocks with zeros (FITS 4.0 sec. 3.3.2): values there
            # mean BITPIX or NAXISn were changed and the data would be read with another meaning.
            raise LensviewInputError(
                f"{where} has data where its header announces only padding: a header is "
                "damaged (BITPIX or NAXISn do not fit the data). Write the file again from the "
                "program that made it.")
