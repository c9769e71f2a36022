"""``contentlab score``: how draft headlines are likely to do, why, better edits, best slots.

Thin on purpose: parse, call :func:`contentlab.scoring.score_drafts`, format
(a readable table, or CSV / JSON for tools with the input columns kept).
"""

from __future__ import annotations

import argparse
import sys
import textwrap

from . import add_format_option, add_workspace_option, command_parser

# Edit suggestions are on by default for a handful of drafts (the editor's case) and off for
# large batches, where they would multiply the work; --suggest / --no-suggest decide explicitly.
SUGGEST_AUTO_MAX = 20
WIDTH = 100


def register(subparsers) -> None:
    p = command_parser(
        subparsers,
        "score",
        help="score draft headlines: predicted rate, reasons, better edits, best slots",
        description=(
            "Score draft headlines with the saved model, against your own history. For each draft: the "
            "predicted rate per impression with a 90% interval, its percentile among your past posts on the "
            "same channel, the features that move it most (in plain words), how far it is from the history "
            "the model learned on, and rewrites whose predicted lift is clearly above zero. Drafts given "
            "together are ranked (within their group), with the probability that the top one is truly "
            "better than the next. --slots adds the best posting slots of the coming week. Give headlines "
            "as arguments or a CSV (--input; columns headline, optional channel, publish_at, group). "
            "--format csv|json keep the input columns and add predicted_rate, rate_low, rate_high and more."
        ),
        example='contentlab score "Draft one" "Draft two" --channel newsletter --at "2026-12-03 09:00"\n'
                "  contentlab score --input drafts.csv --format csv > scored.csv",
    )
    p.add_argument("headlines", nargs="*", metavar="HEADLINE", help="draft headlines (or use --input)")
    p.add_argument("--input", metavar="DRAFTS.csv",
                   help="CSV of drafts: headline, optional channel, publish_at or time (local time), group")
    p.add_argument("--channel", help="channel for drafts that name none (e.g. newsletter)")
    p.add_argument("--at", metavar="'YYYY-MM-DD HH:MM'",
                   help="planned publish time (workspace time zone) for drafts that give none")
    p.add_argument("--suggest", action=argparse.BooleanOptionalAction, default=None,
                   help="score rewrites and show clearly better ones "
                        f"(default: on for up to {SUGGEST_AUTO_MAX} drafts)")
    p.add_argument("--slots", action="store_true", help="add the best posting slots of the coming week")
    p.add_argument("--outcome", choices=("clicks", "engagements"), default=None,
                   help="which saved model (default: the newest)")
    add_format_option(p)
    add_workspace_option(p)
    p.set_defaults(handler=cmd_score)


def read_drafts(args: argparse.Namespace):
    import pandas as pd

    from ..errors import ContentlabError
    from ..readers import read_drafts as read_drafts_csv

    if args.input and args.headlines:
        raise ContentlabError("give headlines as arguments or with --input, not both")
    if args.input:
        return read_drafts_csv(args.input)
    if not args.headlines:
        raise ContentlabError('give at least one headline, e.g. contentlab score "Draft one", or --input drafts.csv')
    return pd.DataFrame({"headline": args.headlines})


def cmd_score(args: argparse.Namespace) -> int:
    from ..scoring import score_drafts
    from ..workspace import resolve_dir

    frame = read_drafts(args)
    suggest = args.suggest if args.suggest is not None else len(frame) <= SUGGEST_AUTO_MAX
    result = score_drafts(frame, resolve_dir(args.workspace), channel=args.channel, at=args.at, suggest=suggest,
                          slots=args.slots, outcome=args.outcome)
    if args.format == "csv":
        from ..safety import write_csv

        write_csv(result, sys.stdout)
        for line in list(result.attrs.get("notes") or []) + result.attrs["cautions"]:
            print(f"note: {line}", file=sys.stderr)
    elif args.format == "json":
        print(to_json(result))
    else:
        print(format_table(result))
    return 0


# ------------------------------------------------------------------ formats

def to_json(result) -> str:
    """Drafts as records (input columns kept) with their reasons and suggestions, plus cautions and slots."""
    import json

    records = json.loads(result.to_json(orient="records", date_format="iso"))
    reasons = result.attrs.get("reasons") or []
    suggestions = result.attrs.get("suggestions")
    for i, rec in enumerate(records):
        rec["reasons"] = [{k: r[k] for k in ("feature", "label", "change", "logit")} for r in reasons[i]] \
            if i < len(reasons) else []
        if suggestions is not None:
            rec["suggestions"] = suggestions[i]["suggestions"]
    out = {
        "outcome": result.attrs.get("outcome"),
        "interval": result.attrs.get("level"),
        "drafts": records,
        "cautions": result.attrs.get("cautions", []),
        "notes": result.attrs.get("notes", []),
    }
    plans = result.attrs.get("slot_plans")
    if plans:
        out["slots"] = [None if p is None else {
            "usual": p.usual,
            "best": json.loads(p.best.to_json(orient="records")),
            "table": json.loads(p.table.to_json(orient="records")),
            "notes": p.notes,
        } for p in plans]
    return json.dumps(out, indent=2, ensure_ascii=False)


