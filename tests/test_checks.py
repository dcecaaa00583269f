"""The value checkers and the problem collector (checks.py): the wording users see, one key path per
problem. Expected messages are written out by hand; the near-miss hints are difflib's
get_close_matches (Python standard library, ratio >= 0.6). Through whole sweep files: tests/test_config.py."""
from __future__ import annotations

import math

import pytest

from depthplan.checks import (SHOW_MAX, Checker, as_choice, as_flag, as_float, as_int, as_text, clip, int_list,
                              show)


def test_clip_and_show_cap_the_echo() -> None:
    assert clip("x" * SHOW_MAX) == "x" * SHOW_MAX
    assert clip("x" * (SHOW_MAX + 1)) == "x" * (SHOW_MAX - 1) + "…"
    assert len(show("y" * 10_000)) == SHOW_MAX and show("y" * 10_000).endswith("…")
    assert len(show(list(range(10_000)))) == SHOW_MAX
    assert show([1, 2]) == "[1, 2]" and show("ab") == "'ab'"


def test_show_names_a_structure_that_contains_itself() -> None:
    loop: list = [1]
    loop.append(loop)
    assert show(loop) == "a list that contains itself" and show(None) == "null" and show(True) == "true"


@pytest.mark.parametrize("check, value, message", [
    (as_int(), -2, "must be a positive integer, got -2"),
    (as_int(), True, "must be a positive integer, got true"),           # a bool is not a count
    (as_int(0), -1, "must be an integer >= 0, got -1"),
    (as_float(), 0, "must be a number > 0, got 0"),
    (as_float(0.0, 1.0, lo_open=False, hi_open=True), 1.0, "must be a number >= 0 and < 1, got 1.0"),
    (as_float(), math.inf, "must be a number > 0, got Infinity"),
    (as_choice(("sgd", "adam")), "adma", "must be one of sgd, adam, got 'adma' (did you mean 'adam'?)"),
    (as_choice(("sgd", "adam")), 3, "must be one of sgd, adam, got 3"),
    (as_text, "  ", "must be a non-empty string, got '  '"),
    (as_flag, "yes", "must be true or false, got 'yes'"),
])
def test_a_bad_value_is_refused_with_what_was_expected_and_what_came(check, value, message) -> None:
    with pytest.raises(ValueError) as err:
        check(value)
    assert str(err.value) == message


def test_good_values_pass_through() -> None:
    assert as_int()(3) == 3 and as_int(0)(0) == 0
    assert as_float(0.0, 1.0)(1) == 1.0 and isinstance(as_float()(2), float)
    assert as_choice(("sgd", "adam"))("ADAM") == "adam"                   # case does not matter
    assert as_text("x") == "x" and as_flag(False) is False


def test_checker_collects_every_problem_with_its_key_path() -> None:
    c = Checker()
    got = c.keys("train", {"learning_rat": 0.1, "zzz": 1, "max_updates": -5}, ("learning_rate", "max_updates"))
    assert c.take(got, "train", "max_updates", as_int(), 100) == 100      # refused: the default comes back
    assert c.take(got, "train", "eval_every", as_int(), 20) == 20          # absent: the default
    c.keys("", [1], ("name",))
    assert c.problems == [
        "unknown key 'learning_rat' in train (did you mean 'learning_rate'?)",
        "unknown key 'zzz' in train; allowed: learning_rate, max_updates",
        "train.max_updates: must be a positive integer, got -5",
        "top level: must be a mapping of keys, got [1]",
    ]


def test_int_list_names_the_bad_item_by_index() -> None:
    c = Checker()
    assert int_list(c, "sweep.depths", [1, 2, 4]) == (1, 2, 4)
    assert int_list(c, "sweep.depths", [1, "x", 0]) is None
    assert int_list(c, "sweep.depths", [2, 2]) is None
    assert int_list(c, "sweep.depths", []) is None
    assert int_list(c, "sweep.seeds", [0, 0], unique=False, lo=0) == (0, 0)
    assert c.problems == ["sweep.depths[1]: must be a positive integer, got 'x'",
                          "sweep.depths[2]: must be a positive integer, got 0",
                          "sweep.depths: must not repeat a value, got [2, 2]",
                          "sweep.depths: must be a non-empty list of positive integers, got []"]
