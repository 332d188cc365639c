"""Observation facts from a FITS header (or any key/value mapping) into SpectrumMeta fields.

Header text is untrusted: every string is stripped of control characters and capped at
:data:`MAX_TEXT` characters; a card that cannot be parsed (bad bytes, broken quotes) is
treated as absent rather than failing the read.

Keywords looked for, first match wins (case-insensitive):

- **object name**: OBJECT, TARGNAME, DESIGNATION, DESIG, OBJNAME, OBJ_NAME, TARGET, NAME.
- **RA/Dec**: (PLUG_RA, PLUG_DEC), (RAOBJ, DECOBJ), (RA_OBJ, DEC_OBJ), (OBJ_RA, OBJ_DEC),
  (RA_TARG, DEC_TARG), (TARG_RA, TARG_DEC), (RA, DEC), (RADEG, DECDEG). The object-specific pairs
  come first because survey headers put the telescope pointing in RA/DEC. Numbers are degrees;
  strings are sexagesimal, RA in hours and Dec in degrees (common practice), or decimal degrees.
- **time** (MJD, UTC), mid-exposure where the header allows:
  MJD-AVG / DATE-AVG (mid); TAI-BEG + TAI-END (seconds of TAI since MJD 0, SDSS; mid);
  MJD-BEG + MJD-END or DATE-BEG + DATE-END (mid); MJD-OBS or DATE-OBS (+ TIME-OBS / UT / UTC /
  UT-START if DATE-OBS holds only a date), taken as the start and moved to mid-exposure by
  EXPTIME/2 (or EXPOSURE/2) when given; TAI alone; MJD as written. SDSS TAI-* and TAI
  keywords are in the TAI scale whatever TIMESYS says. TIMESYS TAI or TT is
  converted to UTC with the leap-second table of ERFA (offline). How the time was found is
  recorded in ``extra['time_source']``.
- **site**: OBSGEO-X/Y/Z (metres, geocentric; FITS Paper III) converted with
  ``astropy.coordinates.EarthLocation.from_geocentric`` (WGS84); else OBSGEO-L/B/H; else
  (LONGITUD, LATITUDE, ALTITUDE|HEIGHT|ELEVATIO), (SITELONG, SITELAT, SITEELEV),
  (OBS-LONG, OBS-LAT, OBS-ELEV), (LONG-OBS, LAT-OBS, ALT-OBS), (GEOLON, GEOLAT, GEOELEV).
  Longitudes are taken as east-positive (FITS Paper III; LAMOST writes 117.58 for Xinglong).
  Never looked up by observatory name (that would need the network).
- **frame**: SPECSYS (FITS Paper III) TOPOCENT, HELIOCEN, BARYCENT; other SPECSYS values give
  ``unknown`` and are kept in ``extra['specsys']``; HELIO = T gives heliocentric.
- **medium**: VACUUM (T = vacuum, F = air), AIRORVAC / MEDIUM ('air', 'vac', 'vacuum').

Examples
--------
>>> hdr = {"OBJECT": "CDX-0042\\x07\\x1b[2J", "RA": "10:30:00", "DEC": "-05:15:00",
...        "MJD-OBS": 60000.0, "EXPTIME": 1800.0}
>>> m = header_meta(hdr)
>>> m["object_name"], round(m["ra_deg"], 9), m["dec_deg"], m["mjd"]
('CDX-0042[2J', 157.5, -5.25, 60000.0104166667)
"""

from __future__ import annotations

import datetime as _dt
import logging
import math
import re
from typing import Any, Mapping

__all__ = ["HeaderView", "header_meta", "clean_text", "as_bool", "parse_date", "MAX_TEXT", "medium_from_header"]

log = logging.getLogger(__name__)

#: Longest string kept from a header (characters).
MAX_TEXT = 200

_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f\u200b-\u200f\u2028-\u202e\u2066-\u2069\ufeff]")
_MJD0 = _dt.datetime(1858, 11, 17)


def clean_text(value, limit: int = MAX_TEXT) -> str | None:
    """``value`` as a safe one-line string: control characters removed, length capped.

    >>> clean_text("  M31\\n\\x00core  "), clean_text(""), len(clean_text("x" * 500))
    ('M31core', None, 200)
    """
    if value is None:
        return None
    if isinstance(value, bytes):
        value = value.decode("utf-8", errors="replace")
    text = _CONTROL.sub("", str(value))
    text = " ".join(text.split())[:limit]
    return text or None


