"""Time and angle parsing (README: seconds internally, explicit units accepted, bare ms rejected)."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as hst

from qmap.errors import InputError
from qmap.units import parse_angle_list, parse_time, parse_time_list


def test_units_suffixes():
    np.testing.assert_allclose(parse_time_list("10ms,20ms,30ms"), [0.01, 0.02, 0.03], rtol=1e-15)
    np.testing.assert_allclose(parse_time_list("0.012s, 12ms ,12000us"), [0.012] * 3, rtol=1e-15)
    assert parse_time("0.015", key="RepetitionTime") == 0.015


def test_bare_milliseconds_rejected_with_hint():
    with pytest.raises(InputError, match="10ms,20ms,30ms"):
        parse_time_list("10,20,30", key="EchoTime", what="--te")
    with pytest.raises(InputError, match="ms"):
        parse_time_list("100,500,1000", key="InversionTime", what="--ti")
    with pytest.raises(InputError, match="ms"):
        parse_time_list("15", key="RepetitionTimeSpoiled", what="--tr")


@pytest.mark.parametrize("bad", ["", "5,,10", "abc", "5 meters", "nan", "-5ms"])
def test_garbage_rejected(bad):
    with pytest.raises(InputError):
        parse_time_list(bad, key="EchoTime", what="--te")


def test_angles():
    np.testing.assert_array_equal(parse_angle_list("3,8deg,15"), [3, 8, 15])
    for bad in ["0", "200", "x", "0.05,0.1"]:
        with pytest.raises(InputError):
            parse_angle_list(bad)


@given(hst.lists(hst.floats(min_value=1e-3, max_value=900.0, allow_nan=False), min_size=1, max_size=12))
def test_ms_round_trip(values_ms):
    # property: any list written with the ms suffix parses back to seconds
    text = ",".join(f"{v!r}ms" for v in values_ms)
    np.testing.assert_allclose(parse_time_list(text, key="EchoTime"), np.asarray(values_ms) / 1000, rtol=1e-12)


@given(hst.lists(hst.floats(min_value=1.5, max_value=1e4, allow_nan=False), min_size=1, max_size=8))
def test_bare_values_above_one_second_never_accepted_as_echo_times(values):
    with pytest.raises(InputError):
        parse_time_list(",".join(repr(v) for v in values), key="EchoTime")
