"""Header records of SPS and SEG-P1 state every value whole, for CRSs with long names.

CRS names, datums and projection parameters are read through pyproj (the EPSG dataset it
ships), independently of the writers' formatting.
"""

from __future__ import annotations

import pytest
from pyproj import CRS

from archive.deliver.headers import header_record, wrap_data
from archive.deliver.segp1 import write_segp1
from archive.deliver.sps import write_sps
from archive.errors import Refused
from tests.support.delivery_tables import context, final_table

# Long-named CRSs of several projection methods (EPSG dataset via pyproj):
# 2193 NZTM2000 (Transverse Mercator), 2056 CH1903+ / LV95 (Hotine Oblique Mercator B),
# 6473 NAD83(2011) / Kentucky Single Zone (ftUS) (Lambert 2SP), 3035 LAEA Europe.
LONG_CRS = (2193, 2056, 6473, 3035)


def _squash(text: str) -> str:
    return "".join(text.split())


def _table(epsg: int):
    crs = CRS.from_epsg(epsg)
    # a point inside the CRS's area of use, projected with pyproj
    from pyproj import Transformer

    a = crs.area_of_use
    lon, lat = (a.west + a.east) / 2, (a.south + a.north) / 2
    e, n = Transformer.from_crs(4326, epsg, always_xy=True).transform(lon, lat)
    t = final_table(2, east0=e, north0=n)
    return t


@pytest.mark.parametrize("epsg", LONG_CRS)
def test_sps_headers_state_every_value_whole(epsg):
    crs = CRS.from_epsg(epsg)
    text = write_sps(_table(epsg), context(crs_epsg=epsg)).decode("ascii")
    heads = [r for r in text.splitlines() if r.startswith("H")]
    assert all(len(r) == 80 for r in heads)
    h13 = next(i for i, r in enumerate(heads) if r.startswith("H13 "))
    assert heads[h13][32:].startswith(f"EPSG:{epsg} ")  # the code first, never cut
    data = " ".join(r[32:].strip() for r in heads)
    assert _squash(f"EPSG:{epsg} {crs.name}") in _squash(data)
    assert _squash(crs.datum.name) in _squash(data)
    op = crs.coordinate_operation
    assert _squash(op.method_name) in _squash(data)
    for p in op.params:
        assert _squash(f"{p.name} = {p.value:.12g} {p.unit_name}") in _squash(data)
    assert "a" * 48 in data and "b" * 48 in data


@pytest.mark.parametrize("epsg", LONG_CRS)
def test_segp1_headers_state_every_value_whole(epsg):
    crs = CRS.from_epsg(epsg)
    text = write_segp1(_table(epsg), context(crs_epsg=epsg)).decode("ascii")
    heads = [r for r in text.splitlines() if r.startswith("H")]
    assert len(heads) == 20 and all(len(r) == 80 for r in heads)
    data = _squash(" ".join(r[4:] for r in heads))
    assert _squash(f"EPSG:{epsg} {crs.name}") in data
    assert _squash(crs.datum.name) in data
    op = crs.coordinate_operation
    # every parameter value is stated (compact names), e.g. 2056 k=1, E=2600000, N=1200000
    for p in op.params:
        assert f"={p.value:.12g}" in data, p.name
    assert "a" * 64 in data and "b" * 64 in data


def test_segp1_refuses_header_that_cannot_fit():
    long_area = " ".join(["Harrow county north block"] * 30)
    with pytest.raises(Refused) as e:
        write_segp1(final_table(2), context(area=long_area))
    assert "20" in str(e.value) and "SPS" in e.value.hint


def test_wrap_keeps_every_character_and_refuses_overflow():
    words = "NZGD2000 / New Zealand Transverse Mercator 2000 " + "x" * 100
    pieces = wrap_data(words, 48)
    assert all(len(p) <= 48 for p in pieces) and len(pieces) == 4
    assert _squash("".join(pieces)) == _squash(words)
    with pytest.raises(Refused):
        header_record("H26", "d", "y" * 49)


@pytest.mark.parametrize(("epsg", "factor"), [
    # US survey foot = 1200/3937 m exactly (US Federal Register 24 FR 5348, 1959; NIST SP 811)
    (6473, 1200 / 3937), (2276, 1200 / 3937),
    # metre grid (EPSG:32614 WGS 84 / UTM zone 14N)
    (32614, 1.0),
])
def test_sps_factor_to_metre_is_the_grid_unit_factor(epsg, factor):
    text = write_sps(_table(epsg), context(crs_epsg=epsg)).decode("ascii")
    [rec] = [r for r in text.splitlines() if r.startswith("H201")]
    # SPS rev 2.1 header record: description in columns 5-32, value from column 33
    assert rec[4:32].strip() == "Factor to metre"
    assert float(rec[32:].strip()) == pytest.approx(factor, rel=1e-15)


@pytest.mark.parametrize("writer", [write_sps, write_segp1])
def test_accented_header_text_is_transliterated_not_replaced(writer):
    # NFKD (Unicode Standard Annex #15) splits "é" into "e" + U+0301 COMBINING ACUTE ACCENT
    ctx = context(client="Harrow Basin Énergie", survey="Kestrel Flats 3D - Sàbana")
    text = writer(final_table(2), ctx).decode("ascii")
    assert "?" not in text
    assert "Harrow Basin Energie" in text and "Kestrel Flats 3D - Sabana" in text


@pytest.mark.parametrize("writer", [write_sps, write_segp1])
def test_header_text_with_no_ascii_form_is_refused_naming_the_field(writer):
    # "Ø" (U+00D8) has no decomposition in Unicode (UnicodeData.txt), so NFKD keeps it
    with pytest.raises(Refused, match=r"header field 'Client'.*'Ø' \(U\+00D8\)") as e:
        writer(final_table(2), context(client="Harrow Basin Ørsted-free Energy"))
    assert "--format csv" in e.value.hint
