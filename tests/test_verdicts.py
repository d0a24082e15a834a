"""The verdict vocabulary (drift/verdicts.py): one order, one word per verdict, used by every output.

The order is a product rule stated in the README ("Verdict order"; common practice, no source): not
checked > refit > relag > drop-driver > data-late > watch > keep.
"""

from __future__ import annotations

from datetime import date
from pathlib import Path

import pytest

from drift.check import CheckOutcome
from drift.delivery import digest
from drift.report import format_table
from drift.verdicts import (
    ERROR,
    HEADLINE,
    LABEL,
    ORDER,
    PRIORITY,
    VERDICTS,
    Action,
    change_words,
    fmt_num,
    fmt_p,
    label,
    overall,
    rank,
    sort_actions,
)

README = Path(__file__).resolve().parent.parent / "README.md"


def test_order_is_defined_once_and_complete() -> None:
    assert ORDER == ("error", "refit", "relag", "drop-driver", "data-late", "watch", "keep")
    assert set(ORDER) == set(VERDICTS) == set(LABEL) == set(HEADLINE)
    assert PRIORITY == ORDER[1:-1]
    assert [rank(v) for v in ORDER] == list(range(len(ORDER)))
    # the digest ranks verdicts by the same order (higher = more pressing)
    assert sorted(digest.VERDICT_RANK, key=lambda v: -digest.VERDICT_RANK[v]) == list(ORDER)
    assert digest.VERDICT_WORDS is LABEL
    # one spelling per verdict, and every headline starts with it
    assert len(set(LABEL.values())) == len(LABEL)
    for v in ORDER:
        assert HEADLINE[v].startswith(LABEL[v])


def test_readme_states_the_order() -> None:
    text = " ".join(README.read_text(encoding="utf-8").split())
    assert ("not checked (`error`) > `refit` > `relag` > `drop-driver` > `data-late` > `watch` > `keep`"
            in text)


def test_refit_heads_and_a_late_feed_is_listed_beside_it() -> None:
    acts = [Action("data-late", "feed x is late", extra={"driver": "x"}),
            Action("watch", "early sign", severity="watch"),
            Action("refit", "the relationship changed")]
    assert overall(acts) == "refit"
    assert [a.action for a in sort_actions(acts)] == ["refit", "data-late", "watch"]
    assert overall([Action("drop-driver", "r", extra={"driver": "x"}), Action("data-late", "r")]) == "drop-driver"
    assert overall([]) == "keep"


def test_terminal_table_uses_the_vocabulary() -> None:
    payload = {"name": "m1", "verdict": "refit", "target": "y", "unit": "u",
               "actions": [{"action": "refit", "severity": "act", "reason": "changed"},
                           {"action": "data-late", "severity": "act", "driver": "x", "reason": "late"}],
               "drivers": [], "tests": []}
    out = CheckOutcome(run_id=1, as_of=date(2025, 12, 31), models=[payload], errors={"m2": "no data"})
    text = format_table(out)
    assert f"m1  →  {HEADLINE['refit']}" in text
    assert f"  - {label('data-late')}: late" in text
    assert f"m2  →  {LABEL[ERROR]}: no data" in text
    for wrong in ("REFIT", "NOT CHECKED", "Data late", "data-late:"):
        assert wrong not in text


def test_pvalues_clipped_at_a_table_edge_are_bounds() -> None:
    # drift.engine.tables.monitoring.pvalue clips to its tail probabilities 0.001 .. 0.5 (its docstring:
    # read "p <= 0.001" / "p >= 0.5"); an unclipped p-value is printed as a number
    assert fmt_p(0.001, "monitor-cusum") == "< 0.001"
    assert fmt_p(0.5, "monitor-effect") == "> 0.5"
    assert fmt_p(0.001, "forecast-mean") == "< 0.001"
    assert fmt_p(0.005, "monitor-shift") == "0.005"
    assert fmt_p(0.0213, "monitor-page") == "0.021"
    assert fmt_p(0.5, "cusum") == "0.50"  # the retrospective CUSUM's p-value is not clipped
    assert fmt_p(7.71e-9) == "7.7e-09"
    assert fmt_p(None) == fmt_p(float("nan")) == "n/a"


def test_change_words_never_a_fall_over_100_percent() -> None:
    # common practice, no source: a change of sign or from a base near zero is said in words
    assert change_words(3.53, -8.64) == "reversed sign, from 3.53 to -8.64"
    assert change_words(2.08, 1.15) == "fell by about 45%"
    assert change_words(2.0, 0.03) == "fell from 2 to 0.03"
    assert change_words(0.01, 2.5) == "rose from 0.01 to 2.5"
    for b, a in ((3.53, -8.64), (1.0, -0.2), (0.4, -40.0), (2.0, 0.0), (5.0, 0.01)):
        words = change_words(b, a)
        assert "%" not in words or int(words.split("about ")[1].rstrip("%")) < 100, words


@pytest.mark.parametrize("x, words", [
    (1234.4, "1,234"), (123.4, "123"), (1.2345, "1.23"), (0.0, "0"), (-0.012345, "-0.0123"),
    (1.2345e97, "1.23e+97"), (-2.5e12, "-2.5e+12"), (3.21e-7, "3.21e-07"),
    (None, "n/a"), (float("nan"), "n/a"), (float("inf"), "n/a"),
])
def test_numbers_for_sentences(x, words):
    """Huge and tiny values read as powers of ten, not 98 digits with separators (common practice, no
    source)."""
    assert fmt_num(x) == words
