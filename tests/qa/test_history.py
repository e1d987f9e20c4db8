"""The session history and the drift rule."""

import datetime as dt

import numpy as np
import pytest
from scipy import stats

from qmap.errors import InputError
from qmap.qa.history import HORIZON, find_trends, history_bytes, merge_session, read_history


def _rows(errors, *, label=1, start=dt.date(2026, 1, 5), step_days=7, scanner="S", protocol="P"):
    return [{"date": (start + dt.timedelta(days=step_days * i)).isoformat(), "scanner": scanner,
             "protocol": protocol, "label": str(label), "name": "", "parameter": "T1", "unit": "ms",
             "reference": "1000", "median": "", "mean": "", "error_pct": f"{e:.6g}", "tolerance_pct": "10",
             "pass": "true" if abs(e) <= 10 else "false", "temperature_C": "", "qmap_version": ""}
            for i, e in enumerate(errors)]


def test_steady_drift_is_flagged_before_it_fails():
    err = [0.0, 1.5, 3.0, 4.5, 6.0, 7.5]  # +1.5 %-points per week, still within 10 %
    tr = find_trends(_rows(err), "S", "P", [(1, "T1")], {(1, "T1"): 10.0})[(1, "T1")]
    # the fitted line (exact here) projected HORIZON weekly intervals past the last session
    fit = stats.linregress(np.arange(6) * 7.0, err)
    assert tr.slope_pct_per_day == pytest.approx(1.5 / 7)
    assert tr.projected_error_pct == pytest.approx(fit.intercept + fit.slope * (35 + 7 * HORIZON))
    assert tr.projected_error_pct == pytest.approx(15.0)
    assert tr.flagged and tr.projected_date == "2026-03-16"


def test_scatter_within_tolerance_is_not_flagged():
    rng = np.random.default_rng(11)
    err = rng.normal(0, 2.0, 8)
    tr = find_trends(_rows(err), "S", "P", [(1, "T1")], {(1, "T1"): 10.0})[(1, "T1")]
    assert not tr.flagged


def test_slow_significant_drift_that_stays_inside_is_not_flagged():
    err = [0.0, 0.2, 0.4, 0.6, 0.8, 1.0]  # significant slope, but projected 2 % << 10 %
    tr = find_trends(_rows(err), "S", "P", [(1, "T1")], {(1, "T1"): 10.0})[(1, "T1")]
    assert tr.p_value < 0.05 and not tr.flagged


def test_too_few_sessions_and_other_scanners_are_left_out():
    rows = _rows([0, 3, 6]) + _rows([0, 3, 6, 9, 12], scanner="other")
    assert find_trends(rows, "S", "P", [(1, "T1")], {(1, "T1"): 10.0}) == {}


def test_rerun_of_a_session_replaces_its_rows(tmp_path):
    old = _rows([0.0, 1.0, 2.0])
    new = _rows([5.0], start=dt.date(2026, 1, 19))  # same date as the third session
    merged, replaced = merge_session(old, new)
    assert replaced and len(merged) == 3 and merged[-1]["error_pct"] == "5"
    path = tmp_path / "h.csv"
    path.write_bytes(history_bytes(merged))
    again = read_history(path)
    assert [r["error_pct"] for r in again] == ["0", "1", "5"]


def test_foreign_csv_is_not_taken_for_a_history(tmp_path):
    path = tmp_path / "h.csv"
    path.write_text("a,b\n1,2\n")
    with pytest.raises(InputError, match="not a qmap phantom history"):
        read_history(path)
    assert read_history(tmp_path / "missing.csv") == []
