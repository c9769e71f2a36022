"""Tests for the weekly report (contentlab.report, contentlab.charts, the template and ``contentlab report``).

Outside references are named beside each check. Worked examples computed by
hand say so; figures recalled from memory say so.
"""

from __future__ import annotations

import csv
import re
from datetime import date, timedelta
from fractions import Fraction
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from contentlab.cli import main
from contentlab.errors import ContentlabError
from contentlab.percentages import probability
from contentlab.report import (
    REPORT_TABLES,
    Period,
    build_report,
    channel_priors,
    noise_check,
    overdispersion_rho,
    parse_iso_week,
    render_html,
    resolve_period,
    round_preserving_sum,
    shift_share,
    shift_share_exact,
    shrink_posts,
    standardised_residuals,
    usable,
    write_report,
)
from contentlab.workspace import Workspace

REPO = Path(__file__).resolve().parent.parent
CORPUS = REPO / "corpus" / "posts.csv"


# ----------------------------------------------------------------- helpers
def counts_frame(rows: list[tuple[str, int, int]]) -> pd.DataFrame:
    """(group, impressions, clicks) rows as the n/k frame shift_share reads."""
    return pd.DataFrame(rows, columns=["channel", "n", "k"])


def make_posts(specs: list[dict]) -> pd.DataFrame:
    """Posts in the stored form (UTC times) from dicts with day, channel, impressions, clicks, headline."""
    rows = []
    for i, s in enumerate(specs):
        day: date = s["day"]
        hour = s.get("hour", 9)
        rows.append({
            "post_id": s.get("post_id", f"P{i:05d}"),
            "published_at": day.isoformat() if hour is None else f"{day.isoformat()}T{hour:02d}:00:00+00:00",
            "has_time": 0 if hour is None else 1,
            "headline": s.get("headline", f"Post number {i}"),
            "impressions": int(s["impressions"]),
            "clicks": int(s["clicks"]),
            "engagements": int(s.get("engagements", s["clicks"] * 2)),
            "channel": s["channel"] if "channel" in s else "newsletter",
            "body": None,
            "experiment_id": None,
            "image_id": None,
            "cost": s.get("cost"),
        })
    return pd.DataFrame(rows)


def workspace_with(tmp_path: Path, specs: list[dict], name: str = "ws") -> Workspace:
    ws = Workspace.open(tmp_path / name, timezone="UTC")
    if specs:
        with ws.conn:
            ws.upsert_posts(make_posts(specs))
    return ws


def weekly_history(weeks: int, last_monday: date, channels=("newsletter", "social"), seed: int = 0,
                   per_week: int = 3) -> list[dict]:
    """A few posts per channel per week for ``weeks`` weeks ending in the week of ``last_monday``."""
    rng = np.random.default_rng(seed)
    base = {"newsletter": 0.05, "social": 0.012, "blog": 0.025}
    specs = []
    for w in range(weeks):
        monday = last_monday - timedelta(days=7 * (weeks - 1 - w))
        for ch in channels:
            for j in range(per_week):
                n = int(rng.integers(800, 3000))
                rate = base.get(ch, 0.02) * float(np.exp(rng.normal(0, 0.15)))
                specs.append({"day": monday + timedelta(days=int(rng.integers(0, 7))), "channel": ch,
                              "impressions": n, "clicks": int(rng.binomial(n, rate)), "hour": int(8 + 3 * j),
                              "headline": f"{ch} week {w} post {j}", "post_id": f"{ch}-{w}-{j}"})
    return specs


# ------------------------------------------------------------- shift-share
def test_shift_share_worked_example_by_hand():
    # Our own worked example, computed by hand (method: Kitagawa 1955, "Components of a
    # difference between two rates", JASA 50:1168-1194, the symmetric form with average weights).
    #   base:    A 1000 impressions, 50 clicks (5%);  B 3000, 30 (1%)   -> pooled 80/4000  = 2%
    #   current: A 2000 impressions, 80 clicks (4%);  B 2000, 30 (1.5%) -> pooled 110/4000 = 2.75%
    #   shares w0 = (1/4, 3/4), w1 = (1/2, 1/2); change = +0.75 points
    #   mix A    = (1/2 - 1/4) (0.05 + 0.04)/2  = 0.25 x 0.045  = 0.01125   = 9/800
    #   mix B    = (1/2 - 3/4) (0.01 + 0.015)/2 = -0.25 x 0.0125 = -0.003125 = -1/320
    #   within A = (0.04 - 0.05) (1/4 + 1/2)/2  = -0.01 x 0.375  = -0.00375  = -3/800
    #   within B = (0.015 - 0.01) (3/4 + 1/2)/2 = 0.005 x 0.625  = 0.003125  = 1/320
    #   mix = 0.008125, within = -0.000625, total = 0.0075 = 3/400
    # Kitagawa's cross-check: the mix part equals the average of the two one-sided
    # standardisations, sum (w1 - w0) r0 = 0.01 and sum (w1 - w0) r1 = 0.00625 -> 0.008125.
    base = counts_frame([("A", 1000, 50), ("B", 3000, 30)])
    cur = counts_frame([("A", 2000, 80), ("B", 2000, 30)])
    rows = {r.group: r for r in shift_share_exact(base, cur, "channel")}
    assert rows["A"].mix == Fraction(9, 800)
    assert rows["B"].mix == Fraction(-1, 320)
    assert rows["A"].within == Fraction(-3, 800)
    assert rows["B"].within == Fraction(1, 320)
    table = shift_share(base, cur, "channel")
    assert table.attrs["mix"] == Fraction(13, 1600)          # 0.008125
    assert table.attrs["within"] == Fraction(-1, 1600)       # -0.000625
    assert table.attrs["total_change"] == Fraction(3, 400)   # 0.0075 = 110/4000 - 80/4000
    assert table["total"].sum() == pytest.approx(0.0075, abs=1e-15)


