"""Reading FITS files fast and safely: headers first, limits checked, then only the data needed.

For plain (uncompressed) files zsieve parses the header cards itself (FITS Standard 4.0:
2880-byte blocks of 80-character cards) and reads data sections with numpy at their byte
offset; this is about ten times faster than building astropy HDU objects and is what keeps
a 4000-pixel spectrum at a few milliseconds. Anything this reader does not handle (gzip or
other compressed files, variable-length or bit/complex/string table columns, ASCII tables)
goes through astropy.io.fits with lazy loading and memory mapping, with its warnings caught
and logged at debug level. The test suite checks both paths against astropy.

Before any data is read, a file is refused with :class:`~zsieve.errors.LimitExceededError`
if a header declares

- an image axis or a table row count beyond :data:`zsieve.spectrum.MAX_PIXELS`,
- a table array column longer than that,
- more than :data:`MAX_DATA_BYTES` of data in one HDU, or more than :data:`MAX_HDUS` HDUs,
- more data than the file holds (truncated or lying header; not checked for compressed
  files, whose size on disk says nothing about the data size),

and a file larger than :data:`MAX_FILE_BYTES` is refused by its size alone. A file that ends
inside an HDU's data or its padding to the 2880-byte block (FITS Standard 4.0, sec. 3.3) is
truncated and refused with :class:`~zsieve.errors.SpectrumFileError`; a 3-D (or higher)
image is refused as not a spectrum. Bytes after the last complete HDU that do not start
with an XTENSION card are ignored.

Header bytes are decoded as Latin-1, so non-UTF-8 bytes never fail; a card that cannot be
parsed is skipped (treated as absent); strings are cleaned later (:mod:`zsieve.io.header`).
"""

from __future__ import annotations

import logging
import math
import os
import re
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..errors import LimitExceededError, SpectrumFileError
from ..spectrum import MAX_PIXELS

__all__ = ["FitsFile", "HDUInfo", "parse_header_block", "MAX_DATA_BYTES", "MAX_HDUS", "MAX_FILE_BYTES"]

log = logging.getLogger(__name__)

#: Largest data section of one HDU zsieve will read (bytes).
MAX_DATA_BYTES = 1 << 30
#: Most HDUs zsieve will look through in one file.
MAX_HDUS = 1000
#: Largest FITS file zsieve will open (bytes); no 1-D spectrum file comes near it.
MAX_FILE_BYTES = 2 << 30

BLOCK = 2880
_COMPRESSED_SUFFIXES = (".gz", ".bz2", ".zip", ".z", ".fz")
_INT = re.compile(r"^[+-]?\d+$")
_FLOAT = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([EeDd][+-]?\d+)?$")
_STRING = re.compile(r"^'((?:[^']|'')*)'")
_BITPIX_DTYPE = {8: ">u1", 16: ">i2", 32: ">i4", 64: ">i8", -32: ">f4", -64: ">f8"}
_TFORM_DTYPE = {"B": ">u1", "I": ">i2", "J": ">i4", "K": ">i8", "E": ">f4", "D": ">f8", "L": "S1"}
_TFORM_BYTES = {"L": 1, "X": None, "B": 1, "I": 2, "J": 4, "K": 8, "A": 1, "E": 4, "D": 8, "C": 8, "M": 16, "P": 8, "Q": 16}


class _Unsupported(Exception):
    """This file or column needs astropy."""


def _parse_value(text: str):
    """Value of a card from the characters after '= ' (None if unparsable or empty)."""
    s = text.lstrip()
    if s.startswith("'"):
        m = _STRING.match(s)
        if not m:
            return None
        return m.group(1).replace("''", "'").rstrip()
    token = s.split("/", 1)[0].strip()
    if token == "T":
        return True
    if token == "F":
        return False
    if _INT.match(token):
        return int(token)
    if _FLOAT.match(token):
        return float(token.replace("D", "E").replace("d", "e"))
    return token or None  # not a FITS number (e.g. NAN): kept as text so messages can name it


