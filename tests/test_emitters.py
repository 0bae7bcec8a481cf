"""Known-emitter list and matching.

Check values: GPS L1 carrier 1575.42 MHz (IS-GPS-200, section 3.3.1.1) and its 20.46 MHz
band (2 x 10.23 MHz, from memory); the 1400-1427 MHz passive band (ITU Radio Regulations
No. 5.340); GSM-900 downlink 925-960 MHz (3GPP TS 45.005).  All from memory of those documents.
"""

import pytest

from rfisieve.review.emitters import load_emitters, match_emitters
from rfisieve.errors import ConfigError


@pytest.fixture(scope="module")
def shipped():
    return load_emitters()


def test_every_entry_names_a_source(shipped):
    assert len(shipped) >= 20
    for e in shipped:
        assert e["source"] and e["source"] != "not given", e["name"]
        assert e["kind"] in ("emitter", "protected")
        assert e["start_mhz"] < e["stop_mhz"]


def test_gps_l1_channel_is_annotated(shipped):
    # a 0.2 MHz channel centred on the GPS L1 carrier, 1575.42 MHz (IS-GPS-200)
    names = [e["name"] for e in match_emitters(1575.32, 1575.52, shipped)]
    assert "GPS L1" in names
    gps = next(e for e in shipped if e["name"] == "GPS L1")
    assert (gps["start_mhz"] + gps["stop_mhz"]) / 2 == pytest.approx(1575.42)   # IS-GPS-200
    assert gps["stop_mhz"] - gps["start_mhz"] == pytest.approx(20.46)          # 2 x 10.23 MHz (from memory)


def test_protected_and_mobile_bands(shipped):
    hits = match_emitters(1420.0, 1420.5, shipped)
    assert any(e["kind"] == "protected" and e["start_mhz"] == 1400.0 and e["stop_mhz"] == 1427.0 for e in hits)  # RR 5.340
    hits = match_emitters(940.0, 941.0, shipped)
    assert any(e["start_mhz"] == 925.0 and e["stop_mhz"] == 960.0 for e in hits)  # 3GPP TS 45.005
    assert match_emitters(1450.0, 1451.0, shipped) == []  # nothing listed there (common practice: quiet gap)


def test_touching_edges_do_not_match():
    em = [{"name": "x", "start_mhz": 10.0, "stop_mhz": 20.0, "kind": "emitter", "source": "test"}]
    assert match_emitters(20.0, 25.0, em) == []
    assert match_emitters(19.0, 25.0, em) == em
    assert match_emitters(15.0, 15.0, em) == em


def test_site_entries_are_merged(tmp_path):
    (tmp_path / "L.yaml").write_text(
        "band: L\nemitters:\n  - {name: Site radar, start_mhz: 1300, stop_mhz: 1301, source: site survey}\n")
    em = load_emitters(bands_dir=str(tmp_path))
    site = [e for e in em if e["name"] == "Site radar"]
    assert site and site[0]["site"] == "L" and site[0]["kind"] == "emitter"
    assert "Site radar" in [e["name"] for e in match_emitters(1300.2, 1300.4, em)]


def test_bad_entry_is_config_error(tmp_path):
    p = tmp_path / "em.yaml"
    p.write_text("emitters:\n  - {name: broken, start_mhz: 5}\n")
    with pytest.raises(ConfigError) as err:
        load_emitters(str(p))
    assert "stop_mhz" in str(err.value) and str(p) in str(err.value)


def test_gps_l1_cites_its_interface_document(shipped):
    # IS-GPS-200, section 3.3.1.1 (frequency plan): L1 = 1575.42 MHz
    gps = next(e for e in shipped if e["name"] == "GPS L1")
    assert "IS-GPS-200" in gps["source"] and "3.3.1.1" in gps["source"] and "1575.42" in gps["source"]


def test_duplicate_names_are_merged(tmp_path):
    from rfisieve.review.emitters import in_band, merge_duplicates

    (tmp_path / "L.yaml").write_text(
        "band: L\nemitters:\n"
        "  - {name: GLONASS L1, start_mhz: 1597.5, stop_mhz: 1606.5, source: 'GLONASS ICD (from memory)'}\n"
        "  - {name: Site radar, start_mhz: 1300, stop_mhz: 1301, source: site survey}\n")
    em = load_emitters(bands_dir=str(tmp_path))
    shown = merge_duplicates(in_band(em, 1590.0, 1610.0))
    glonass = [e for e in shown if "glonass l1" in e["name"].lower()]
    assert len(glonass) == 1 and glonass[0]["site"] is None           # the shipped entry is kept
    assert glonass[0]["also"] == [("config/bands/L.yaml", "GLONASS ICD (from memory)")]
    # different names, or ranges that do not overlap, stay apart
    assert len(merge_duplicates(in_band(em, 1290.0, 1310.0))) == len(in_band(em, 1290.0, 1310.0))


def test_aliases_merge_a_site_entry_into_the_shipped_one(tmp_path):
    from rfisieve.review.emitters import in_band, merge_duplicates

    (tmp_path / "L.yaml").write_text(
        "band: L\nemitters:\n  - {name: Aircraft DME, start_mhz: 962, stop_mhz: 1213, source: 'site list'}\n")
    em = load_emitters(bands_dir=str(tmp_path))
    names = [e["name"] for e in merge_duplicates(in_band(em, 1000.0, 1010.0))]
    assert "Aircraft DME" not in names and "DME / TACAN" in names   # "aliases" in config/emitters.yaml