def test_shift_share_matches_a_published_dataset_from_memory():
    # UC Berkeley graduate admissions, fall 1973, six largest departments (Bickel, Hammel &
    # O'Connell 1975, Science 187:398-404; the same counts as R's UCBAdmissions data set).
    # The counts are recalled from memory. The paper's conclusion is the check: women's lower
    # pooled admission rate came from applying to departments that admit fewer applicants
    # (composition), while within departments women did, if anything, slightly better.
    men = [("A", 825, 512), ("B", 560, 353), ("C", 325, 120), ("D", 417, 138), ("E", 191, 53), ("F", 373, 22)]
    women = [("A", 108, 89), ("B", 25, 17), ("C", 593, 202), ("D", 375, 131), ("E", 393, 94), ("F", 341, 24)]
    table = shift_share(counts_frame(men), counts_frame(women), "channel")
    total = Fraction(557, 1835) - Fraction(1198, 2691)   # pooled rates 30.4% and 44.5%
    assert table.attrs["total_change"] == total
    assert float(table.attrs["mix"]) < float(total) < 0 < float(table.attrs["within"])
    # Independent plain-float computation of the same symmetric formula.
    N0, N1 = 2691, 1835
    mix = sum((w[1] / N1 - m[1] / N0) * (m[2] / m[1] + w[2] / w[1]) / 2 for m, w in zip(men, women))
    assert float(table.attrs["mix"]) == pytest.approx(mix, rel=1e-12)
    assert float(table.attrs["mix"]) == pytest.approx(-0.1777, abs=5e-4)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.sampled_from("abcdef"), st.integers(0, 5000), st.integers(0, 5000),
                          st.booleans()), min_size=1, max_size=12))
def test_shift_share_parts_add_up_exactly(rows):
    base, cur = [], []
    for g, n, k_raw, in_current in rows:
        k = min(k_raw, n)
        (cur if in_current else base).append((g, n, k))
    b, c = counts_frame(base), counts_frame(cur)
    parts = shift_share_exact(b, c, "channel")
    if b["n"].sum() == 0 or c["n"].sum() == 0:
        assert parts == []
        return
    total = Fraction(int(c["k"].sum()), int(c["n"].sum())) - Fraction(int(b["k"].sum()), int(b["n"].sum()))
    assert sum((p.mix + p.within for p in parts), Fraction(0)) == total   # exactly, in rationals


def test_display_rounding_keeps_the_sum():
    # Largest-remainder rounding (the Hamilton method): the printed parts add to the printed total.
    parts = [0.125, 0.125, 0.25]   # 0.13 + 0.13 + 0.25 would print 0.51 for a total of 0.50
    shown = round_preserving_sum(parts, 2)
    assert sum(shown) == pytest.approx(0.50)
    assert all(abs(a - b) < 0.01 + 1e-12 for a, b in zip(shown, parts))


# ------------------------------------------------------------ EB shrinkage
def test_shrinkage_matches_independent_method_of_moments():
    # With a common number of impressions n per post, the beta-binomial moment estimator is the
    # classic one (Kleinman 1973, JASA 68:46-54, equal-n case; formula recalled from memory):
    #   mean m = mean(k)/n,  Var(k/n) = m (1 - m) [1 + (n - 1) rho] / n,  s = 1/rho - 1,
    # with the unbiased sample variance of the rates. Computed here without contentlab.stats.
    rng = np.random.default_rng(7)
    n = 2000
    true_rates = rng.beta(20, 780, size=60)          # mean 2.5%, strength 800
    k = rng.binomial(n, true_rates)
    r = k / n
    m = r.mean()
    var = r.var(ddof=1)
    rho = (var / (m * (1 - m)) - 1 / n) / (1 - 1 / n)
    s = 1 / rho - 1
    expected_shrunken = (k + m * s) / (n + s)

    frame = pd.DataFrame({"channel": "newsletter", "k": k.astype(float), "n": float(n),
                          "post_id": [f"p{i}" for i in range(len(k))], "headline": "h",
                          "day": [date(2026, 1, 5)] * len(k)})
    priors = channel_priors(frame)
    row = priors.set_index("channel").loc["newsletter"]
    assert row["mean"] == pytest.approx(m, rel=1e-10)
    assert row["strength"] == pytest.approx(s, rel=1e-8)
    ranked = shrink_posts(frame, priors).set_index("post_id")
    got = ranked.loc[frame["post_id"], "shrunken_rate"].to_numpy()
    np.testing.assert_allclose(got, expected_shrunken, rtol=1e-8)


def test_a_post_with_30_impressions_cannot_top_the_list():
    rng = np.random.default_rng(3)
    n = rng.integers(2000, 6000, size=40)
    k = rng.binomial(n, rng.beta(30, 1170, size=40))          # about 2.5%
    hist = pd.DataFrame({"channel": "social", "k": k.astype(float), "n": n.astype(float),
                         "post_id": [f"h{i}" for i in range(40)], "headline": "old",
                         "day": [date(2026, 1, 5)] * 40})
    week = pd.DataFrame({"channel": "social", "k": [6.0, 180.0], "n": [30.0, 5000.0],
                         "post_id": ["lucky", "solid"], "headline": ["Lucky", "Solid"],
                         "day": [date(2026, 3, 2)] * 2})
    priors = channel_priors(hist, week)
    ranked = shrink_posts(week, priors)
    # Raw rates: 20% against 3.6%; shrunken, the big post (3.6%) must come first.
    assert list(ranked["post_id"]) == ["solid", "lucky"]
    lucky = ranked.set_index("post_id").loc["lucky"]
    assert lucky["shrunken_rate"] < 0.05 < lucky["rate"]


