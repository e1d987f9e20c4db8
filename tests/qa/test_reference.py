"""The reference table: column parsing, units, temperature interpolation and its errors."""

import math

import pytest

from qmap.errors import InputError, UsageError
from qmap.qa.reference import parse_reference

TWO_TEMPS = """label,name,temperature_C,T1_ms,T2_s
1,A,18,1800,0.900
1,A,24,1920,0.960
2,B,24,1460,0.636
2,B,18,1400,0.600
"""


def test_linear_interpolation_matches_hand_computed_values():
    # linear interpolation between two temperature rows, worked by hand:
    # vial 1 T1 at 21.5 C = 1800 + (1920 - 1800) * (21.5 - 18) / (24 - 18) = 1800 + 120 * 3.5 / 6 = 1870 ms
    # vial 2 T2 at 21.5 C = 0.600 + 0.036 * 3.5 / 6 = 0.621 s (rows given in descending temperature order)
    ref = parse_reference(TWO_TEMPS).at(21.5)
    assert ref[1].values["T1"] == pytest.approx(1870.0, rel=1e-12)
    assert ref[1].values["T2"] == pytest.approx(0.935, rel=1e-12)
    assert ref[2].values["T1"] == pytest.approx(1435.0, rel=1e-12)
    assert ref[2].values["T2"] == pytest.approx(0.621, rel=1e-12)
    assert ref[1].interpolated and ref[1].temperature_C == 21.5 and ref[1].name == "A"
    # at a tabulated temperature the tabulated value comes back exactly
    assert parse_reference(TWO_TEMPS).at(18.0)[2].values["T1"] == 1400.0


def test_units_are_taken_from_column_names():
    table = parse_reference(TWO_TEMPS)
    assert table.units == {"T1": "ms", "T2": "s"}
    alt = parse_reference("label,T1 (ms),R2_per_s,T2star [s]\n1,1000,12.5,0.05\n")
    assert alt.units == {"T1": "ms", "R2": "1/s", "T2star": "s"}
    assert alt.at(None)[1].values == {"T1": 1000.0, "R2": 12.5, "T2star": 0.05}


def test_temperature_outside_the_table_is_refused():
    with pytest.raises(InputError, match="outside the table's range"):
        parse_reference(TWO_TEMPS).at(30.0)
    with pytest.raises(InputError, match="outside"):
        parse_reference(TWO_TEMPS).at(17.9)


def test_temperature_required_when_the_table_has_several():
    with pytest.raises(UsageError, match="give temperature=C "):
        parse_reference(TWO_TEMPS).at(None)


def test_single_temperature_rows_need_no_temperature():
    ref = parse_reference("label,temperature_C,T1_ms\n1,20,1000\n2,20,500\n").at(None)
    assert ref[2].values["T1"] == 500.0 and not ref[2].interpolated and ref[2].temperature_C == 20


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("vial,T1_ms\n1,1000\n", "no 'label' column"),
        ("label,T1\n1,1000\n", "column 'T1' has no unit"),
        ("label,T1_furlongs\n1,1000\n", "not a unit of T1"),
        ("label,T1_per_s\n1,1000\n", "not a unit of T1"),  # a rate unit on a time
        ("label,T1_ms,T1_s\n1,1000,1\n", "two columns"),
        ("label,comment\n1,x\n", "no parameter column"),
        ("label,T1_ms\n1.5,1000\n", "not a positive integer"),
        ("label,T1_ms\n0,1000\n", "not a positive integer"),
        ("label,T1_ms\n1,-5\n", "must be positive"),
        ("label,T1_ms\n1,abc\n", "not a number"),
        ("label,T1_ms\n1,1000\n1,1100\n", "temperature_C"),
        ("label,temperature_C,T1_ms\n1,20,1000\n1,20,1100\n", "same temperature"),
        ("", "empty"),
    ],
)
def test_bad_tables(text, match):
    with pytest.raises(InputError, match=match):
        parse_reference(text)


def test_tolerance_columns_per_parameter_and_per_vial():
    text = "label,T1_ms,T2_ms,T1_tolerance_pct,tolerance_pct\n1,1000,100,5,\n2,500,50,,15\n3,200,20,,\n"
    ref = parse_reference(text).at(None)
    assert ref[1].tolerance_pct == {"T1": 5.0}
    assert ref[2].tolerance_pct == {"T1": 15.0, "T2": 15.0}
    assert ref[3].tolerance_pct == {}


def test_empty_cell_means_no_reference_and_other_columns_are_ignored():
    table = parse_reference("label,lot,T1_ms,T2_ms\n1,L7,1000,\n2,L7,500,50\n")
    ref = table.at(None)
    assert ref[1].values == {"T1": 1000.0}
    assert ref[2].values == {"T1": 500.0, "T2": 50.0}
    assert table.ignored_columns == ["lot"]


def test_semicolon_separated_and_comment_lines():
    ref = parse_reference("# exported by the site's spreadsheet\nlabel;T1_ms\n1;1000\n").at(None)
    assert ref[1].values["T1"] == 1000.0
    assert math.isnan(parse_reference("label,T1_ms,T2_ms\n1,1000,\n").rows[0]["values"]["T2"])
