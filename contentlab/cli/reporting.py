"""``contentlab report``: the weekly report as one HTML file plus its tables as CSV."""

from __future__ import annotations

import argparse
import sys

from . import add_workspace_option, check_out_dir, command_parser


def register(subparsers) -> None:
    p = command_parser(
        subparsers,
        "report",
        help="write the weekly report (HTML with charts, plus CSV tables)",
        description=(
            "Write a self-contained HTML report for one week (default: the last complete ISO week in the "
            "history) or a date range: the headline against the previous four weeks and last year, what "
            "happened, why (mix against performance, unusual posts), what works (model drivers), experiments "
            "and next week's recommendations. The tables behind it go to a folder of CSV files beside it."
        ),
        example="contentlab report --week 2026-W48 --out reports/",
    )
    when = p.add_mutually_exclusive_group()
    when.add_argument("--week", metavar="YYYY-Www", help="ISO week to report on, e.g. 2026-W48")
    when.add_argument("--from", dest="date_from", metavar="DATE", help="first day of a date range (with --to)")
    p.add_argument("--to", dest="date_to", metavar="DATE", help="last day of the range, inclusive")
    p.add_argument("--out", metavar="DIR", default="reports", help="folder for the report (default: %(default)s)")
    p.add_argument("--drafts", metavar="DRAFTS.csv",
                   help="next week's draft headlines to score in the report (headline, channel, publish_at, group)")
    p.add_argument("--outcome", choices=("clicks", "engagements"), default="clicks",
                   help="rate to report: clicks or engagements per impression (default: %(default)s)")
    add_workspace_option(p)
    p.set_defaults(handler=cmd_report)


def cmd_report(args: argparse.Namespace) -> int:
    from ..errors import ContentlabError
    from ..report import build_report, write_report
    from ..workspace import Workspace

    if args.date_to and not args.date_from:
        raise ContentlabError("--to needs --from: give both dates of the range.")
    check_out_dir(args.out, "./reports")
    with Workspace.open(args.workspace, create=False) as ws:
        _check_something_to_report(ws, args)
        notes = _check_drafts(ws, args.drafts) if args.drafts else []
        report = build_report(ws, week=args.week, start=args.date_from, end=args.date_to, outcome=args.outcome,
                              drafts=args.drafts)
    files = write_report(report, args.out)
    print(f"report for {report.period.title}: {report.period.why}")
    print(f"  {report.headline['idea']}")
    print(f"wrote {files.html}")
    print(f"  and {len(files.tables)} CSV tables in {files.folder}/")
    for note in notes:
        print(f"Note: {note}")
    for item in report.missing:
        print(f"  not included: {item}", file=sys.stderr)
    return 0


def _check_something_to_report(ws, args: argparse.Namespace) -> None:
    """An empty workspace, or a period that has not begun, has nothing to report: say so instead of an empty page."""
    import zoneinfo
    from datetime import datetime

    from ..errors import ContentlabError
    from ..timeparse import parse_date, parse_iso_week

    if ws.count_posts() == 0:
        raise ContentlabError(f"nothing to report: no posts in the workspace at {ws.path}; import first: "
                              "contentlab import FILE")
    today = datetime.now(zoneinfo.ZoneInfo(ws.timezone)).date()
    if args.week:
        start, label = parse_iso_week(args.week)[0], f"week {args.week}"
    elif args.date_from:
        start, label = parse_date(args.date_from, "--from"), f"the period from {args.date_from}"
        if args.date_to:
            parse_date(args.date_to, "--to")
    else:
        return
    if start > today:
        raise ContentlabError(f"nothing to report: {label} has not begun yet (today is {today} in {ws.timezone}). "
                              "Choose a week that has posts, or leave out --week for the last complete one.")


def _check_drafts(ws, path: str) -> list[str]:
    """The drafts file the user gave is read and checked as ``score --input`` checks it, before anything is
    written: a bad row stops the command (exit 2) instead of a report that silently leaves drafts out.
    Returns the notes on local publish times at a clock change (how they were read)."""
    from ..errors import ContentlabError
    from ..readers import prepare_drafts, read_drafts

    frame = read_drafts(path)
    channels = sorted(c for (c,) in ws.conn.execute("SELECT DISTINCT channel FROM posts WHERE channel IS NOT NULL"))
    prepared = prepare_drafts(frame, ws.timezone, known_channels=channels or None, source=path)
    if len(channels) > 1 and "channel" in prepared and prepared["channel"].isna().any():
        row = int(prepared.loc[prepared["channel"].isna(), "row"].iloc[0])
        raise ContentlabError(f"{path}: row {row}, column 'channel': is empty; give every draft one of your "
                              f"history's channels ({', '.join(channels)}) so it can be scored.")
    if len(channels) > 1 and "channel" not in prepared:
        raise ContentlabError(f"{path}: has no 'channel' column; your history has several channels "
                              f"({', '.join(channels)}), so give every draft one to score it in the report.")
    return list(prepared.attrs.get("time_notes", []))
