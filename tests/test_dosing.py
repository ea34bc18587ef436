"""Dose records: steady state, additional doses, validation."""

from __future__ import annotations

import numpy as np
import pytest

from compartments import Dose, regimen
from compartments.errors import UsageError


class TestRecordFields:
    def test_additional_expands_to_a_regimen(self):
        """``additional=n, interval=τ`` lists the same doses as ``regimen(count=n + 1)``."""
        d = Dose(2.0, 50.0, "oral", interval=8.0, additional=3)
        assert [(x.time, x.amount, x.route) for x in d.expanded()] == \
            [(x.time, x.amount, x.route) for x in regimen(50.0, every=8.0, count=4, route="oral", start=2.0)]

    def test_expanded_keeps_steady_state_on_the_first(self):
        """The record's own dose keeps its steady-state flag; the additional ones are plain doses."""
        first, *rest = Dose(0.0, 10.0, interval=6.0, additional=2, steady_state=True).expanded()
        assert first.steady_state and first.interval == 6.0 and first.additional == 0
        assert [r.steady_state for r in rest] == [False, False]

    def test_in_time_unit_scales_the_interval(self):
        """A change of time unit scales times, durations and intervals and divides rates."""
        d = Dose(1.0, 100.0, "infusion", rate=50.0, interval=12.0, additional=1).in_time_unit(60.0)
        assert (d.time, d.rate, d.interval, d.additional) == (60.0, 50.0 / 60.0, 720.0, 1)

    def test_whole_numbers_and_flags_are_normalised(self):
        """``additional=2.0`` and a numpy boolean are read as 2 and True."""
        d = Dose(0.0, 1.0, interval=np.float64(4.0), additional=2.0, steady_state=np.True_)
        assert d.additional == 2 and isinstance(d.additional, int) and d.steady_state is True


class TestValidation:
    @pytest.mark.parametrize(("kwargs", "words"), [
        ({"additional": 2}, "need the interval between doses"),
        ({"steady_state": True}, "needs the dosing interval"),
        ({"interval": 0.0, "additional": 1}, "must be a positive number of hours"),
        ({"interval": float("nan")}, "must be a positive number of hours"),
        ({"interval": -6.0, "steady_state": True}, "must be a positive number of hours"),
        ({"interval": 6.0, "additional": 1.5}, "must be a whole number"),
        ({"interval": 6.0, "additional": -1}, "must be a whole number"),
        ({"interval": 6.0, "steady_state": "yes"}, "must be true or false"),
    ])
    def test_one_line_messages(self, kwargs, words):
        """Each bad field is refused with one line that names it and says what is expected."""
        with pytest.raises(UsageError, match=words) as err:
            Dose(0.0, 100.0, **kwargs)
        assert "\n" not in str(err.value)
