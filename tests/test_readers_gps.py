"""GPS readers: GPX 1.1 (hardened XML), NMEA 0183 RMC/GGA with checksums, CSV; fix checks."""

from __future__ import annotations

import pynmea2
import pytest

from agent.errors import RejectedInput
from agent.intake import featurise
from agent.intake.readers.gps import check_sentence, drop_speed_outliers, nmea_checksum

T0 = 1793793600.0          # 2026-11-04T12:00:00Z
NOW = T0 + 86400.0
ISO0 = "2026-11-04T12:00:00Z"

# The sentence widely reproduced in NMEA 0183 tutorials (from memory); its
# checksum is also checked against pynmea2 below.
GGA_EXAMPLE = "$GPGGA,123519,4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,*47"


def sentence(body: str) -> str:
    """A sentence with its checksum computed by pynmea2 (reference) when installed."""
    try:
        import pynmea2

        cs = pynmea2.NMEASentence.checksum(body)
    except ImportError:  # pragma: no cover
        cs = 0
        for ch in body:
            cs ^= ord(ch)
    return f"${body}*{cs:02X}"


def feat(name, text, policy, **kw):
    data = text.encode() if isinstance(text, str) else text
    return featurise(name, data, policy, now=kw.pop("now", NOW))


def reason(name, text, policy, **kw):
    with pytest.raises(RejectedInput) as e:
        feat(name, text, policy, **kw)
    return e.value.reason


# --- NMEA checksum -----------------------------------------------------------
def test_checksum_of_the_published_gga_example_is_47():
    body = GGA_EXAMPLE[1:].split("*")[0]
    assert nmea_checksum(body) == 0x47


def test_checksum_routine_agrees_with_pynmea2():
    # Reference implementation: pynmea2.NMEASentence.checksum.
    for body in ("GPRMC,123519,A,4807.038,N,01131.000,E,022.4,084.4,230394,003.1,W",
                 "GNGGA,000001.00,3831.800,N,02837.800,W,1,07,1.1,10.0,M,50.0,M,,"):
        assert nmea_checksum(body) == pynmea2.NMEASentence.checksum(body)


def test_example_sentence_verifies():
    assert check_sentence(GGA_EXAMPLE) is not None


def test_sentence_with_a_wrong_checksum_is_refused():
    assert check_sentence(GGA_EXAMPLE[:-2] + "48") is None


def test_sentence_with_a_changed_field_is_refused():
    assert check_sentence(GGA_EXAMPLE.replace("4807.038", "4807.039")) is None


def test_sentence_without_checksum_is_refused():
    assert check_sentence(GGA_EXAMPLE.split("*")[0]) is None


# --- NMEA files --------------------------------------------------------------
def rmc(hhmmss, lat="3831.800", lon="02837.800", date="041126", status="A", talker="GP"):
    return sentence(f"{talker}RMC,{hhmmss},{status},{lat},N,{lon},W,0.0,0.0,{date},,,A")


def gga(hhmmss, lat="3831.800", lon="02837.800", q="1", hdop="1.2", talker="GP"):
    return sentence(f"{talker}GGA,{hhmmss},{lat},N,{lon},W,{q},08,{hdop},12.0,M,50.0,M,,")


def test_nmea_rmc_position_and_date(default_policy):
    r = feat("a.nmea", rmc("120000.00") + "\n", default_policy)
    (sfx, f), = r.rows["gps_fixes"]
    assert sfx == ":0"
    assert f["t"] == T0
    # 38 deg 31.800 min N, 28 deg 37.800 min W
    assert f["lat"] == pytest.approx(38 + 31.8 / 60) and f["lon"] == pytest.approx(-(28 + 37.8 / 60))


def test_nmea_position_agrees_with_pynmea2(default_policy):
    # Reference implementation: pynmea2's latitude/longitude of the example.
    s = rmc("120000.00", lat="4807.038", lon="01131.000").replace(",W,", ",E,", 1)
    s = sentence(s[1:].split("*")[0])
    ref = pynmea2.parse(s, check=True)
    (_, f), = feat("a.nmea", s, default_policy).rows["gps_fixes"]
    assert f["lat"] == pytest.approx(ref.latitude) and f["lon"] == pytest.approx(ref.longitude)


def test_gga_takes_the_date_of_the_last_rmc_and_merges_at_the_same_time(default_policy):
    text = "\n".join([rmc("120000"), gga("120000", hdop="1.5"), gga("120010")])
    rows = feat("a.nmea", text, default_policy).rows["gps_fixes"]
    assert [f["t"] for _, f in rows] == [T0, T0 + 10]
    assert rows[0][1]["acc_m"] == pytest.approx(1.5 * 5.0)   # HDOP from the GGA


