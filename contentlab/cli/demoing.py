"""``contentlab demo``: the whole job on the invented demo corpus."""

from __future__ import annotations

import argparse

from . import check_out_dir, command_parser


def register(subparsers) -> None:
    p = command_parser(
        subparsers,
        "demo",
        help="run contentlab end to end on the invented demo organisation",
        description=(
            "Import the bundled demo corpus (Alderbank Libraries, a fictional organisation with invented posts) "
            "into a fresh workspace and walk through the job."
        ),
        example="contentlab demo --workspace /tmp/demo-workspace",
    )
    p.add_argument("--workspace", metavar="DIR", default=argparse.SUPPRESS,
                   help="where to build the demo workspace (default: demo-workspace); an earlier demo workspace "
                        "there is replaced, anything else is refused")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="where the report goes (default: a reports folder inside the demo workspace)")
    p.set_defaults(handler=cmd_demo)


def cmd_demo(args: argparse.Namespace) -> int:
    from ..demo import run_demo
    from ..workspace import resolve_dir

    if args.workspace is not None:
        resolve_dir(args.workspace)  # refuses an empty --workspace "" rather than building the demo elsewhere
    check_out_dir(args.out, "a reports folder inside the demo workspace")
    run_demo(args.workspace or "demo-workspace", args.out)
    return 0
