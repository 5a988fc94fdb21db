"""GPS fixes from GPX 1.1, NMEA 0183 (RMC, GGA) and CSV, validated against the policy.

Every fix passes the same checks, in :func:`validate_fixes`: latitude in
[-90, 90] and longitude in [-180, 180] (``out_of_range``), a plausible time
(``bad_timestamp``), HDOP at most ``intake.gps_max_hdop`` and accuracy at most
``intake.gps_max_accuracy_m`` (``poor_accuracy``), one fix per time
(``duplicate``), and no implausible jump (``speed``: a fix reached faster than
``intake.gps_max_speed_mps`` from its predecessor is dropped as an outlier).
Dropped fixes are counted in the result; a file with no usable fix is
rejected, with the most frequent drop reason as its code.
"""

from __future__ import annotations

import math
from collections import Counter
from datetime import datetime, UTC

from ...geo import haversine_m
from ..item import ItemResult
from ._common import decode_text, now_or, parse_iso, plausible_time, reject

GPX11_NS = "http://www.topografix.com/GPX/1/1"
# Horizontal accuracy is estimated as HDOP times a nominal user-equivalent
# range error of 5 m (common practice, no source) when a format gives only HDOP.
UERE_M = 5.0
# No single line of a sensible NMEA log is this long (the standard caps a
# sentence at 82 characters).
NMEA_MAX_LINE = 256


# ---------------------------------------------------------------------------
def read_gps(path, data: bytes, policy, *, suffix: str | None = None,
             now: float | None = None) -> ItemResult:
    """Parse and validate a GPS file; rows go to ``gps_fixes``."""
    now = now_or(now)
    suffix = suffix or ".gpx"
    if suffix == ".gpx":
        fixes, counts = parse_gpx(path, data)
    elif suffix == ".nmea":
        fixes, counts = parse_nmea(path, data)
    else:
        fixes, counts = parse_gps_csv(path, data)
    return _result(path, fixes, counts, policy, now)


def _result(path, fixes, counts: Counter, policy, now: float) -> ItemResult:
    n_read = len(fixes)
    if n_read == 0:
        reject(path, "no_fixes", "the file holds no position fix" + _counts_note(counts))
    kept, drops = validate_fixes(fixes, policy, now)
    counts.update(drops)
    if not kept:
        worst = max(drops.items(), key=lambda kv: kv[1])[0] if drops else "no_fixes"
        reject(path, worst, f"none of the {n_read} fixes is usable" + _counts_note(drops))
    rows = [(f":{i}", {"t": f["t"], "lat": f["lat"], "lon": f["lon"], "acc_m": f["acc_m"]})
            for i, f in enumerate(kept)]
    warnings = [f"{v} {k.replace('_', ' ')} skipped" for k, v in sorted(counts.items()) if v]
    return ItemResult(kind="gps", rows={"gps_fixes": rows}, warnings=warnings,
                      n_samples=n_read, dropped=dict(counts),
                      t_start=kept[0]["t"], t_end=kept[-1]["t"])


def _counts_note(counts) -> str:
    c = {k: v for k, v in counts.items() if v}
    return (" (" + ", ".join(f"{k}: {v}" for k, v in sorted(c.items())) + ")") if c else ""


