"""``contentlab import``, ``contentlab features`` and ``contentlab settings``."""

from __future__ import annotations

import argparse

from . import add_workspace_option, command_parser


def register(subparsers) -> None:
    p = command_parser(
        subparsers,
        "import",
        help="add a post-history export (CSV, CSV.GZ) to the workspace",
        description=(
            "Validate a post-history export and add its posts to the workspace. One bad row rejects the "
            "whole file (nothing is written) unless --skip-bad is given. Re-importing a file changes nothing; "
            "rows whose post_id exists with new figures are updated. See the README for the columns."
        ),
        example="contentlab import exports/posts-2026-11.csv --map exports/our-columns.toml",
    )
    p.add_argument("file", help="the export: .csv, .tsv or .csv.gz; UTF-8 or cp1252; comma, semicolon or tab")
    p.add_argument("--map", metavar="MAP.toml", help="column map for exports whose columns are named otherwise")
    p.add_argument("--skip-bad", action="store_true",
                   help="import the good rows and write the rejected ones, with reasons, to FILE.rejected.csv")
    p.add_argument("--timezone", metavar="IANA", help="set the workspace time zone first (e.g. Europe/Berlin)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_workspace_option(p)
    p.set_defaults(handler=cmd_import)

    p = command_parser(
        subparsers,
        "features",
        help="summarise the features of the posts in the workspace",
        description="Turn every stored post into features and print a summary per feature.",
        example="contentlab features --workspace my-workspace",
    )
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_workspace_option(p)
    p.set_defaults(handler=cmd_features)

    p = command_parser(
        subparsers,
        "settings",
        help="show or change workspace settings (time zone)",
        description="Show the workspace settings, or set the time zone that decides each post's local hour and weekday.",
        example="contentlab settings --timezone Europe/London",
    )
    p.add_argument("--timezone", metavar="IANA", help="IANA time zone name, e.g. Europe/London")
    add_workspace_option(p)
    p.set_defaults(handler=cmd_settings)


def cmd_import(args: argparse.Namespace) -> int:
    from ..history import import_history
    from ..workspace import check_timezone, opened

    if args.timezone is not None:
        check_timezone(args.timezone)
    with opened(args.workspace) as ws:  # a first import that fails leaves no empty workspace behind
        previous = ws.setting("timezone", "UTC")  # as stored, even one this computer does not know
        if args.timezone is not None:
            ws.set_setting("timezone", args.timezone)
        try:
            summary = import_history(ws, args.file, args.map, skip_bad=args.skip_bad, progress=not args.quiet)
        except BaseException:
            if args.timezone is not None and not ws.created and ws.timezone != previous:
                ws.set_setting("timezone", previous)  # a failed import changes nothing
            raise
    print(summary.line())
    for note in summary.notes:
        print(f"Note: {note}")
    return 0


def cmd_features(args: argparse.Namespace) -> int:
    from ..summary import feature_summary
    from ..workspace import Workspace

    with Workspace.open(args.workspace, create=False) as ws:
        print(feature_summary(ws.posts(), progress=not args.quiet))
    return 0


def cmd_settings(args: argparse.Namespace) -> int:
    from ..workspace import check_timezone, opened

    if args.timezone is not None:
        check_timezone(args.timezone)  # before anything is created
    with opened(args.workspace, create=args.timezone is not None) as ws:
        if args.timezone is not None:
            ws.set_setting("timezone", args.timezone)
        print(f"workspace: {ws.path}")
        print(f"timezone:  {ws.timezone}")
        print(f"posts:     {ws.count_posts()}")
    return 0