def as_bool(value) -> bool | None:
    """FITS logical or a string/number spelling of one (``'T'``, ``'yes'``, ``1``)."""
    if value is None:
        return None
    if isinstance(value, bool):
        return value
    if isinstance(value, (int, float)):
        return bool(value)
    text = str(value).strip().upper()
    if text in ("T", "TRUE", "Y", "YES", "1"):
        return True
    if text in ("F", "FALSE", "N", "NO", "0"):
        return False
    return None


class HeaderView:
    """Case-insensitive, failure-tolerant read access to one or more headers.

    Later headers in ``headers`` are consulted first (an extension's own cards override
    the primary header's). A card that astropy cannot parse counts as absent.
    """

    def __init__(self, *headers: Mapping | None):
        self._headers = [h for h in headers if h is not None][::-1]

    def get(self, key: str, default=None):
        for h in self._headers:
            for k in (key, key.upper(), key.lower()):
                try:
                    if k in h:
                        value = h[k]
                except Exception:  # noqa: BLE001 - unparsable card: treat as absent
                    log.debug("unparsable header card %s", key, exc_info=True)
                    continue
                else:
                    if k in h:
                        if value is None or (isinstance(value, str) and not value.strip()):
                            break
                        return value
        return default

    def first(self, *keys: str):
        """(key, value) of the first key present, or (None, None)."""
        for k in keys:
            v = self.get(k)
            if v is not None:
                return k, v
        return None, None

    def number(self, key: str) -> float | None:
        v = self.get(key)
        return _to_float(v)

    def text(self, key: str) -> str | None:
        return clean_text(self.get(key))


def _to_float(v) -> float | None:
    if v is None or isinstance(v, bool):
        return None
    try:
        x = float(v)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


# ------------------------------------------------------------------ angles
def _parse_angle(value, hours: bool) -> float | None:
    """Degrees from a number (degrees) or a sexagesimal/decimal string."""
    x = _to_float(value)
    if x is not None:
        return x
    text = clean_text(value)
    if not text:
        return None
    try:
        import astropy.units as u
        from astropy.coordinates import Angle

        if re.search(r"[:hdms\s]", text.strip()):
            return float(Angle(text, unit=u.hourangle if hours else u.deg).deg)
        return float(text)
    except Exception:  # noqa: BLE001 - unparsable angle: absent
        return None


_RADEC_PAIRS = (
    ("PLUG_RA", "PLUG_DEC"), ("RAOBJ", "DECOBJ"), ("RA_OBJ", "DEC_OBJ"), ("OBJ_RA", "OBJ_DEC"),
    ("RA_TARG", "DEC_TARG"), ("TARG_RA", "TARG_DEC"), ("RA", "DEC"), ("RADEG", "DECDEG"),
)


def _radec(h: HeaderView):
    for kra, kdec in _RADEC_PAIRS:
        vra, vdec = h.get(kra), h.get(kdec)
        if vra is None or vdec is None:
            continue
        ra, dec = _parse_angle(vra, hours=True), _parse_angle(vdec, hours=False)
        if ra is None or dec is None or not (-90.0 <= dec <= 90.0) or not (-360.0 <= ra <= 720.0):
            log.debug("ignoring unusable position %s=%r %s=%r", kra, vra, kdec, vdec)
            continue
        return ra % 360.0, dec, kra
    return None, None, None


# ------------------------------------------------------------------ time
def _mjd_from_datetime(t: _dt.datetime) -> float:
    return (t - _MJD0).total_seconds() / 86400.0


def parse_date(value, time_value=None) -> float | None:
    """MJD from FITS DATE-OBS text ('YYYY-MM-DD[Thh:mm:ss[.s]]' or old 'DD/MM/YY')."""
    text = clean_text(value)
    if not text:
        return None
    m = re.fullmatch(r"(\d{2})/(\d{2})/(\d{2})", text)
    if m:  # FITS pre-2000 style: DD/MM/YY means 19YY
        text = f"19{m.group(3)}-{m.group(2)}-{m.group(1)}"
    text = text.rstrip("Z")
    if "T" not in text and time_value is not None:
        tv = clean_text(time_value)
        if tv:
            text = f"{text}T{tv}"
    try:
        t = _dt.datetime.fromisoformat(text)
    except ValueError:
        return None
    if t.tzinfo is not None:
        t = t.astimezone(_dt.timezone.utc).replace(tzinfo=None)
    return _mjd_from_datetime(t)