def _rate(x: float) -> str:
    """A predicted rate: two decimals below 10% ("4.56%"), one above ("12.3%"), as wide as each other."""
    from ..percentages import percent

    return percent(x, 2 if x is not None and x < 0.1 else 1)


def _wrap(text: str, indent: str) -> str:
    return textwrap.fill(text, width=WIDTH, initial_indent=indent, subsequent_indent=indent + "  ")


def format_table(result) -> str:
    """The terminal view: one block per group, drafts in rank order, then cautions."""
    import numpy as np

    from ..percentages import signed_percent

    level = int(round(result.attrs.get("level", 0.9) * 100))
    outcome = result.attrs.get("outcome", "clicks")
    lines = [
        f"Predicted {outcome} per impression, with the {level}% range the post's rate is likely to show at its "
        "channel's typical impressions. 'beats' = share of your past posts on the channel with a lower rate.",
        "",
    ]
    groups = result["group"].fillna("").astype(str) if "group" in result else None
    keys = list(dict.fromkeys(groups)) if groups is not None else [""]
    suggestions = result.attrs.get("suggestions")
    plans = result.attrs.get("slot_plans")
    for key in keys:
        block = result[groups == key] if groups is not None else result
        block = block.sort_values("group_rank")
        channel = ", ".join(sorted({str(c) for c in block.get("channel", []) if c is not None and c == c})) or "-"
        planned = sorted({str(t) for t in block.get("planned_time", [])})
        when = f"  {planned[0]}" if len(planned) == 1 else ""
        title = key or "drafts"
        lines.append(f"{title}  [{channel}]{when}")
        lines.append(f"  {'#':>2}  {'predicted':>9}  {f'{level}% range':<17} {'beats':>5}  draft")
        for i, row in block.iterrows():
            rng = f"{_rate(row['rate_low'])} to {_rate(row['rate_high'])}"
            beats = f"{row['percentile']:.0%}" if np.isfinite(row["percentile"]) else "n/a"
            head = f"  {int(row['group_rank']):>2}  {_rate(row['predicted_rate']):>9}  {rng:<17} {beats:>5}  "
            lines.append(head + str(row["headline"]))
            pad = " " * 6
            if row["reasons"]:
                lines.append(_wrap("why: " + row["reasons"], pad))
            lines.append(_wrap("history: " + row["distance_note"], pad))
            if suggestions is not None:
                s = suggestions[i]
                if s["suggestions"]:
                    for k, sg in enumerate(s["suggestions"], 1):
                        text = (f"edit {k}: \"{sg['text']}\"  {signed_percent(sg['lift'])} "
                                f"({level}%: {signed_percent(sg['lift_low'])} to {signed_percent(sg['lift_high'])}) "
                                f"- {sg['description']}")
                        lines.append(_wrap(text, pad))
                else:
                    lines.append(_wrap("edit: " + s["note"], pad))
        top = block.iloc[0]
        if len(block) > 1 and top["verdict"]:
            lines.append(f"  top draft: {top['verdict']}")
        if plans:
            lines.extend(_slot_lines(plans[block.index[0]], top["headline"], level))
        lines.append("")
    notes = result.attrs.get("notes") or []
    for note in notes:
        lines.append(_wrap("note: " + note, ""))
    for caution in result.attrs.get("cautions", []):
        lines.append(_wrap("caution: " + caution, ""))
    return "\n".join(lines).rstrip() + "\n"


def _slot_lines(plan, headline: str, level: int) -> list[str]:
    import numpy as np

    from ..percentages import signed_percent
    from ..slots import WEEKDAYS, block_label

    if plan is None:
        return []
    out = [f"  best slots for the top draft (\"{headline[:60]}\"), coming week:"]
    if plan.usual:
        out.append(f"    your usual slot: {plan.usual['label']} ({plan.usual['n_posts']} past posts), "
                   f"predicted {_rate(plan.usual['predicted_rate'])}")
    for _, b in plan.best.iterrows():
        lift = "" if not np.isfinite(b.get("lift_vs_usual", np.nan)) else (
            f"; vs usual {signed_percent(b['lift_vs_usual'])} "
            f"({level}%: {signed_percent(b['lift_low'])} to {signed_percent(b['lift_high'])})")
        out.append(f"    {b['slot']}: {_rate(b['predicted_rate'])} (typical rate, {level}%: {_rate(b['rate_low'])} "
                   f"to {_rate(b['rate_high'])}; {int(b['n_posts'])} past posts){lift}")
    table = plan.table
    blocks = sorted(table["block"].unique())
    hours = int(24 / len(blocks))
    out.append("    predicted rate by day and block ('.' = too few past posts to say):")
    out.append("    " + " " * 11 + "".join(f"{block_label(b, hours)[:5]:>7}" for b in blocks))
    for date, day in table.groupby("date", sort=True):
        cells = []
        for b in blocks:
            r = day[day["block"] == b].iloc[0]
            cells.append(f"{r['predicted_rate'] * 100:6.2f}%" if r["covered"] else f"{'.':>7}")
        wd = WEEKDAYS[int(day["weekday"].iloc[0])]
        out.append(f"    {wd} {date[5:]:<6}" + "".join(cells))
    for note in plan.notes:
        out.append(_wrap("note: " + note, "    "))
    return out
