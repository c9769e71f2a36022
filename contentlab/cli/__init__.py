"""The ``contentlab`` command: a thin layer over the library.

Each area of the tool registers its subcommands from its own module
(``register(subparsers)``); a subcommand parses arguments, calls the library
and formats the result. Library errors (:class:`ContentlabError`) become one
line on stderr and exit code 2. Heavy libraries are imported inside the
command functions, so ``contentlab --help`` starts fast.
"""

from __future__ import annotations

import argparse
import importlib
import sys

from ..errors import ContentlabError

# Modules that add subcommands, in the order they appear in --help.
AREAS = ["importing", "modelling", "scoring", "experimenting", "reporting", "serving", "demoing"]

EPILOG = """\
a week with contentlab:
  contentlab import posts.csv                 # add last week's export to the workspace
  contentlab learn                            # learn what drove clicks
  contentlab score "Draft one" "Draft two" --channel newsletter
  contentlab experiment next spring-launch    # how to split the next impressions
  contentlab record spring-launch --input results.csv
  contentlab report                           # this week's report, in reports/

new here?  contentlab demo   runs all of it on an invented demo organisation.
"""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="contentlab",
        description=(
            "Learn from your own post history what drives engagement, score draft headlines "
            "before publishing, split test traffic by Thompson sampling, and write the weekly report."
        ),
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="store_true", help="print the version and exit")
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND")
    for area in AREAS:
        try:
            module = importlib.import_module(f"{__name__}.{area}")
        except ModuleNotFoundError as exc:
            if exc.name == f"{__name__}.{area}":
                continue  # that area has not landed yet
            raise
        module.register(subparsers)
    return parser


def add_workspace_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--workspace",
        metavar="DIR",
        help="workspace folder (default: $CONTENTLAB_WORKSPACE, else ./contentlab-workspace)",
    )


def add_format_option(parser: argparse.ArgumentParser, choices=("table", "json", "csv")) -> None:
    parser.add_argument("--format", choices=choices, default=choices[0], help="output format (default: %(default)s)")


def command_parser(subparsers, name: str, *, help: str, description: str, example: str) -> argparse.ArgumentParser:
    """A subcommand parser whose --help ends with a worked example."""
    return subparsers.add_parser(
        name,
        help=help,
        description=description,
        epilog=f"example:\n  {example}",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.version:
        from importlib.metadata import version

        print(f"contentlab {version('contentlab')}")
        return 0
    if not getattr(args, "handler", None):
        parser.print_help()
        return 0
    try:
        result = args.handler(args)
    except ContentlabError as exc:
        print(f"contentlab {args.command}: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("interrupted; nothing more was written", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
    return int(result or 0)


def run() -> None:  # console-script entry point
    sys.exit(main())