def _to_utc(mjd: float, timesys: str | None) -> float:
    """Convert an MJD in TAI or TT to UTC (ERFA's built-in leap-second table; offline)."""
    if not timesys:
        return mjd
    ts = timesys.strip().upper()
    if ts not in ("TAI", "TT", "TDT", "ET"):
        return mjd
    import erfa

    offset_s = 32.184 if ts != "TAI" else 0.0
    t = _MJD0 + _dt.timedelta(days=mjd)
    try:
        dat = float(erfa.dat(t.year, t.month, t.day, 0.5))
    except Exception:  # noqa: BLE001 - date outside ERFA's table: leave as is
        return mjd
    return mjd - (dat + offset_s) / 86400.0


def _time(h: HeaderView) -> tuple[float | None, str | None]:
    timesys = h.text("TIMESYS")
    exptime = h.number("EXPTIME")
    if exptime is None:
        exptime = h.number("EXPOSURE")
    half = exptime / 2.0 / 86400.0 if exptime and exptime > 0 else None

    def done(mjd, source, scale=None):
        if mjd is None or not (0.0 < mjd < 200000.0):
            return None
        return _to_utc(mjd, scale or timesys), source

    candidates = []
    v = h.number("MJD-AVG")
    candidates.append((v, "MJD-AVG"))
    candidates.append((parse_date(h.get("DATE-AVG")), "DATE-AVG"))
    beg, end = h.number("TAI-BEG"), h.number("TAI-END")
    if beg is not None and end is not None:
        out = done((beg + end) / 2.0 / 86400.0, "TAI-BEG/TAI-END mid-point", "TAI")
        if out:
            return out
    b, e = h.number("MJD-BEG"), h.number("MJD-END")
    if b is not None and e is not None:
        candidates.append(((b + e) / 2.0, "MJD-BEG/MJD-END mid-point"))
    b, e = parse_date(h.get("DATE-BEG")), parse_date(h.get("DATE-END"))
    if b is not None and e is not None:
        candidates.append(((b + e) / 2.0, "DATE-BEG/DATE-END mid-point"))
    for mjd, source in candidates:
        if mjd is not None:
            out = done(mjd, source)
            if out:
                return out
    start = h.number("MJD-OBS")
    source = "MJD-OBS"
    if start is None:
        _, tv = h.first("TIME-OBS", "UT", "UTC", "UT-START", "UTSTART")
        start = parse_date(h.get("DATE-OBS"), tv)
        source = "DATE-OBS"
    if start is not None:
        if half is not None:
            start += half
            source += " + EXPTIME/2"
        out = done(start, source)
        if out:
            return out
    tai = h.number("TAI")
    if tai is not None:
        out = done(tai / 86400.0, "TAI", "TAI")
        if out:
            return out
    mjd = h.number("MJD")
    if mjd is not None:
        out = done(mjd, "MJD (as written)")
        if out:
            return out
    return None, None


# ------------------------------------------------------------------ site
_SITE_TRIPLES = (
    ("LONGITUD", "LATITUDE", ("ALTITUDE", "HEIGHT", "ELEVATIO")),
    ("SITELONG", "SITELAT", ("SITEELEV", "SITEALT")),
    ("OBS-LONG", "OBS-LAT", ("OBS-ELEV", "OBS-ALT")),
    ("LONG-OBS", "LAT-OBS", ("ALT-OBS", "ELEV-OBS")),
    ("GEOLON", "GEOLAT", ("GEOELEV", "GEOALT")),
    ("OBSGEO-L", "OBSGEO-B", ("OBSGEO-H",)),
)