# ---------------------------------------------------------------------------
def validate_fixes(fixes: list[dict], policy, now: float) -> tuple[list[dict], Counter]:
    """Apply the fix checks; returns ``(kept fixes sorted by time, drop counts)``.

    Each fix is a dict with ``t``, ``lat``, ``lon`` and optional ``acc_m`` and
    ``hdop``; kept fixes carry ``t``, ``lat``, ``lon``, ``acc_m``.
    """
    it = policy.intake
    drops: Counter = Counter()
    good = []
    for f in fixes:
        lat, lon, t = f["lat"], f["lon"], f["t"]
        if not (math.isfinite(lat) and math.isfinite(lon) and -90.0 <= lat <= 90.0
                and -180.0 <= lon <= 180.0):
            drops["out_of_range"] += 1
            continue
        if t is None or plausible_time(t, now):
            drops["bad_timestamp"] += 1
            continue
        hdop = f.get("hdop")
        acc = f.get("acc_m")
        if hdop is not None and not (math.isfinite(hdop) and 0.0 < hdop <= it.gps_max_hdop):
            drops["poor_accuracy"] += 1
            continue
        if acc is None and hdop is not None:
            acc = hdop * UERE_M
        if acc is not None and not (math.isfinite(acc) and 0.0 <= acc <= it.gps_max_accuracy_m):
            drops["poor_accuracy"] += 1
            continue
        good.append({"t": float(t), "lat": float(lat), "lon": float(lon),
                     "acc_m": None if acc is None else float(acc)})
    good.sort(key=lambda f: float(f["t"] or 0.0))
    unique: list[dict] = []
    for f in good:
        if unique and f["t"] == unique[-1]["t"]:
            drops["duplicate"] += 1
            continue
        unique.append(f)
    kept, n_out = drop_speed_outliers(unique, it.gps_max_speed_mps)
    if n_out:
        drops["speed"] += n_out
    return kept, drops


def drop_speed_outliers(fixes: list[dict], max_speed_mps: float) -> tuple[list[dict], int]:
    """Drop isolated fixes that imply a speed above ``max_speed_mps``.

    Walking the time-sorted fixes, a fix reached too fast from the last kept
    one is an outlier when the fix after it is reachable from the last kept
    one (a spike) or when it is the last fix (no evidence it is real).  If the
    very first fix is the odd one out (the next two agree with each other but
    not with it), the first fix is dropped instead.  A jump confirmed by the
    following fix is kept: the device really moved.
    """
    if len(fixes) < 2:
        return list(fixes), 0

    def speed(a, b):
        dt = b["t"] - a["t"]
        d = haversine_m(a["lat"], a["lon"], b["lat"], b["lon"])
        return d / dt if dt > 0 else math.inf

    kept = [fixes[0]]
    dropped = 0
    n = len(fixes)
    for i in range(1, n):
        f = fixes[i]
        if speed(kept[-1], f) <= max_speed_mps:
            kept.append(f)
            continue
        nxt = fixes[i + 1] if i + 1 < n else None
        if nxt is None or speed(kept[-1], nxt) <= max_speed_mps:
            dropped += 1
            continue
        if len(kept) == 1 and speed(f, nxt) <= max_speed_mps:
            kept[0] = f  # the first fix was the outlier
            dropped += 1
            continue
        kept.append(f)
    return kept, dropped


# ---------------------------------------------------------------------------
# GPX 1.1
# ---------------------------------------------------------------------------
def parse_gpx(path, data: bytes) -> tuple[list[dict], Counter]:
    """Track points of a GPX 1.1 document, parsed with DTDs and entities forbidden.

    defusedxml refuses a document type declaration outright, so an entity
    expansion bomb or an external entity fails at the ``<!DOCTYPE`` before
    anything is expanded or fetched.
    """
    import defusedxml
    from defusedxml.ElementTree import fromstring
    from xml.etree.ElementTree import ParseError

    try:
        root = fromstring(data, forbid_dtd=True, forbid_entities=True, forbid_external=True)
    except defusedxml.DefusedXmlException as e:
        reject(path, "xml_unsafe", f"{type(e).__name__}: DTDs, entities and external "
                                   "references are not allowed in GPX")
    except ParseError as e:
        reject(path, "xml_invalid", f"not well-formed XML ({_parse_pos(e)})")
    except (ValueError, RecursionError) as e:
        reject(path, "xml_invalid", f"not well-formed XML ({type(e).__name__})")
    ns, local = _split(root.tag)
    if local != "gpx" or ns not in (GPX11_NS, ""):
        reject(path, "xml_invalid", "the root element is not <gpx> in the GPX 1.1 namespace")
    q = (lambda name: f"{{{ns}}}{name}") if ns else (lambda name: name)
    counts: Counter = Counter()
    fixes = []
    for trk in root.iter(q("trk")):
        for seg in trk.iter(q("trkseg")):
            for pt in seg.iter(q("trkpt")):
                try:
                    lat = float(pt.get("lat", "nan"))
                    lon = float(pt.get("lon", "nan"))
                except ValueError:
                    lat = lon = math.nan
                ttext = pt.findtext(q("time"))
                try:
                    t = parse_iso(ttext) if ttext else None
                except (ValueError, OverflowError):
                    t = None
                hdop = None
                htext = pt.findtext(q("hdop"))
                if htext is not None:
                    try:
                        hdop = float(htext)
                    except ValueError:
                        hdop = math.nan
                fixes.append({"t": t, "lat": lat, "lon": lon, "hdop": hdop})
    return fixes, counts


