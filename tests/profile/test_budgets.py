"""Budgets (``--budget T=MS`` and ``[[profile.budget]]`` tables), the comma lists and the percentile:
one parser each in ``seqgate.settings``; every error is exit 2 and names the setting as written.

The CLI side of the same errors (exit code, message on stderr) is in test_profile_errors.py.
"""

from __future__ import annotations

import pytest

from seqgate.errors import EXIT_BAD_INPUT, BadInputError
from seqgate.settings import Budget, parse_budgets, parse_int_list, parse_percentile


@pytest.mark.parametrize(("text", "expected"), [
    ("128=5", Budget(128, 5.0)),
    (" 8 = 0.25 ", Budget(8, 0.25)),
    ("512=12ms", Budget(512, 12.0)),
    ("1=1e-3", Budget(1, 0.001)),
])
def test_parse_budget(text: str, expected: Budget) -> None:
    assert parse_budgets([text], "--budget") == (expected,)


@pytest.mark.parametrize(("text", "message"), [
    ("128", "is not of the form T=MS"),
    ("=5", "is not of the form T=MS"),
    ("128=", "is not of the form T=MS"),
    ("12.5=3", "'12.5' is not a whole number"),
    ("abc=3", "'abc' is not a whole number"),
    ("128=fast", "'fast' is not a number of milliseconds"),
    ("0=3", "must be at least 1, got 0"),
    ("-4=3", "must be at least 1, got -4"),
    ("128=0", "must be a positive, finite number"),
    ("128=-1", "must be a positive, finite number"),
    ("128=inf", "must be a positive, finite number"),  # IEEE-754: inf is not finite
    ("128=nan", "must be a positive, finite number"),  # IEEE-754: nan > 0 is false
])
def test_parse_budget_errors(text: str, message: str) -> None:
    with pytest.raises(BadInputError) as e:
        parse_budgets([text], "--budget")
    assert message in str(e.value)
    assert f"--budget {text!r}" in str(e.value)
    assert e.value.exit_code == EXIT_BAD_INPUT == 2


def test_budget_tables_use_the_same_rules() -> None:
    assert parse_budgets([{"seq_len": 64, "ms": 5}], "[[profile.budget]]") == (Budget(64, 5.0),)
    with pytest.raises(BadInputError) as e:
        parse_budgets([{"seq_len": 64}, {"seq_len": 8, "ms": float("inf")}, {"seq_len": 4, "ms": 1, "mss": 2}],
                      "[[profile.budget]]")
    msg = str(e.value)
    assert "[[profile.budget]] entry 1: ms is required" in msg  # the old code dropped this entry silently
    assert "[[profile.budget]] entry 2: the latency must be a positive, finite number" in msg
    assert "unknown key in [[profile.budget]] entry 3: 'mss' (did you mean 'ms'?)" in msg
    assert msg.count("\n  - ") == 3


def test_parse_budgets_sorts_and_refuses_two_at_one_length() -> None:
    got = parse_budgets(["128=5", "8=1", Budget(32, 2.0)], "--budget")
    assert got == (Budget(8, 1.0), Budget(32, 2.0), Budget(128, 5.0))
    with pytest.raises(BadInputError, match="two budgets for sequence length 8 \\(1 ms and 2 ms\\)"):
        parse_budgets(["8=1", "8=2"], "--budget")


def test_parse_int_list() -> None:
    assert parse_int_list("32,1, 8,8", "--seq-lens") == (1, 8, 32)
    assert parse_int_list([4, 2], "[profile] batch_sizes") == (2, 4)


@pytest.mark.parametrize(("value", "message"), [
    ("1,,8", "no empty items"),
    ("", "no empty items"),
    ("1,x", "'x' is not one"),
    ("1.5", "'1.5' is not one"),
    ("0,8", "at least 1; got 0"),
    ([16, 0], "at least 1; got 0"),
    ([], "give at least one value"),
    ([1, True], "must be a list of whole numbers"),  # TOML true is a bool, not a length
])
def test_parse_int_list_errors(value: object, message: str) -> None:
    with pytest.raises(BadInputError, match="--seq-lens") as e:
        parse_int_list(value, "--seq-lens")
    assert message in str(e.value)


def test_percentile_choices() -> None:
    assert [parse_percentile(q, "--percentile") for q in (50, 90, 99)] == [50, 90, 99]
    with pytest.raises(BadInputError, match="--percentile 95: expected one of 50, 90, 99"):
        parse_percentile(95, "--percentile")
    with pytest.raises(BadInputError, match=r"\[profile\] percentile True"):
        parse_percentile(True, "[profile] percentile")