def parse_header_block(raw: bytes) -> tuple[dict, bool]:
    """Cards of one header (bytes, a multiple of 80) as a dict; second value: END seen.

    The first occurrence of a keyword wins; COMMENT, HISTORY and blank cards are skipped;
    CONTINUE long strings are joined; HIERARCH keywords keep their full name.

    >>> cards = b"".join(c.ljust(80).encode() for c in
    ...     ["SIMPLE  =                    T", "NAXIS   =                    1",
    ...      "OBJECT  = 'CDX-0042 &'", "CONTINUE  'part two'", "CRVAL1  =   3.5D3 / start", "END"])
    >>> parse_header_block(cards)
    ({'SIMPLE': True, 'NAXIS': 1, 'OBJECT': 'CDX-0042 part two', 'CRVAL1': 3500.0}, True)
    """
    text = raw.decode("latin-1")
    cards: dict = {}
    last_key = None
    for k in range(0, len(text) - 79, 80):
        card = text[k : k + 80]
        key = card[:8].rstrip()
        if key == "END" and not card[8:].strip():
            return cards, True
        if key == "CONTINUE" and last_key is not None and isinstance(cards.get(last_key), str):
            v = _parse_value(card[8:])
            prev = cards[last_key]
            if isinstance(v, str) and prev.endswith("&"):
                cards[last_key] = prev[:-1] + v
            continue
        last_key = None
        if key == "HIERARCH" and "=" in card:
            name, _, rest = card[9:].partition("=")
            key, value = name.strip(), _parse_value(rest)
        elif card[8:10] == "= ":
            value = _parse_value(card[10:])
        else:
            continue  # COMMENT, HISTORY, blank, or malformed
        if value is None or key in cards:
            continue
        cards[key] = value
        last_key = key
    return cards, False


@dataclass
class HDUInfo:
    """What the header of one HDU declares (nothing here needed the data)."""

    index: int
    kind: str  # 'image', 'bintable', 'table' or 'other'
    name: str
    header: dict
    shape: tuple[int, ...] = ()  # image: numpy order (NAXISn ... NAXIS1); table: (rows,)
    columns: list[str] = field(default_factory=list)
    repeats: list[int] = field(default_factory=list)
    units: list[str | None] = field(default_factory=list)
    tforms: list[str] = field(default_factory=list)
    data_loc: int | None = None
    nbytes: int = 0

    @property
    def has_data(self) -> bool:
        return bool(self.shape) and all(s > 0 for s in self.shape)


def _int(hdr, key, default=0):
    v = hdr.get(key, default)
    if isinstance(v, bool):
        return None
    if isinstance(v, float) and v.is_integer():
        return int(v)
    return v if isinstance(v, int) else None


def _tform(tform) -> tuple[int, str, int | None]:
    """(repeat, code, max length for P/Q) of a TFORM value like '4000E' or '1PE(3904)'."""
    m = re.match(r"^\s*(\d*)\s*([A-Za-z])(.*)$", str(tform))
    if not m:
        return 1, "?", None
    repeat = int(m.group(1)) if m.group(1) else 1
    code = m.group(2).upper()
    vmax = None
    if code in ("P", "Q"):
        mm = re.search(r"\((\d+)\)", m.group(3))
        vmax = int(mm.group(1)) if mm else None
    return repeat, code, vmax


