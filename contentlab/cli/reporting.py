"""``contentlab report``: the weekly report as one HTML file plus its tables as CSV."""

from __future__ import annotations

import argparse
import sys

from . import add_workspace_option, command_parser


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
    with Workspace.open(args.workspace, create=False) as ws:
        _check_something_to_report(ws, args)
        report = build_report(ws, week=args.week, start=args.date_from, end=args.date_to, outcome=args.outcome,
                              drafts=args.drafts)
    files = write_report(report, args.out)
    print(f"report for {report.period.title}: {report.period.why}")
    print(f"  {report.headline['idea']}")
    print(f"wrote {files.html}")
    print(f"  and {len(files.tables)} CSV tables in {files.folder}/")
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