def test_gga_before_the_first_rmc_takes_its_date(default_policy):
    text = "\n".join([gga("115959"), rmc("120000")])
    rows = feat("a.nmea", text, default_policy).rows["gps_fixes"]
    assert [f["t"] for _, f in rows] == [T0 - 1, T0]


def test_gga_after_midnight_rolls_the_date_over(default_policy):
    text = "\n".join([rmc("235959", date="031126"), gga("000001")])
    rows = feat("a.nmea", text, default_policy).rows["gps_fixes"]
    assert rows[1][1]["t"] - rows[0][1]["t"] == 2.0


def test_gn_talker_is_accepted(default_policy):
    r = feat("a.nmea", rmc("120000", talker="GN"), default_policy)
    assert len(r.rows["gps_fixes"]) == 1


def test_bad_checksums_are_counted_and_skipped(default_policy):
    bad = rmc("120005")[:-2] + "00"
    r = feat("a.nmea", "\n".join([rmc("120000"), bad, rmc("120010")]), default_policy)
    assert len(r.rows["gps_fixes"]) == 2
    assert r.dropped["bad_checksum"] == 1
    assert any("bad checksum" in w for w in r.warnings)


def test_void_fixes_are_skipped(default_policy):
    r = feat("a.nmea", "\n".join([rmc("120000"), rmc("120010", status="V"), gga("120020", q="0")]),
             default_policy)
    assert len(r.rows["gps_fixes"]) == 1 and r.dropped["void"] == 2


def test_nmea_with_only_bad_checksums_is_rejected(default_policy):
    text = "\n".join(s[:-2] + "00" for s in (rmc("120000"), gga("120001")))
    assert reason("a.nmea", text, default_policy) == "bad_checksum_all"


def test_nmea_without_rmc_or_gga_has_no_fixes(default_policy):
    assert reason("a.nmea", sentence("GPGSA,A,3,,,,,,,,,,,,,1.0,1.0,1.0"), default_policy) == "no_fixes"


def test_nmea_with_a_year_before_2000_is_rejected(default_policy):
    assert reason("a.nmea", rmc("123519", date="230394"), default_policy) == "bad_timestamp"


# --- GPX -------------------------------------------------------------------
def gpx(points: str) -> str:
    return ('<?xml version="1.0" encoding="UTF-8"?>\n'
            '<gpx version="1.1" creator="test" xmlns="http://www.topografix.com/GPX/1/1">'
            f"<trk><trkseg>{points}</trkseg></trk></gpx>")


def trkpt(lat, lon, t, hdop=None):
    h = f"<hdop>{hdop}</hdop>" if hdop is not None else ""
    return f'<trkpt lat="{lat}" lon="{lon}"><ele>3.0</ele><time>{t}</time>{h}</trkpt>'


def test_gpx_track_points(default_policy):
    r = feat("t.gpx", gpx(trkpt(38.53, -28.63, ISO0, 1.0) + trkpt(38.5301, -28.63, "2026-11-04T12:05:00Z")),
             default_policy)
    rows = [f for _, f in r.rows["gps_fixes"]]
    assert [f["t"] for f in rows] == [T0, T0 + 300]
    assert rows[0]["acc_m"] == 5.0 and rows[1]["acc_m"] is None
    assert r.kind == "gps" and r.n_samples == 2


def test_gpx_without_namespace_is_accepted(default_policy):
    doc = f'<gpx version="1.1"><trk><trkseg>{trkpt(1.0, 2.0, ISO0)}</trkseg></trk></gpx>'
    assert len(feat("t.gpx", doc, default_policy).rows["gps_fixes"]) == 1


def test_gpx_10_namespace_is_refused(default_policy):
    doc = gpx(trkpt(1.0, 2.0, ISO0)).replace("GPX/1/1", "GPX/1/0")
    assert reason("t.gpx", doc, default_policy) == "xml_invalid"


def test_gpx_high_hdop_fix_is_dropped(default_policy):
    r = feat("t.gpx", gpx(trkpt(1.0, 2.0, ISO0, 50) + trkpt(1.0, 2.0, "2026-11-04T12:01:00Z")), default_policy)
    assert len(r.rows["gps_fixes"]) == 1 and r.dropped["poor_accuracy"] == 1


def test_gpx_doctype_is_refused_even_without_entities(default_policy):
    doc = '<?xml version="1.0"?><!DOCTYPE gpx>' + gpx("")[39:]
    assert reason("t.gpx", doc, default_policy) == "xml_unsafe"


