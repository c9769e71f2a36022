"""Percentages and signed figures as text: the one place their rounding and sign rules live.

Every page, report, chart and terminal line shows rates, shares, relative changes and differences in
percentage points. They used to be formatted by small helpers in each module, and the helpers disagreed
(one wrote "-0%" for a change that rounds to zero, another "+0%", a third "0%"). The rules here hold for
all of them:

* a figure that rounds to zero is shown without a sign ("0%", "0.0 pts"), never "-0%" or "+0%";
* a missing or non-finite figure (None, NaN, inf, text that is not a number) is shown as ``missing``
  (``"n/a"`` unless the caller shows something else, e.g. ``"-"`` in terminal tables);
* positive changes carry "+"; the minus sign is the ASCII hyphen for plain text (terminal, JSON-facing
  wording) or :data:`TRUE_MINUS` where typography matters (the HTML report and its charts).

Imports nothing from contentlab, so any module may use it.
"""

from __future__ import annotations

import math
from typing import Any

TRUE_MINUS = "\u2212"  # the typographic minus sign of the HTML report and charts
HYPHEN_MINUS = "-"     # plain text: terminal output, sentences shared with the CLI

# Below this size (as a share) a percentage gets one decimal: 0.8% must not read as "1%", nor -0.4% as "-0%".
# 0.095 rather than 0.10 so that 9.5%-9.99% reads "10%", not "10.0%" (the same width as its neighbours).
ONE_DECIMAL_BELOW = 0.095


def finite_or_none(value: Any) -> float | None:
    """``value`` as a float, or None when it is missing, not a number, NaN or infinite."""
    if value is None:
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def signed_number(value: Any, digits: int = 2, *, minus: str = HYPHEN_MINUS, missing: str = "n/a") -> str:
    """"+1.25" / "-1.25", and "0.00" with no sign when it rounds to zero (z-scores, differences)."""
    x = finite_or_none(value)
    if x is None:
        return missing
    body = f"{abs(x):.{digits}f}"
    if float(body) == 0:
        return body
    return f"{'+' if x > 0 else minus}{body}"


def percent(value: Any, digits: int = 2, *, missing: str = "n/a") -> str:
    """A rate or share as a percentage, "4.56%" (0.0456 in, fixed decimals); never "-0.00%"."""
    x = finite_or_none(value)
    if x is None:
        return missing
    text = f"{100 * x:.{digits}f}"
    if float(text) == 0:
        text = text.lstrip("-")
    return text + "%"


def signed_percent(value: Any, digits: int = 0, *, minus: str = HYPHEN_MINUS, missing: str = "n/a") -> str:
    """A relative change, "+12%" / "-8%" (0.12 in), so a reader sees the direction; "0%" when it rounds to zero."""
    x = finite_or_none(value)
    if x is None:
        return missing
    return signed_number(100 * x, digits, minus=minus) + "%"


def percentage_points(diff: Any, digits: int = 2, *, minus: str = HYPHEN_MINUS, unit: str = " pts",
                      missing: str = "n/a") -> str:
    """A difference of two rates, "+0.75 pts" (0.0075 in): points, not percent, so it is not read as relative."""
    x = finite_or_none(diff)
    if x is None:
        return missing
    return signed_number(100 * x, digits, minus=minus) + unit


def adaptive_percent(value: Any, *, signed: bool = False, minus: str = HYPHEN_MINUS, missing: str = "n/a") -> str:
    """"12%", but "0.8%" below 9.5% (:data:`ONE_DECIMAL_BELOW`), so small effects do not all read "1%" or "0%".

    For effects in sentences, where the size matters more than a fixed number of decimals.
    """
    x = finite_or_none(value)
    if x is None:
        return missing
    digits = 1 if abs(x) < ONE_DECIMAL_BELOW else 0
    return signed_percent(x, digits, minus=minus) if signed else percent(x, digits)


def probability(value: Any, digits: int = 0, *, missing: str = "n/a") -> str:
    """A probability as a percentage, "87%", but ">99%" / "<1%" where it would round to 100% or 0%.

    Probabilities here (of being best, of truly leading) are estimates from posterior draws or a
    normal approximation; "100%" or "0%" would read as certainty they do not have. The same words
    in the report, on the web pages, in the terminal and in a scoring verdict.
    """
    x = finite_or_none(value)
    if x is None:
        return missing
    text = f"{100 * x:.{digits}f}"
    step = 10.0 ** -digits
    if float(text) >= 100:
        return f">{100 - step:.{digits}f}%"
    if float(text) <= 0:
        return f"<{step:.{digits}f}%"
    return text + "%"
