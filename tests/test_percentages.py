"""contentlab.percentages: the one home of percent, signed-percent and percentage-point wording.

Rounding is Python's own format specification (round half to even on the stored binary value, see
https://docs.python.org/3/library/string.html#format-specification-mini-language); the checks below pin
the rules contentlab adds on top: no sign on a figure that rounds to zero, one decimal below 9.5% for
effects in sentences, and what each caller shows for a missing figure.
"""

from __future__ import annotations

import ast
import math
from pathlib import Path

import pytest

from contentlab.percentages import (
    HYPHEN_MINUS,
    TRUE_MINUS,
    adaptive_percent,
    finite_or_none,
    percent,
    percentage_points,
    probability,
    signed_number,
    signed_percent,
)

MISSING = [None, float("nan"), float("inf"), -float("inf"), "not a number"]


def test_plain_percent_keeps_its_decimals_and_rounds_like_python():
    assert percent(0.0456) == "4.56%"
    assert percent(0.0499) == "4.99%"
    assert percent(0.0499, 0) == "5%"
    assert percent(0.0995, 2) == "9.95%"
    assert percent(0.5, 1) == "50.0%"
    assert percent(0.0499, 0) == f"{0.0499:.0%}"  # the same rounding as the format specification


def test_no_figure_that_rounds_to_zero_carries_a_sign():
    # f"{-0.0004:+.0%}" is "-0%" and f"{0:+.0%}" is "+0%": both read as a direction that is not there.
    assert signed_percent(-0.0004) == "0%"
    assert signed_percent(0.0) == "0%"
    assert signed_percent(-0.0) == "0%"
    assert percent(-0.00001) == "0.00%"
    assert percent(-0.0004, 0) == "0%"
    assert percentage_points(-0.00001) == "0.00 pts"
    assert signed_number(-0.004, 2) == "0.00"
    assert adaptive_percent(-0.00004, signed=True) == "0.0%"


def test_signed_figures_show_their_direction():
    assert signed_percent(0.123) == "+12%"
    assert signed_percent(-0.08) == "-8%"
    assert signed_percent(-0.004, 1) == "-0.4%"
    assert signed_percent(-0.08, minus=TRUE_MINUS) == "\u22128%"
    assert percentage_points(0.0075) == "+0.75 pts"
    assert percentage_points(-0.0075, minus=TRUE_MINUS) == "\u22120.75 pts"
    assert percentage_points(0.0075, 1, unit="") == "+0.8"
    assert signed_number(1.25) == "+1.25"
    assert signed_number(-1.25) == HYPHEN_MINUS + "1.25"


def test_effects_get_one_decimal_below_nine_and_a_half_percent():
    assert adaptive_percent(0.008) == "0.8%"          # not "1%"
    assert adaptive_percent(-0.004, signed=True) == "-0.4%"  # was "-0%" in "interval -1% to -0%"
    assert adaptive_percent(0.0499) == "5.0%"
    assert adaptive_percent(0.0949) == "9.5%"
    assert adaptive_percent(0.0995) == "10%"          # 9.95% reads "10%", not "10.0%"
    assert adaptive_percent(0.095) == "10%"
    assert adaptive_percent(0.123, signed=True) == "+12%"
    assert adaptive_percent(-0.123, signed=True, minus=TRUE_MINUS) == "\u221212%"


@pytest.mark.parametrize("value", MISSING)
def test_missing_figures_read_as_each_caller_showed_them(value):
    # the report, the web pages and the CLI's score lines said "n/a"; the CLI's experiment tables "-".
    assert percent(value) == "n/a"
    assert signed_percent(value) == "n/a"
    assert percentage_points(value) == "n/a"
    assert adaptive_percent(value) == "n/a"
    assert signed_number(value) == "n/a"
    assert percent(value, missing="-") == "-"
    assert finite_or_none(value) is None