# ------------------------------------------------- noise and residuals
def test_noise_check_matches_a_hand_loop():
    # One post a week, 10,000 impressions each: rates are known, so the past "rate minus the
    # previous four weeks pooled" differences can be listed directly and their sd taken.
    monday = date(2026, 6, 1)
    rng = np.random.default_rng(11)
    weeks = 40
    k = rng.binomial(10_000, 0.03, size=weeks)
    k[-1] = 420   # 4.2%: a jump
    specs = [{"day": monday - timedelta(days=7 * (weeks - 1 - i)), "impressions": 10_000, "clicks": int(k[i])}
             for i in range(weeks)]
    frame = usable(_as_posts(specs), "clicks")
    period = Period(monday, monday + timedelta(days=6), "2026-W23", "week", "test")
    got = noise_check(frame, period)
    rates = k / 10_000
    # A past week counts once at least 2 of its 4 previous weeks have posts (weeks 3, 4, ...).
    diffs = [rates[i] - rates[max(0, i - 4):i].mean() for i in range(2, weeks)]   # equal n: pooled = mean
    ref = np.array(diffs[:-1])
    assert got["n_ref"] == len(ref)
    assert got["sd"] == pytest.approx(ref.std(ddof=1), rel=1e-12)
    assert got["z"] == pytest.approx(diffs[-1] / ref.std(ddof=1), rel=1e-12)
    assert got["beyond"] is True


def test_noise_check_says_when_history_is_too_short():
    monday = date(2026, 6, 1)
    specs = [{"day": monday - timedelta(days=7 * i), "impressions": 1000, "clicks": 20 + i} for i in range(5)]
    got = noise_check(usable(_as_posts(specs), "clicks"), Period(monday, monday + timedelta(days=6), "x", "week", ""))
    assert got["beyond"] is None and "too little history" in got["verdict"]


def test_overdispersed_residuals_match_beta_binomial_variance():
    # Beta-binomial variance n p (1 - p) (1 + (n - 1) rho) (e.g. Kleinman 1973); check against
    # scipy.stats.betabinom for a = p s, b = (1 - p) s, rho = 1 / (s + 1).
    from scipy import stats

    p, s, n = 0.03, 400.0, 5000
    rho = 1 / (s + 1)
    var = stats.betabinom(n, p * s, (1 - p) * s).var()
    k = n * p + 2 * np.sqrt(var)
    assert standardised_residuals([k], [n], [p], rho)[0] == pytest.approx(2.0, rel=1e-9)
    # And the moment estimate of rho recovers it from simulated beta-binomial counts.
    rng = np.random.default_rng(5)
    kk = stats.betabinom(n, p * s, (1 - p) * s).rvs(size=4000, random_state=rng)
    assert overdispersion_rho(kk, np.full(4000, n), np.full(4000, p)) == pytest.approx(rho, rel=0.15)


def _as_posts(specs: list[dict]) -> pd.DataFrame:
    from contentlab.workspace import add_local_time

    frame = make_posts(specs)
    frame["source"] = "import"
    return add_local_time(frame, "UTC")


# ------------------------------------------------------------------ periods
def test_default_period_is_last_complete_iso_week():
    specs = [{"day": date(2026, 11, 27), "impressions": 100, "clicks": 3},
             {"day": date(2026, 12, 1), "impressions": 100, "clicks": 3}]
    posts = _as_posts(specs)
    # On Tue 1 Dec 2026 the week of 30 Nov is not over: the default is 2026-W48 (23-29 Nov).
    p = resolve_period(posts, today=date(2026, 12, 1))
    assert (p.label, p.start, p.end) == ("2026-W48", date(2026, 11, 23), date(2026, 11, 29))
    assert "last complete ISO week" in p.why
    # A week later the week of 30 Nov is complete and has a post.
    assert resolve_period(posts, today=date(2026, 12, 8)).label == "2026-W49"


def test_period_options_and_their_errors():
    assert parse_iso_week("2026-W53") == (date(2026, 12, 28), date(2027, 1, 3))   # 2026 has 53 ISO weeks
    with pytest.raises(ContentlabError, match="has no ISO week 53"):
        parse_iso_week("2025-W53")
    with pytest.raises(ContentlabError, match="2026-W48"):
        parse_iso_week("48")
    empty = _as_posts([{"day": date(2026, 1, 1), "impressions": 1, "clicks": 0}])
    r = resolve_period(empty, start="2026-11-01", end="2026-11-14")
    assert (r.kind, r.days, r.label) == ("range", 14, "2026-11-01_to_2026-11-14")
    with pytest.raises(ContentlabError, match="before"):
        resolve_period(empty, start="2026-11-14", end="2026-11-01")
    with pytest.raises(ContentlabError, match="not both"):
        resolve_period(empty, week="2026-W48", start="2026-11-01", end="2026-11-07")


# ------------------------------------------------------- rendering edge cases
def _render(ws: Workspace, **kw) -> tuple[object, str]:
    report = build_report(ws, today=kw.pop("today", date(2026, 12, 1)), **kw)
    return report, render_html(report)


def _text(html: str) -> str:
    return re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", html))


def test_report_for_an_empty_week(tmp_path):
    ws = workspace_with(tmp_path, weekly_history(12, date(2026, 11, 9)))
    report, html = _render(ws, week="2026-W48")          # the history ends in W46
    assert report.headline["status"] == "empty"
    assert "No posts with impressions were published in week 2026-W48" in _text(html)
    assert "No posts this week, so none can be unusual." in _text(html)
    files = write_report(report, tmp_path / "out")
    assert files.html.exists() and files.html.name == "contentlab-report-2026-W48.html"


def test_report_for_an_empty_workspace(tmp_path):
    ws = workspace_with(tmp_path, [])
    report, html = _render(ws)
    assert report.period.label == "2026-W48" and "last week" in report.period.why
    assert "No posts with impressions" in _text(html)
    assert 'data-chart="trend"' not in html          # nothing to draw, and it says so
    assert "needs contentlab learn" in html