def _describe(path, hdr: dict, index: int) -> HDUInfo:
    """HDUInfo from one header; checks the declared sizes against the limits."""
    xt = str(hdr.get("XTENSION", "IMAGE" if index == 0 else "")).strip().upper()
    naxis = _int(hdr, "NAXIS", None)
    bitpix = _int(hdr, "BITPIX", None)
    if naxis is None or bitpix is None or not 0 <= naxis <= 999 or bitpix not in _BITPIX_DTYPE:
        raise SpectrumFileError(path, f"HDU {index} has a missing or invalid NAXIS/BITPIX")
    axes = []
    for k in range(1, naxis + 1):
        a = _int(hdr, f"NAXIS{k}", None)
        if a is None or a < 0:
            raise SpectrumFileError(path, f"HDU {index} declares an invalid NAXIS{k}")
        axes.append(a)
    pcount = _int(hdr, "PCOUNT", 0) or 0
    gcount = _int(hdr, "GCOUNT", 1)
    gcount = 1 if gcount is None else gcount
    if pcount < 0 or gcount < 0:
        raise SpectrumFileError(path, f"HDU {index} declares a negative PCOUNT/GCOUNT")
    kind = {"IMAGE": "image", "BINTABLE": "bintable", "TABLE": "table"}.get(xt, "other")
    elements = math.prod(axes) if axes else 0
    nbytes = abs(bitpix) // 8 * gcount * (pcount + elements) if axes else 0
    name = str(hdr.get("EXTNAME", "PRIMARY" if index == 0 else "")).strip()
    info = HDUInfo(index, kind, name, hdr, nbytes=nbytes)
    if kind in ("bintable", "table"):
        rows = axes[1] if len(axes) > 1 else 0
        if rows > MAX_PIXELS:
            raise LimitExceededError(path, f"HDU {index} declares {rows} table rows (limit {MAX_PIXELS})")
        nfields = _int(hdr, "TFIELDS", 0) or 0
        if not 0 <= nfields <= 999:
            raise SpectrumFileError(path, f"HDU {index} declares {nfields} table columns")
        for j in range(1, nfields + 1):
            tform = str(hdr.get(f"TFORM{j}", "E"))
            repeat, code, vmax = _tform(tform)
            count = vmax if code in ("P", "Q") and vmax is not None else repeat
            cname = str(hdr.get(f"TTYPE{j}", f"col{j}")).strip()
            if kind == "bintable" and count > MAX_PIXELS:
                raise LimitExceededError(
                    path, f"HDU {index} column {cname!r} declares {count} elements per row (limit {MAX_PIXELS})"
                )
            unit = hdr.get(f"TUNIT{j}")
            info.columns.append(cname)
            info.repeats.append(count if kind == "bintable" else 1)
            info.units.append(str(unit).strip() if isinstance(unit, str) and unit.strip() else None)
            info.tforms.append(tform)
        info.shape = (rows,)
    else:
        for k, a in enumerate(axes, start=1):
            if a > MAX_PIXELS:
                raise LimitExceededError(path, f"HDU {index} declares NAXIS{k} = {a} (limit {MAX_PIXELS})")
        info.shape = tuple(axes[::-1]) if elements else ()
        if kind == "image" and sum(a > 1 for a in axes) > 2:
            raise SpectrumFileError(path, f"HDU {index} is a {naxis}-D image {tuple(axes)}, not a 1-D spectrum")
    if nbytes > MAX_DATA_BYTES:
        raise LimitExceededError(path, f"HDU {index} declares {nbytes} bytes of data (limit {MAX_DATA_BYTES})")
    return info