def _split(tag: str) -> tuple[str, str]:
    if tag.startswith("{"):
        ns, _, local = tag[1:].partition("}")
        return ns, local
    return "", tag


def _parse_pos(e) -> str:
    pos = getattr(e, "position", None)
    return f"line {pos[0]}, column {pos[1]}" if pos else "parse error"


# ---------------------------------------------------------------------------
# NMEA 0183
# ---------------------------------------------------------------------------
def nmea_checksum(body: str) -> int:
    """XOR of the characters between ``$`` and ``*`` (NMEA 0183)."""
    c = 0
    for ch in body.encode("ascii", "replace"):
        c ^= ch
    return c


def check_sentence(line: str) -> str | None:
    """The body of a sentence whose checksum verifies, else ``None``."""
    line = line.strip()
    if not line.startswith("$") or len(line) > NMEA_MAX_LINE:
        return None
    body, star, cs = line[1:].rpartition("*")
    if not star or len(cs) != 2:
        return None
    try:
        want = int(cs, 16)
    except ValueError:
        return None
    if not body.isascii() or nmea_checksum(body) != want:
        return None
    return body


def _nmea_angle(value: str, hemi: str, deg_digits: int) -> float:
    if not value or hemi not in ("N", "S", "E", "W"):
        raise ValueError("empty position field")
    deg = int(value[:deg_digits])
    minutes = float(value[deg_digits:])
    if not 0.0 <= minutes < 60.0:
        raise ValueError("minutes out of range")
    x = deg + minutes / 60.0
    return -x if hemi in ("S", "W") else x


def _nmea_tod(value: str) -> float:
    if len(value) < 6:
        raise ValueError("short time field")
    h, m, s = int(value[0:2]), int(value[2:4]), float(value[4:])
    if not (0 <= h < 24 and 0 <= m < 60 and 0.0 <= s < 61.0):
        raise ValueError("time field out of range")
    return h * 3600 + m * 60 + s


def _nmea_date(value: str) -> float:
    if len(value) != 6:
        raise ValueError("date field must be ddmmyy")
    d, mo, y = int(value[0:2]), int(value[2:4]), int(value[4:6])
    # Two-digit years pivot at 1980, the GPS epoch; years before 2000 are then
    # refused by the plausibility check rather than mistaken for this century.
    year = 1900 + y if y >= 80 else 2000 + y
    return datetime(year, mo, d, tzinfo=UTC).timestamp()