def test_report_for_a_week_with_one_post(tmp_path):
    specs = weekly_history(20, date(2026, 11, 16))
    specs.append({"day": date(2026, 11, 24), "channel": "newsletter", "impressions": 1500, "clicks": 80,
                  "headline": "The only post this week"})
    ws = workspace_with(tmp_path, specs)
    report, html = _render(ws)
    assert report.period.label == "2026-W48"
    assert report.headline["current"]["posts"] == 1
    text = _text(html)
    assert "One post this week: “The only post this week”" in text
    assert "best and worst lists need at least two" in text
    assert 'data-chart="trend"' in html


def test_report_for_a_one_channel_history(tmp_path):
    ws = workspace_with(tmp_path, weekly_history(30, date(2026, 11, 23), channels=("newsletter",)))
    report, html = _render(ws)
    text = _text(html)
    assert "All posts are on one channel (newsletter)" in text
    assert "With one channel there is no mix to shift" in text
    assert 'data-chart="channels"' not in html and 'data-chart="shift-share"' not in html
    # One channel: the shift-share "within" part is the whole change.
    t = report.tables["shift_share"].set_index("group")
    assert t.loc["TOTAL", "mix"] == 0 and t.loc["TOTAL", "within"] == pytest.approx(report.headline["change"])


# -------------------------------------------------------------------- safety
HOSTILE = [
    "<script>alert('x')</script> Library news",
    '"><img src=x onerror=alert(1)> opening hours',
    "=HYPERLINK(\"http://evil.example\",\"click\")",
    "@SUM(A1:A9) budget",
    "+1 reasons to read",
    "-2 fewer fines",
    "Costs $5 and $6 $\\alpha$ {{ 7*7 }} {% raw %}",
]


def test_hostile_headlines_are_escaped_and_csv_neutralised(tmp_path):
    specs = weekly_history(12, date(2026, 11, 16), channels=("newsletter",))
    for i, h in enumerate(HOSTILE):
        specs.append({"day": date(2026, 11, 23) + timedelta(days=i % 5), "impressions": 2000 + 10 * i,
                      "clicks": 40 + i, "headline": h, "channel": "<b>x</b>" if i == 0 else "newsletter",
                      "cost": 3.0})
    ws = workspace_with(tmp_path, specs)
    report = build_report(ws, today=date(2026, 12, 1))
    html = render_html(report)
    assert "<script" not in html.lower()
    assert "<img" not in html.lower() and "<b>x</b>" not in html
    assert "&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt; Library news" in html
    assert "&lt;b&gt;x&lt;/b&gt;" in html                        # the channel, escaped (table and SVG)
    assert "{{ 7*7 }}" in html and "49" not in _text(html).split("7*7")[0][-3:]   # not evaluated as a template
    tags = _tags(html)   # what a browser would build from the page (standard-library HTML parser)
    assert not {"script", "img", "iframe", "object", "embed", "b"} & {t for t, _ in tags}
    assert not [a for _, attrs in tags for a, _v in attrs if a.startswith("on")]
    files = write_report(report, tmp_path / "out")
    starts = set()
    for path in files.tables:
        with path.open(newline="", encoding="utf-8") as fh:
            for row in csv.reader(fh):
                for cell in row:
                    if cell[:1] in ("=", "+", "@") or (cell[:1] == "-" and not _is_number(cell)):
                        starts.add((path.name, cell))
    assert not starts, f"formula-like cells left in CSV: {sorted(starts)[:5]}"
    ranked = (files.folder / "posts_ranked.csv").read_text(encoding="utf-8")
    assert "'=HYPERLINK" in ranked and "'@SUM" in ranked and "'+1 reasons" in ranked and "'-2 fewer" in ranked


def _tags(html: str) -> list[tuple[str, list]]:
    from html.parser import HTMLParser

    found: list[tuple[str, list]] = []

    class Collect(HTMLParser):
        def handle_starttag(self, tag, attrs):
            found.append((tag, attrs))

    Collect().feed(html)
    return found


def _is_number(text: str) -> bool:
    try:
        float(text)
        return True
    except ValueError:
        return False


def test_report_is_self_contained(tmp_path):
    ws = workspace_with(tmp_path, weekly_history(30, date(2026, 11, 23), channels=("newsletter", "social", "blog")))
    html = render_html(build_report(ws, today=date(2026, 12, 1)))
    assert not re.search(r"(src|href)\s*=\s*[\"']?(https?:)?//", html, re.I)
    assert not re.search(r"url\(\s*[\"']?(https?:)?//", html, re.I)
    assert "@import" not in html and "<link" not in html.lower() and "<script" not in html.lower()
    assert "http://" not in html and "https://" not in html
    assert "default-src 'none'" in html                 # and the browser would refuse anything else
    assert "@media print" in html and 'name="viewport"' in html


# -------------------------------------------------------------- demo corpus
# Small, fast model settings for tests: one penalty (no search), five bootstrap refits.
FAST_MODEL = {"alphas": [0.03], "n_bootstrap": 5}


@pytest.fixture(scope="module")
def demo_ws(tmp_path_factory):
    """The demo corpus in a fresh workspace with two fits: one without the last week, one with it."""
    from contentlab.history import import_history

    if not CORPUS.exists():
        pytest.skip("corpus/posts.csv is not in this checkout")
    path = tmp_path_factory.mktemp("demo") / "ws"
    ws = Workspace.open(path, timezone="Europe/London")
    import_history(ws, CORPUS, None, progress=False)
    try:
        from contentlab.model import EngagementModel
    except ImportError:
        yield ws
        ws.close()
        return
    posts = ws.posts()
    earlier = posts[posts["local_date"] < pd.Timestamp("2026-11-23")]
    for frame in (earlier, posts):
        model = EngagementModel(**FAST_MODEL).fit(frame)
        ws.save_model("clicks", ws.fingerprint("clicks"), model.summary(), model)
    yield ws
    ws.close()