class FitsFile:
    """An open FITS file: ``infos`` (one :class:`HDUInfo` per HDU) and data accessors.

    Use as a context manager; arrays returned are copies (safe after closing).
    """

    def __init__(self, path):
        self.path = os.fspath(path)
        try:
            self.size = os.path.getsize(self.path)
        except OSError as exc:
            raise SpectrumFileError(path, f"cannot be opened ({exc.strerror or exc})") from None
        if self.size > MAX_FILE_BYTES:
            raise LimitExceededError(path, f"file of {self.size} bytes is larger than the limit of {MAX_FILE_BYTES}")
        self._hdul = None
        self._fh = None
        self.compressed = self.path.lower().endswith(_COMPRESSED_SUFFIXES) or self._gzip_magic()
        if self.compressed:
            self.infos = self._scan_astropy()
        else:
            self._fh = open(self.path, "rb")
            self.infos = self._scan_raw()

    def _gzip_magic(self) -> bool:
        try:
            with open(self.path, "rb") as fh:
                return fh.read(2) == b"\x1f\x8b"
        except OSError as exc:
            raise SpectrumFileError(self.path, f"cannot be opened ({exc.strerror or exc})") from None

    # ------------------------------------------------------------- scanning
    def _scan_raw(self) -> list[HDUInfo]:
        fh, infos, offset = self._fh, [], 0
        while offset < self.size:
            if len(infos) >= MAX_HDUS:
                raise LimitExceededError(self.path, f"more than {MAX_HDUS} HDUs")
            fh.seek(offset)
            blocks, end = [], False
            while not end:
                block = fh.read(BLOCK)
                if len(block) < BLOCK:
                    if infos and (blocks or block.startswith(b"XTENSION")):
                        raise SpectrumFileError(
                            self.path, f"truncated: the file ends inside the header of HDU {len(infos)}"
                        )
                    break
                if not blocks and not block.startswith(b"SIMPLE  =" if offset == 0 else b"XTENSION="):
                    break  # not the start of an HDU
                blocks.append(block)
                if b"END" in block:
                    cards, end = parse_header_block(b"".join(blocks))
                if len(blocks) > 1000:  # 36,000 cards: not a real header
                    break
            raw = b"".join(blocks)
            if not end:
                if not infos:
                    raise SpectrumFileError(self.path, "not a readable FITS file (no complete primary header)")
                log.debug("%s: ignoring %d bytes after HDU %d", self.path, self.size - offset, len(infos) - 1)
                break
            if not infos and "SIMPLE" not in cards:
                raise SpectrumFileError(self.path, "not a readable FITS file (no SIMPLE card)")
            if infos and "XTENSION" not in cards:
                log.debug("%s: ignoring non-FITS bytes after HDU %d", self.path, len(infos) - 1)
                break
            info = _describe(self.path, cards, len(infos))
            info.data_loc = offset + len(raw)
            self._check_fits_in_file(info)
            infos.append(info)
            offset = info.data_loc + -(-info.nbytes // BLOCK) * BLOCK
            if offset > self.size:
                raise SpectrumFileError(
                    self.path,
                    f"truncated: HDU {info.index} with its padding should end at byte {offset} "
                    f"but the file has {self.size} bytes",
                )
        if not infos:
            raise SpectrumFileError(self.path, "not a readable FITS file (empty)")
        return infos

    def _check_fits_in_file(self, info: HDUInfo) -> None:
        if info.data_loc is not None and info.data_loc + info.nbytes > self.size:
            raise LimitExceededError(
                self.path,
                f"HDU {info.index} declares {info.nbytes} bytes of data but the file holds only "
                f"{max(self.size - info.data_loc, 0)} after its header (truncated or corrupt)",
            )

    def _open_astropy(self):
        if self._hdul is None:
            from astropy.io import fits

            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always")
                try:
                    self._hdul = fits.open(
                        self.path, memmap=not self.compressed, lazy_load_hdus=True, do_not_scale_image_data=True
                    )
                except Exception as exc:  # noqa: BLE001 - any failure: not readable
                    raise SpectrumFileError(self.path, f"not a readable FITS file ({_short(exc)})") from None
            self._log_warnings(caught)
        return self._hdul

    def _scan_astropy(self) -> list[HDUInfo]:
        hdul = self._open_astropy()
        infos = []
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            index = 0
            while True:
                if index >= MAX_HDUS:
                    raise LimitExceededError(self.path, f"more than {MAX_HDUS} HDUs")
                try:
                    hdu = hdul[index]
                except IndexError:
                    break
                except Exception as exc:  # noqa: BLE001
                    if index == 0:
                        raise SpectrumFileError(self.path, f"not a readable FITS file ({_short(exc)})") from None
                    break
                cards = {}
                for card in hdu.header.cards:
                    try:
                        key, value = card.keyword, card.value
                    except Exception:  # noqa: BLE001 - unparsable card: absent
                        continue
                    if key in ("COMMENT", "HISTORY", "") or key in cards:
                        continue
                    if isinstance(value, (bool, int, float, str)):
                        cards[key] = value
                infos.append(_describe(self.path, cards, index))
                index += 1
        self._log_warnings(caught)
        if not infos:
            raise SpectrumFileError(self.path, "not a readable FITS file (no header found)")
        return infos

    def _log_warnings(self, caught) -> None:
        for w in caught:
            if not issubclass(w.category, ResourceWarning):
                log.debug("%s: astropy: %s", self.path, w.message)

    # ------------------------------------------------------------- data
    def _read_bytes(self, info: HDUInfo, nbytes: int) -> bytes:
        self._fh.seek(info.data_loc)
        buf = self._fh.read(nbytes)
        if len(buf) < nbytes:
            raise SpectrumFileError(self.path, f"HDU {info.index} is truncated")
        return buf

    def image(self, info: HDUInfo) -> np.ndarray:
        """The image data of ``info`` as float64 (BSCALE/BZERO applied, BLANK -> NaN)."""
        h = info.header
        dtype = np.dtype(_BITPIX_DTYPE[h["BITPIX"]])
        n = math.prod(info.shape)
        if self._fh is None:  # compressed: astropy gives the stored values, scaled below
            arr = np.asarray(self._astropy_data(info)).reshape(-1)
        else:
            arr = np.frombuffer(self._read_bytes(info, n * dtype.itemsize), dtype=dtype, count=n)
        out = arr.astype(float).reshape(info.shape)
        blank = h.get("BLANK")
        if dtype.kind in "iu" and isinstance(blank, int):
            out[arr.reshape(info.shape) == blank] = np.nan
        bscale, bzero = h.get("BSCALE", 1), h.get("BZERO", 0)
        if isinstance(bscale, (int, float)) and bscale != 1:
            out *= bscale
        if isinstance(bzero, (int, float)) and bzero != 0:
            out += bzero
        return out

    def columns(self, info: HDUInfo, wanted: list[int]) -> dict[int, np.ndarray]:
        """Table columns (0-based indices) as arrays: (rows,) scalars, (rows, n) arrays, or
        an object array of 1-D arrays for variable-length columns."""
        if self._fh is not None and info.kind == "bintable":
            try:
                return self._columns_raw(info, wanted)
            except _Unsupported:
                pass
        data = self._astropy_data(info)
        return {j: _as_numeric(data.field(j)) for j in wanted}

    def _columns_raw(self, info: HDUInfo, wanted: list[int]) -> dict[int, np.ndarray]:
        h = info.header
        names, formats, offsets = [], [], []
        pos = 0
        wanted_set = set(wanted)
        for j, tform in enumerate(info.tforms):
            repeat, code, _ = _tform(tform)
            size = _TFORM_BYTES.get(code)
            if code == "X":
                size_bytes = -(-repeat // 8)
            elif size is None:
                raise _Unsupported
            else:
                size_bytes = size * repeat
            if j in wanted_set:
                if code not in _TFORM_DTYPE or repeat == 0:
                    raise _Unsupported
                names.append(f"c{j}")
                formats.append((_TFORM_DTYPE[code], (repeat,)) if repeat > 1 else _TFORM_DTYPE[code])
                offsets.append(pos)
            pos += size_bytes
        rowlen = _int(h, "NAXIS1", 0)
        if pos != rowlen:
            raise _Unsupported
        rows = info.shape[0]
        dtype = np.dtype({"names": names, "formats": formats, "offsets": offsets, "itemsize": rowlen})
        rec = np.frombuffer(self._read_bytes(info, rowlen * rows), dtype=dtype, count=rows)
        out = {}
        for j in wanted:
            col = rec[f"c{j}"]
            if col.dtype.kind == "S":
                col = col == b"T"
            col = col.astype(float)
            scale, zero = h.get(f"TSCAL{j + 1}", 1), h.get(f"TZERO{j + 1}", 0)
            if isinstance(scale, (int, float)) and scale != 1:
                col *= scale
            if isinstance(zero, (int, float)) and zero != 0:
                col += zero
            out[j] = col
        return out

    def _astropy_data(self, info: HDUInfo):
        hdul = self._open_astropy()
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                data = hdul[info.index].data
            except Exception as exc:  # noqa: BLE001 - unreadable data section
                raise SpectrumFileError(self.path, f"HDU {info.index} data could not be read ({_short(exc)})") from None
        self._log_warnings(caught)
        if data is None:
            raise SpectrumFileError(self.path, f"HDU {info.index} has no data")
        return data

    # ------------------------------------------------------------- context
    def close(self) -> None:
        if self._fh is not None:
            self._fh.close()
            self._fh = None
        if self._hdul is not None:
            self._hdul.close()
            self._hdul = None

    def __enter__(self) -> "FitsFile":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _as_numeric(col) -> np.ndarray:
    if isinstance(col, np.ndarray) and col.dtype != object:
        return np.asarray(col, dtype=float)
    return np.array([np.asarray(c, dtype=float).ravel() for c in col] + [None], dtype=object)[:-1]


def _short(exc: BaseException, limit: int = 160) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text[:limit]