def _site(h: HeaderView):
    x, y, z = h.number("OBSGEO-X"), h.number("OBSGEO-Y"), h.number("OBSGEO-Z")
    if x is not None and y is not None and z is not None:
        r = math.sqrt(x * x + y * y + z * z)
        if 6.2e6 < r < 6.5e6:  # on the Earth's surface (metres)
            import astropy.units as u
            from astropy.coordinates import EarthLocation

            geo = EarthLocation.from_geocentric(x, y, z, unit=u.m).to_geodetic()
            return float(geo.lon.deg), float(geo.lat.deg), float(geo.height.to_value(u.m)), "OBSGEO-X/Y/Z"
        log.debug("ignoring OBSGEO-X/Y/Z at %.3g m from the geocentre", r)
    for klon, klat, kalts in sorted(_SITE_TRIPLES, key=lambda t: t[0] != "OBSGEO-L"):
        vlon, vlat = h.get(klon), h.get(klat)
        if vlon is None or vlat is None:
            continue
        lon, lat = _parse_angle(vlon, hours=False), _parse_angle(vlat, hours=False)
        if lon is None or lat is None or not (-90.0 <= lat <= 90.0) or not (-360 <= lon <= 360):
            continue
        if not -180.0 < lon <= 180.0:
            lon = (lon + 180.0) % 360.0 - 180.0
        height = None
        for ka in kalts:
            height = h.number(ka)
            if height is not None:
                break
        if height is not None and not (-500.0 <= height <= 9000.0):
            height = None
        return lon, lat, height, f"{klon}/{klat}"
    return None, None, None, None


# ------------------------------------------------------------------ frame, medium
_SPECSYS = {"TOPOCENT": "topocentric", "HELIOCEN": "heliocentric", "BARYCENT": "barycentric"}


def _frame(h: HeaderView) -> tuple[str, str | None, str | None]:
    specsys = h.text("SPECSYS")
    if specsys:
        key = specsys.upper()
        if key in _SPECSYS:
            return _SPECSYS[key], "SPECSYS", None
        return "unknown", "SPECSYS", specsys
    if as_bool(h.get("HELIO")):
        return "heliocentric", "HELIO", None
    return "unknown", None, None


def medium_from_header(h: HeaderView) -> str | None:
    """``'air'``/``'vacuum'`` from VACUUM or AIRORVAC/MEDIUM keywords; ``None`` if silent."""
    vac = as_bool(h.get("VACUUM"))
    if vac is not None:
        return "vacuum" if vac else "air"
    _, text = h.first("AIRORVAC", "MEDIUM", "WAVEMED")
    text = clean_text(text)
    if text:
        t = text.strip().lower()
        if t.startswith("air"):
            return "air"
        if t.startswith("vac"):
            return "vacuum"
    return None


_NAME_KEYS = ("OBJECT", "TARGNAME", "DESIGNATION", "DESIG", "OBJNAME", "OBJ_NAME", "TARGET", "NAME")


def header_meta(*headers: Mapping | None) -> dict[str, Any]:
    """SpectrumMeta keyword arguments (plus ``extra``) from one or more headers.

    Later headers override earlier ones (pass the primary header first).
    """
    h = headers[0] if len(headers) == 1 and isinstance(headers[0], HeaderView) else HeaderView(*headers)
    out: dict[str, Any] = {}
    extra: dict[str, Any] = {}
    key, name = h.first(*_NAME_KEYS)
    out["object_name"] = clean_text(name)
    ra, dec, kra = _radec(h)
    out["ra_deg"], out["dec_deg"] = ra, dec
    if kra:
        extra["radec_source"] = kra
    mjd, tsrc = _time(h)
    out["mjd"] = round(mjd, 10) if mjd is not None else None
    if tsrc:
        extra["time_source"] = tsrc
    lon, lat, height, ssrc = _site(h)
    out["site_lon_deg"], out["site_lat_deg"], out["site_height_m"] = lon, lat, height
    if ssrc:
        extra["site_source"] = ssrc
    frame, fsrc, specsys = _frame(h)
    out["frame"] = frame
    if fsrc:
        extra["frame_source"] = fsrc
    if specsys:
        extra["specsys"] = specsys
    for k in ("TELESCOP", "INSTRUME", "OBSERVAT"):
        t = h.text(k)
        if t:
            extra[k.lower()] = t
    bunit = h.text("BUNIT")
    if bunit:
        out["flux_unit"] = bunit
    out["extra"] = extra
    return out