@pytest.fixture(scope="module")
def demo_report(demo_ws):
    return build_report(demo_ws, today=date(2026, 12, 1), drafts=REPO / "corpus" / "drafts.csv")


def test_demo_report_sections_and_consistency(demo_report, tmp_path):
    r = demo_report
    assert r.period.label == "2026-W48"
    html = render_html(r)
    for anchor in ("headline", "what-happened", "why", "what-works", "experiments", "next-week", "cautions"):
        assert f'id="{anchor}"' in html
    # The order the brief asks for.
    positions = [html.index(f'id="{a}"') for a in ("headline", "what-happened", "why", "what-works",
                                                     "experiments", "next-week")]
    assert positions == sorted(positions)
    # The decomposition's total is the headline's change, to the last digit.
    total = r.tables["shift_share"].set_index("group").loc["TOTAL", "total"]
    assert total == pytest.approx(r.headline["change"], abs=1e-15)
    # One colour per channel in every chart that shows channels.
    from contentlab.charts import channel_colours

    colours = channel_colours(["blog", "newsletter", "social_short", "social_visual"])
    for chart in ("channels", "shift-share"):
        svg = r.charts[chart]
        for ch in ("blog", "social_short", "social_visual"):
            assert colours[ch] in svg
    # The trend shows 26 weeks and the same weeks last year.
    trend = r.tables["trend"]
    assert len(trend) == 26 and trend["last_year_rate"].notna().sum() >= 20
    assert "Correlation is not causation" in html and "truthful" in html
    assert 2 <= len(r.next_week["recommendations"]) <= 3
    files = write_report(r, tmp_path)
    assert {p.name for p in files.tables} >= {"trend.csv", "channels.csv", "posts_ranked.csv", "shift_share.csv",
                                              "residual_posts.csv", "recommendations.csv"}


def test_cli_report_writes_html_and_tables(demo_ws, tmp_path, capsys):
    from conftest import workspace_digest

    out = tmp_path / "reports"
    before = workspace_digest(demo_ws.path)
    code = main(["report", "--workspace", str(demo_ws.path), "--week", "2026-W47", "--out", str(out)])
    assert code == 0
    assert workspace_digest(demo_ws.path) == before          # writing a report changes nothing in the workspace
    printed = capsys.readouterr().out
    assert "week 2026-W47" in printed and "the week you asked for" in printed
    assert (out / "contentlab-report-2026-W47.html").exists()
    assert (out / "contentlab-report-2026-W47" / "channels.csv").exists()