def test_callers_keep_their_wording():
    from contentlab import charts, report
    from contentlab.cli.experimenting import _pct
    from contentlab.cli.scoring import _rate
    from contentlab.web.common import environment

    assert _pct(float("nan")) == "-" and _pct("x") == "-" and _pct(0.0456) == "4.56%"
    assert _rate(0.0456) == "4.56%" and _rate(0.123) == "12.3%" and _rate(float("nan")) == "n/a"
    assert report.points(-0.0075) == "\u22120.75 pts" and report.points(0.0) == "0.00 pts"
    assert report.signed(-0.04, 1) == "0.0"  # was "\u22120.0"
    assert report.signed_pct(-0.123, 1) == "\u221212.3%"
    assert charts.fmt_points(-0.0125) == "\u22121.25"
    assert charts.percent_format([0.0, 0.025])(0.05) == "5.0%"
    assert charts.signed_percent_format([0.0, 0.05])(-0.0001) == "0%"
    env = environment()
    assert env.from_string("{{ x|pct }} {{ x|pct(1) }} {{ x|signed_pct }} {{ y|pct }}").render(
        x=0.0456, y=math.nan) == "4.56% 4.6% +5% n/a"


def test_a_probability_never_reads_as_certainty():
    # Probabilities of being best are estimates from posterior draws; "100%" or "0%" would claim a
    # certainty they do not have (a draw-based estimate is exactly 1 whenever one arm won every draw).
    assert [probability(x) for x in (0.0, 0.004, 0.5, 0.87, 0.994, 0.996, 1.0)] == [
        "<1%", "<1%", "50%", "87%", "99%", ">99%", ">99%"]
    assert probability(1.0, 1) == ">99.9%" and probability(0.0, 1) == "<0.1%" and probability(0.9994, 1) == "99.9%"
    assert probability(None) == "n/a" and probability(math.nan, missing="-") == "-"


def test_every_surface_words_a_probability_alike():
    """The report, the web pages, the terminal table and a scoring verdict say ">99%", never "100%" or "> 0.99"."""
    from contentlab.cli.experimenting import _prob
    from contentlab.scoring import lead_verdict
    from contentlab.web.common import environment

    assert _prob(1.0) == ">99%" and _prob(0.42) == "42%" and _prob(math.nan) == "-"
    assert environment().from_string("{{ p|prob }}").render(p=1.0) == "&gt;99%"  # autoescaped HTML for ">99%"
    assert "P(truly better) >99%" in lead_verdict(0.9999)


def test_the_cli_drivers_table_shows_no_minus_zero():
    """The demo's drivers table printed "-5.2% to -0.0%" and "+0.0%" before the sign rule reached it."""
    import pandas as pd

    from contentlab.cli.modelling import format_drivers

    frame = pd.DataFrame([
        {"rank": 1, "group": "writing style", "label": "this, these, here", "step": "+1 of this, these, here",
         "relative_change": -0.026, "low": -0.052, "high": -0.0004, "evidence": "observational",
         "uncertain": False, "sentence": "s1"},
        {"rank": 2, "group": "writing style", "label": "word length", "step": "+1 letter per word",
         "relative_change": 0.0003, "low": -0.02, "high": 0.021, "evidence": "observational",
         "uncertain": True, "sentence": "s2"},
    ])
    text = format_drivers(frame, {"outcome": "clicks", "typical_rate": 0.03, "interval": 0.9}, [])
    assert "-5.2% to 0.0%" in text and "-2.0% to +2.1%" in text and "  0.0%" in text
    assert "-0.0%" not in text and "+0.0%" not in text


def test_the_module_imports_nothing_from_contentlab():
    """It sits below every other module, so anything may use it without a cycle."""
    source = Path(__file__).resolve().parents[1] / "contentlab" / "percentages.py"
    for node in ast.walk(ast.parse(source.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom):
            assert node.level == 0 and not (node.module or "").startswith("contentlab"), ast.dump(node)
        elif isinstance(node, ast.Import):
            assert not any(a.name.startswith("contentlab") for a in node.names)