def parse_nmea(path, data: bytes) -> tuple[list[dict], Counter]:
    """RMC and GGA fixes from an NMEA 0183 log.

    Sentences with a missing or wrong checksum are counted (``bad_checksum``)
    and skipped, and so are void fixes (RMC status ``V``, GGA quality 0).  A
    GGA takes its date from the most recent valid RMC, rolling over midnight
    when its time of day is more than 12 h earlier; GGAs before the first
    valid RMC take that RMC's date.  An RMC and a GGA at the same time are one
    fix (the GGA contributes its HDOP).
    """
    text = data.decode("ascii", errors="replace")
    counts: Counter = Counter()
    n_good = 0
    by_time: dict[float, dict] = {}
    pending: list[tuple[float, dict]] = []   # GGAs waiting for a date
    day = None                               # (midnight Unix s, time of day of that RMC)
    for line in text.splitlines():
        if not line.strip():
            continue
        body = check_sentence(line)
        if body is None:
            counts["bad_checksum"] += 1
            continue
        n_good += 1
        fields = body.split(",")
        kind = fields[0][2:] if len(fields[0]) == 5 else ""
        try:
            if kind == "RMC" and len(fields) >= 10:
                if fields[2] != "A":
                    counts["void"] += 1
                    continue
                tod = _nmea_tod(fields[1])
                midnight = _nmea_date(fields[9])
                lat = _nmea_angle(fields[3], fields[4], 2)
                lon = _nmea_angle(fields[5], fields[6], 3)
                if day is None and pending:
                    for gtod, g in pending:
                        g["t"] = midnight + gtod - (86400.0 if gtod > tod + 43200 else 0.0)
                        by_time.setdefault(round(g["t"], 3), g)
                    pending.clear()
                day = (midnight, tod)
                t = midnight + tod
                fix = by_time.setdefault(round(t, 3), {"t": t, "lat": lat, "lon": lon, "hdop": None})
            elif kind == "GGA" and len(fields) >= 9:
                if fields[6] in ("", "0"):
                    counts["void"] += 1
                    continue
                tod = _nmea_tod(fields[1])
                lat = _nmea_angle(fields[2], fields[3], 2)
                lon = _nmea_angle(fields[4], fields[5], 3)
                hdop = float(fields[8]) if fields[8] else None
                g = {"t": None, "lat": lat, "lon": lon, "hdop": hdop}
                if day is None:
                    pending.append((tod, g))
                    continue
                midnight, rtod = day
                t = midnight + tod + (86400.0 if tod < rtod - 43200 else 0.0)
                g["t"] = t
                fix = by_time.setdefault(round(t, 3), g)
                if fix is not g and fix.get("hdop") is None:
                    fix["hdop"] = hdop
            else:
                counts["other_sentence"] += 1
        except (ValueError, IndexError, OverflowError):
            counts["bad_field"] += 1
    if pending:
        counts["no_date"] += len(pending)
    if n_good == 0 and counts["bad_checksum"]:
        reject(path, "bad_checksum_all",
               f"none of the {counts['bad_checksum']} sentences has a valid checksum")
    counts.pop("other_sentence", None)  # not a defect: GSA, GSV, VTG … are expected
    return list(by_time.values()), counts


# ---------------------------------------------------------------------------
# CSV
# ---------------------------------------------------------------------------
_GPS_HEADERS = (("time", "lat", "lon"), ("time", "lat", "lon", "accuracy_m"))


def parse_gps_csv(path, data: bytes) -> tuple[list[dict], Counter]:
    """Rows of ``time,lat,lon[,accuracy_m]``; malformed rows are counted and skipped."""
    text = decode_text(path, data)
    lines = text.splitlines()
    if not lines:
        reject(path, "bad_header", "no header line")
    header = tuple(h.strip().lower() for h in lines[0].split(","))
    if header not in _GPS_HEADERS:
        reject(path, "bad_header", "expected the header 'time,lat,lon' or 'time,lat,lon,accuracy_m'")
    width = len(header)
    counts: Counter = Counter()
    fixes = []
    for line in lines[1:]:
        if not line.strip():
            continue
        parts = line.split(",")
        if len(parts) != width:
            counts["bad_row"] += 1
            continue
        try:
            t = parse_iso(parts[0])
        except (ValueError, OverflowError):
            t = None
        try:
            lat, lon = float(parts[1]), float(parts[2])
            acc = float(parts[3]) if width == 4 and parts[3].strip() else None
        except ValueError:
            counts["bad_row"] += 1
            continue
        fixes.append({"t": t, "lat": lat, "lon": lon, "acc_m": acc})
    return fixes, counts