def test_cli_report_errors_are_one_line(tmp_path, capsys):
    assert main(["report", "--workspace", str(tmp_path / "nothing"), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("contentlab report:") and "\n" not in err and "contentlab import" in err
    ws = workspace_with(tmp_path, weekly_history(3, date(2026, 11, 16)))
    ws.close()
    assert main(["report", "--workspace", str(tmp_path / "ws"), "--week", "2026-48"]) == 2
    assert "Write it like 2026-W48" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_experiments_section_shows_arms_decision_and_gain(tmp_path):
    from contentlab.experiments import create_experiment, experiment_status, record_results

    ws = workspace_with(tmp_path, weekly_history(12, date(2026, 11, 23)))
    # Tags are stripped from drafts on the way in (contentlab.features.clean_headline); what is
    # left must still be escaped on the way out.
    drafts = ["Plain draft about opening hours", 'Fines cut: 5 < 6 & "free" days', "A third draft"]
    create_experiment(ws, "winter-hours", drafts, flat_prior=True, channel="newsletter", seed=1)
    results = pd.DataFrame({"arm": ["A", "B", "C"], "impressions": ["4000", "4000", "4000"],
                            "clicks": ["80", "160", "90"], "at": ["2026-11-25T10:00:00+00:00"] * 3})
    record_results(ws, "winter-hours", results)
    status = experiment_status(ws, "winter-hours")
    report = build_report(ws, today=date(2026, 12, 1))
    html = render_html(report)
    item = report.experiments["items"][0]
    assert report.experiments["status"] == "ok" and item["leader"] == status.decision.leader == "B"
    assert item["gain"] == pytest.approx(status.clicks_gained)
    assert [a["prob_best"] for a in item["arms"]] == [probability(p) for p in status.arms["prob_best"]]
    from markupsafe import escape

    assert f"Decision: {escape(status.decision.reason)}" in html
    assert 'data-chart="experiment-1"' in html
    assert "5 < 6" not in html and "Fines cut: 5 &lt; 6 &amp; &#34;free&#34; days" in html
    t = report.tables["experiment_arms"]
    assert set(t["arm"]) == {"A", "B", "C"} and "prob_best" in t


def _model_or_skip(ws):
    if ws.latest_model_row("clicks") is None:
        pytest.skip("contentlab.model is not available, so the demo workspace has no fitted model")
    return ws.load_model("clicks")[0]


def test_demo_report_drivers_come_from_the_model(demo_ws, demo_report):
    model = _model_or_skip(demo_ws)
    works = demo_report.works
    assert works["status"] == "ok" and "drivers" in demo_report.charts
    drivers = model.drivers()
    shown = demo_report.tables["drivers"].set_index("feature")
    for _, row in drivers.iterrows():
        got = shown.loc[row["driver"]]
        assert got["effect_pct"] == pytest.approx(row["relative_change"], rel=1e-12)
        assert (got["low_pct"], got["high_pct"]) == pytest.approx((row["low"], row["high"]), rel=1e-12)
        assert bool(got["clear"]) == (not row["uncertain"])
    # One bar per shown driver at each drawing size, largest rise first and largest fall last (sorted by
    # effect, not by size), with one tick format on the axis.
    svg = demo_report.charts["drivers"]
    shown_n = min(len(drivers), 12)
    assert svg.count('class="bar"') == 2 * shown_n
    effects = [r["effect_value"] for r in works["rows"]]
    assert effects == sorted(effects, reverse=True)
    wide = svg.split('data-size="narrow"')[0]
    ticks = re.findall(r'text-anchor="middle" fill="#23313a">([^<]*%)</text>', wide)
    assert len(ticks) >= 3 and len({len(t.split(".")[-1]) if "." in t else 0 for t in ticks}) == 1
    assert all(t[0] in "+\u2212" or t.startswith("0") for t in ticks)
    assert "Against the previous fit" in works["changes_idea"]
    assert "not proof of cause" in " ".join(works["cautions"])


def test_demo_report_residuals_use_out_of_fold_predictions(demo_ws, demo_report):
    model = _model_or_skip(demo_ws)
    res = demo_report.tables["residual_posts"].set_index("post_id")
    oof = model.oof_.set_index("post_id")["predicted_rate"]
    common = [p for p in res.index if p in oof.index and np.isfinite(oof[p])]
    assert common, "the reported week's posts should have out-of-fold predictions"
    np.testing.assert_allclose(res.loc[common, "predicted_rate"], oof[common], rtol=1e-12)
    # z recomputed from its definition with the report's rho.
    rho = demo_report.why["rho"]
    r = res.loc[common]
    z = (r["outcome"] - r["impressions"] * r["predicted_rate"]) / np.sqrt(
        r["impressions"] * r["predicted_rate"] * (1 - r["predicted_rate"]) * (1 + (r["impressions"] - 1) * rho))
    np.testing.assert_allclose(r["z"], z, rtol=1e-10)
    assert "out-of-fold" in demo_report.why["unusual_source"]


def test_demo_report_next_week_slots_and_drafts(demo_ws, demo_report):
    _model_or_skip(demo_ws)
    nw = demo_report.next_week
    assert {r["channel"] for r in nw["slot_rows"]} == {"blog", "newsletter", "social_short", "social_visual"}
    drafts = demo_report.tables["drafts"]
    assert len(drafts) == 20 and set(drafts["group"]) >= {"makerspace-launch", "winter-reading"}
    assert sum(1 for r in nw["draft_rows"] if r["rank"] == 1) == 5       # one leader per group
    assert nw["best_draft"]["rank"] == 1
    assert 2 <= len(nw["recommendations"]) <= 3
    assert all(r["evidence"] for r in nw["recommendations"])
    # A leader's wording follows its probability of being truly better than the next draft, and never
    # contradicts the section's own rule (overlapping ranges are close calls unless that probability is high).
    from contentlab.scoring import LIKELY_AHEAD

    for row, (_, d) in zip(sorted(nw["draft_rows"], key=lambda r: (r["group"], r["headline"])),
                           drafts.sort_values(["group", "headline"]).iterrows()):
        assert row["headline"] == d["headline"]
        assert "clearly" not in row["verdict"]
        if d["group_rank"] == 1 and np.isfinite(d["p_better_than_next"]):
            word = "likely better" if d["p_better_than_next"] >= LIKELY_AHEAD else "a close call"
            assert row["verdict"].startswith(word), (row["verdict"], d["p_better_than_next"])
        else:
            assert row["verdict"] == ""
    assert f"below {LIKELY_AHEAD:.0%} it is a close call" in nw["drafts_meaning"]


@settings(max_examples=8, deadline=None)
@given(st.lists(st.fixed_dictionaries({
    "day": st.integers(0, 69).map(lambda d: date(2026, 9, 21) + timedelta(days=d)),
    "channel": st.sampled_from(["newsletter", "social", None]),
    "impressions": st.integers(0, 5000),
    "share": st.floats(0, 0.2),
    "hour": st.one_of(st.none(), st.integers(0, 23)),
}), min_size=0, max_size=30), st.integers(39, 49))
def test_any_small_history_renders(tmp_path_factory, posts, week):
    specs = [{**p, "clicks": int(p["impressions"] * p["share"])} for p in posts]
    ws = workspace_with(tmp_path_factory.mktemp("fuzz"), specs)
    report = build_report(ws, week=f"2026-W{week}", today=date(2026, 12, 8))
    html = render_html(report)
    ws.close()
    assert report.headline["idea"] and f"Week 2026-W{week}" in html
    change = report.headline["change"]
    if "shift_share" in report.tables and np.isfinite(change):
        total = report.tables["shift_share"].set_index("group").loc["TOTAL", "total"]
        assert total == pytest.approx(change, abs=1e-12)


def test_posts_newer_than_the_fit_use_the_models_prediction(tmp_path):
    try:
        from contentlab.model import EngagementModel
    except ImportError:
        pytest.skip("contentlab.model is not available")
    specs = weekly_history(30, date(2026, 11, 23))
    ws = workspace_with(tmp_path, [s for s in specs if s["day"] < date(2026, 11, 23)])
    model = EngagementModel(**FAST_MODEL).fit(ws.posts())
    ws.save_model("clicks", ws.fingerprint("clicks"), model.summary(), model)
    with ws.conn:   # the week's export arrives after the fit
        ws.upsert_posts(make_posts(specs).iloc[[i for i, s in enumerate(specs) if s["day"] >= date(2026, 11, 23)]])
    posts = ws.posts()
    report = build_report(ws, today=date(2026, 12, 1))
    assert "newer than the fit" in report.why["unusual_source"]
    assert any("before the latest changes" in n for n in report.works["notes"])   # the fit is stale: said so
    res = report.tables["residual_posts"].set_index("post_id")
    week = posts[posts["local_date"] >= pd.Timestamp("2026-11-23")].set_index("post_id")
    expected = model.predict_frame(week)["predicted_rate"]
    np.testing.assert_allclose(res.loc[week.index, "predicted_rate"], expected.loc[week.index], rtol=1e-12)


def test_charts_are_safe_to_inline_together(demo_report):
    from contentlab.charts import channel_colours, label

    html = render_html(demo_report)
    ids = re.findall(r'\sid="([^"]+)"', html)
    assert len(ids) == len(set(ids)), "two elements share an id once the charts are inlined"
    refs = set(re.findall(r'href="#([^"]+)"', html)) | set(re.findall(r"url\(#([^)]+)\)", html))
    assert refs <= set(ids)                                  # every marker/clip/pattern reference resolves
    assert "<?xml" not in html and "<!DOCTYPE svg" not in html and "<metadata" not in html
    # One colour per channel whatever order the channels arrive in; a missing channel is grey.
    assert channel_colours(["b", "a", "(none)"]) == channel_colours(["(none)", "a", "b"])
    assert len(set(channel_colours(["a", "b", "c", "d"]).values())) == 4
    assert label("costs   $5\nand $6") == "costs $5 and $6"     # one line, text kept as it is (escaped on drawing)


# ------------------------------------------------------------ hostile text in charts
HOSTILE_NAMES = [
    "Learn JavaScript: first steps at the makerspace",          # ordinary text that once blocked every report
    '<svg onload="alert(1)"><script>alert(2)</script>',
    '" onmouseover="alert(3)',
    "javascript:alert(4) <a href='javascript:alert(5)'>x</a>",
    "]]><foreignObject><iframe src=//x></iframe></foreignObject>",
    "&amp; &lt;b&gt; url(https://x/y) <!-- c -->",
    "Control\x0bcharacters\x00 and \x1b[31m escapes \ufffe",
]


def test_hostile_text_in_every_chart_is_escaped_and_the_report_is_written(tmp_path):
    """Headlines, channels and experiment arms with markup, event handlers or "JavaScript:" become text."""
    from contentlab.experiments import create_experiment, record_results, stop_experiment

    specs = weekly_history(12, date(2026, 11, 16), channels=("newsletter", HOSTILE_NAMES[1]))
    for i, h in enumerate(HOSTILE_NAMES):
        specs.append({"day": date(2026, 11, 23) + timedelta(days=i % 5), "impressions": 3000, "clicks": 60 + i,
                      "headline": h, "channel": HOSTILE_NAMES[(i + 2) % len(HOSTILE_NAMES)]})
    ws = workspace_with(tmp_path, specs)
    create_experiment(ws, "makerspace", HOSTILE_NAMES[:4], flat_prior=True, channel="newsletter", seed=1)
    record_results(ws, "makerspace", pd.DataFrame({"arm": ["A", "B", "C", "D"], "impressions": ["900"] * 4,
                                                   "clicks": ["20", "30", "25", "10"],
                                                   "at": ["2026-11-25T10:00:00+00:00"] * 4}))
    for stopped in (False, True):   # before and after the experiment is stopped
        if stopped:
            stop_experiment(ws, "makerspace")
        report = build_report(ws, today=date(2026, 12, 1))
        assert {"channels", "shift-share", "experiment-1"} <= set(report.charts)
        assert {"experiments", "experiment_arms"} <= set(report.tables) <= REPORT_TABLES
        from contentlab.charts import check_svg

        for name, svg in report.charts.items():
            assert check_svg(svg) == [], name
        files = write_report(report, tmp_path / f"out{int(stopped)}")
        html = files.html.read_text(encoding="utf-8")
        tags = _tags(html)
        assert not {"script", "iframe", "foreignobject"} & {t for t, _ in tags}
        assert all(v.startswith("#") for t, attrs in tags if t == "a" for k, v in attrs if k == "href")
        assert not [a for _, attrs in tags for a, _v in attrs if a.startswith("on")]
        assert "Learn JavaScript: first steps at the makerspace" in html
        assert "&lt;script&gt;alert(2)&lt;/script&gt;" in html


@pytest.mark.parametrize("svg, finding", [
    ('<svg class="chart"><script>alert(1)</script></svg>', "element <script>"),
    ('<svg class="chart" onload="alert(1)"></svg>', "attribute 'onload'"),
    ('<svg class="chart"><text fill="url(https://x/y)">t</text></svg>', "value"),
    ('<svg class="chart"><foreignObject/></svg>', "element <foreignObject>"),
    ('<svg class="chart"><text>unclosed</svg>', "not well-formed"),
    ('<p>not a chart</p>', "element <p>"),
])
def test_svg_check_refuses_what_is_not_plain_svg(svg, finding):
    from contentlab.charts import check_svg

    assert any(finding in p for p in check_svg(svg)), check_svg(svg)


def test_chart_text_sizes_and_labels_fit():
    """Every chart at both sizes: text of 12 px or more in its own units, and every text inside the width.

    Widths are the charts' own estimates (checked against Chromium's measured widths in
    tests/test_report_browser.py, which also measures the drawn size at 390 px).
    """
    from contentlab import charts

    long = "a very long driver label that would never fit in one line of a phone-sized chart at all, really"
    svgs = [charts.interval_bars([long, "short"], [0.2, -0.1], [0.1, -0.2], [0.3, 0.05], percent=True),
            charts.channel_bars(["newsletter", long], [0.02, 0.03], [0.025, float("nan")], {}),
            charts.probability_bars([f"A: {long}", "B: x"], [0.7, 0.3], highlight=0),
            charts.trend_chart([f"W{i}" for i in range(26)], [0.02 + 0.001 * i for i in range(26)])]
    for svg in svgs:
        assert min(float(s) for s in re.findall(r'font-size="([\d.]+)"', svg)) >= 12
        for size in charts.SIZES:
            part = svg.split(f'data-size="{size.name}"')[1].split("</svg>")[0]
            for x, attrs, text in re.findall(r'<text x="([\d.]+)"([^>]*)>([^<]*)</text>', part):
                fs = float(re.search(r'font-size="([\d.]+)"', attrs).group(1))
                w = charts.text_width(text, fs, 'font-weight="600"' in attrs)
                anchor = re.search(r'text-anchor="(\w+)"', attrs)
                left = float(x) - (w if anchor and anchor.group(1) == "end" else
                                   w / 2 if anchor and anchor.group(1) == "middle" else 0)
                assert -0.5 <= left and left + w <= size.width + 0.5, (size.name, text)


def test_report_html_returns_the_page_for_a_week_without_writing(tmp_path):
    """The entry point a server calls: the same page write_report saves, as a string, for any week."""
    from contentlab.report import report_html

    ws = workspace_with(tmp_path, weekly_history(12, date(2026, 11, 23)))
    page = report_html(ws, week="2026-W47", today=date(2026, 12, 1))
    files = write_report(build_report(ws, week="2026-W47", today=date(2026, 12, 1)), tmp_path / "out")
    saved = files.html.read_text(encoding="utf-8")
    stamp = re.compile(r"written \d{4}-\d\d-\d\d \d\d:\d\d")
    assert stamp.sub("", page) == stamp.sub("", saved) and "Week 2026-W47" in page
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out", "ws"]     # nothing else written
    with pytest.raises(ContentlabError, match="not an ISO week"):
        report_html(ws, week="W47")


def test_every_table_the_demo_report_writes_is_a_known_table_name(demo_report):
    """A folder from before the manifest loses only files named like REPORT_TABLES, so that list must be whole."""
    assert set(demo_report.tables) <= REPORT_TABLES
    assert {"drivers", "driver_changes", "slots", "drafts"} <= set(demo_report.tables)


def _small_report(tmp_path):
    ws = workspace_with(tmp_path, weekly_history(12, date(2026, 11, 9)))
    report = build_report(ws, week="2026-W46", today=date(2026, 12, 1))
    ws.close()
    return report


def test_a_rerun_removes_only_the_tables_contentlab_wrote_there(tmp_path):
    import dataclasses
    import json

    from contentlab.report import REPORT_MANIFEST

    report = _small_report(tmp_path)
    assert {"trend", "channels"} <= set(report.tables)
    files = write_report(report, tmp_path / "out")
    folder = files.folder
    manifest = json.loads((folder / REPORT_MANIFEST).read_text(encoding="utf-8"))
    assert sorted(manifest["tables"]) == sorted(p.name for p in files.tables)
    (folder / "my-notes.csv").write_text("a,b\n1,2\n", encoding="utf-8")   # the user's own files
    (folder / "my-notes.txt").write_text("keep me", encoding="utf-8")
    fewer = dataclasses.replace(report, tables={k: v for k, v in report.tables.items() if k != "trend"})
    again = write_report(fewer, tmp_path / "out")
    assert not (folder / "trend.csv").exists()                  # the earlier run's table this run did not write
    assert (folder / "channels.csv").exists()
    assert (folder / "my-notes.csv").read_text(encoding="utf-8") == "a,b\n1,2\n"
    assert (folder / "my-notes.txt").exists()
    left = sorted(p.name for p in folder.iterdir() if not p.name.startswith("."))
    assert left == sorted([p.name for p in again.tables] + ["my-notes.csv", "my-notes.txt"])
    assert json.loads((folder / REPORT_MANIFEST).read_text(encoding="utf-8"))["tables"] == sorted(
        p.name for p in again.tables)


def test_a_folder_without_manifest_loses_only_files_named_like_report_tables(tmp_path):
    from contentlab.report import REPORT_MANIFEST

    report = _small_report(tmp_path)
    folder = tmp_path / "out" / report.stem
    folder.mkdir(parents=True)
    assert "driver_changes" not in report.tables                 # no model: this run does not write it
    (folder / "driver_changes.csv").write_text("from an older contentlab\n", encoding="utf-8")
    (folder / "budget.csv").write_text("the user's\n", encoding="utf-8")
    write_report(report, tmp_path / "out")
    assert not (folder / "driver_changes.csv").exists()
    assert (folder / "budget.csv").read_text(encoding="utf-8") == "the user's\n"
    assert (folder / REPORT_MANIFEST).exists()


def test_an_edited_manifest_cannot_remove_files_outside_the_tables(tmp_path):
    import json

    from contentlab.report import REPORT_MANIFEST

    report = _small_report(tmp_path)
    folder = tmp_path / "out" / report.stem
    folder.mkdir(parents=True)
    (tmp_path / "out" / "outside.csv").write_text("x\n", encoding="utf-8")
    (folder / "notes.txt").write_text("x\n", encoding="utf-8")
    (folder / REPORT_MANIFEST).write_text(json.dumps({"tables": ["../outside.csv", "notes.txt"]}), encoding="utf-8")
    write_report(report, tmp_path / "out")
    assert (tmp_path / "out" / "outside.csv").exists() and (folder / "notes.txt").exists()


def test_a_damaged_manifest_falls_back_to_the_table_names(tmp_path):
    from contentlab.report import REPORT_MANIFEST

    report = _small_report(tmp_path)
    folder = tmp_path / "out" / report.stem
    folder.mkdir(parents=True)
    (folder / REPORT_MANIFEST).write_text("{not json", encoding="utf-8")
    (folder / "driver_changes.csv").write_text("old\n", encoding="utf-8")
    (folder / "mine.csv").write_text("mine\n", encoding="utf-8")
    write_report(report, tmp_path / "out")
    assert not (folder / "driver_changes.csv").exists() and (folder / "mine.csv").exists()