# --- CSV and fix validation ------------------------------------------------
def csv(*rows, header="time,lat,lon,accuracy_m"):
    return header + "\n" + "\n".join(rows) + "\n"


def test_csv_fixes_with_offset_times(default_policy):
    r = feat("x.gps.csv", csv("2026-11-04T13:00:00+01:00,38.53,-28.63,8"), default_policy)
    (_, f), = r.rows["gps_fixes"]
    assert f == {"t": T0, "lat": 38.53, "lon": -28.63, "acc_m": 8.0}


def test_csv_without_accuracy_column(default_policy):
    r = feat("x.gps.csv", csv(f"{ISO0},38.53,-28.63", header="time,lat,lon"), default_policy)
    assert r.rows["gps_fixes"][0][1]["acc_m"] is None


def test_csv_naive_time_is_a_bad_timestamp(default_policy):
    assert reason("x.gps.csv", csv("2026-11-04T12:00:00,38.53,-28.63,8"), default_policy) == "bad_timestamp"


def test_one_out_of_range_fix_among_good_ones_is_dropped(default_policy):
    r = feat("x.gps.csv", csv(f"{ISO0},38.53,-28.63,8", "2026-11-04T12:05:00Z,91.0,-28.63,8"), default_policy)
    assert len(r.rows["gps_fixes"]) == 1 and r.dropped["out_of_range"] == 1


def test_inaccurate_fix_is_dropped(default_policy):
    r = feat("x.gps.csv", csv(f"{ISO0},38.53,-28.63,8", "2026-11-04T12:05:00Z,38.53,-28.63,500"),
             default_policy)
    assert len(r.rows["gps_fixes"]) == 1 and r.dropped["poor_accuracy"] == 1


def test_duplicate_times_keep_one_fix(default_policy):
    r = feat("x.gps.csv", csv(f"{ISO0},38.53,-28.63,8", f"{ISO0},38.53,-28.63,8"), default_policy)
    assert len(r.rows["gps_fixes"]) == 1 and r.dropped["duplicate"] == 1


def test_fixes_are_returned_in_time_order(default_policy):
    r = feat("x.gps.csv", csv("2026-11-04T12:05:00Z,38.53,-28.63,8", f"{ISO0},38.5301,-28.63,8"),
             default_policy)
    assert [f["t"] for _, f in r.rows["gps_fixes"]] == [T0, T0 + 300]


def test_a_spike_faster_than_the_speed_limit_is_dropped(default_policy):
    # 0.1 deg of latitude (about 11 km) in 60 s is about 185 m/s > 70 m/s.
    rows = [f"2026-11-04T12:0{i}:00Z,{lat},-28.63,8" for i, lat in enumerate([38.53, 38.5301, 38.63, 38.5302])]
    r = feat("x.gps.csv", csv(*rows), default_policy)
    assert [f["lat"] for _, f in r.rows["gps_fixes"]] == [38.53, 38.5301, 38.5302]
    assert r.dropped["speed"] == 1


def fx(t, lat):
    return {"t": T0 + t, "lat": lat, "lon": 0.0}


def test_speed_filter_drops_a_bad_first_fix():
    fixes = [fx(0, 10.0), fx(60, 0.0), fx(120, 0.0001)]
    kept, n = drop_speed_outliers(fixes, 70.0)
    assert kept == fixes[1:] and n == 1


def test_speed_filter_keeps_a_jump_confirmed_by_the_next_fix():
    fixes = [fx(0, 0.0), fx(60, 0.0001), fx(120, 0.1), fx(180, 0.1001)]
    kept, n = drop_speed_outliers(fixes, 70.0)
    assert kept == fixes and n == 0


def test_speed_filter_drops_a_final_spike():
    fixes = [fx(0, 0.0), fx(60, 0.0001), fx(120, 1.0)]
    kept, n = drop_speed_outliers(fixes, 70.0)
    assert kept == fixes[:2] and n == 1


def test_billion_laughs_is_refused_at_the_doctype_before_any_expansion(default_policy):
    # defusedxml with forbid_dtd raises DTDForbidden at the <!DOCTYPE> start
    # handler, before the parser reads a single entity declaration.
    lol = "".join(f'<!ENTITY l{i} "{("&l" + str(i - 1) + ";") * 10 if i else "lol"}">' for i in range(10))
    doc = f'<?xml version="1.0"?><!DOCTYPE gpx [{lol}]><gpx version="1.1"><name>&l9;</name></gpx>'
    with pytest.raises(RejectedInput) as e:
        feat("t.gpx", doc, default_policy)
    assert e.value.reason == "xml_unsafe" and "DTDForbidden" in e.value.detail
