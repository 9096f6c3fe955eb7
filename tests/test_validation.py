"""Tests of the shared run checks (areamap.validation): what check and the bulletin both refuse."""

from __future__ import annotations

from datetime import date

import pytest

from areamap.config import load_config
from areamap.errors import DataWarning, InputError
from areamap.validation import MIN_AREAS, prepare_run

from test_hostile import BASE_CASES, _ids, make_region


def test_plan_of_a_usable_region(tmp_path):
    prepared = prepare_run(make_region(tmp_path / "r"), today=date(2026, 12, 2))
    plan = prepared.plan
    assert plan.period == "2026-W44" and plan.window == ("2026-W44",)
    # ISO 8601: 2026-W44 runs Monday 26 October to Sunday 1 November 2026 (calendar, from memory)
    assert (plan.start, plan.end) == (date(2026, 10, 26), date(2026, 11, 1))
    assert plan.window_cases == int(prepared.study.case_matrix(weeks=["2026-W44"]).to_numpy().sum())
    assert "Reporting period: 2026-W44" in plan.summary()


def test_window_and_explicit_period(tmp_path):
    config = make_region(tmp_path / "r", extra_config="[period]\nwindow_weeks = 3\n")
    plan = prepare_run(config, period="2026-W43", today=date(2026, 12, 2)).plan
    assert plan.window == ("2026-W41", "2026-W42", "2026-W43")
    with pytest.raises(InputError, match="starts at 2026-W39, before the first week"):
        prepare_run(config, period="2026-W41", today=date(2026, 12, 2))
    with pytest.raises(InputError, match="'W47' is not an ISO week"):
        prepare_run(config, period="W47", today=date(2026, 12, 2))


def test_future_week_depends_on_the_day_of_the_run(tmp_path):
    config = make_region(tmp_path / "r")
    with pytest.raises(InputError, match="after the current week 2026-W43"):
        prepare_run(config, today=date(2026, 10, 25))  # Sunday of 2026-W43
    assert prepare_run(config, today=date(2026, 10, 26)).plan.period == "2026-W44"


def test_gap_check_can_be_switched_off(tmp_path):
    cases = BASE_CASES + "G01,2024-W10,3\n"
    config = make_region(tmp_path / "r", cases=cases)
    with pytest.raises(InputError, match=r"gap of \d+ weeks between 2024-W10 and 2026-W40"):
        prepare_run(config, today=date(2026, 12, 2))
    config.write_text(config.read_text() + "[checks]\nmax_week_gap = 0\n")
    assert prepare_run(config, today=date(2026, 12, 2)).plan.period == "2026-W44"


def test_weekly_rate_warning_names_the_district(tmp_path):
    cases = BASE_CASES + "G04,2026-W44,700\n"  # 700 cases among 2,600 people in one week
    config = make_region(tmp_path / "r", cases=cases)
    with pytest.warns(DataWarning, match=r"more than 0.1 cases per person in one week \(G04 2026-W44\)"):
        prepare_run(config, today=date(2026, 12, 2))


def test_minimum_number_of_districts_is_four():
    assert MIN_AREAS == 4  # Moran's I permutation test needs at least 4 areas (autocorrelation module)


def test_config_limits_are_enforced(tmp_path):
    config = make_region(tmp_path / "r", extra_config="[period]\nwindow_weeks = 521\n")
    with pytest.raises(InputError, match=r"window_weeks.*\[1, 520\]"):
        load_config(config)
    assert len(_ids()) >= MIN_AREAS
