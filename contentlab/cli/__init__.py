"""The ``contentlab`` command: a thin layer over the library.

Each area of the tool registers its subcommands from its own module
(``register(subparsers)``); a subcommand parses arguments, calls the library
and formats the result. Library errors (:class:`ContentlabError`) become one
line on stderr and exit code 2. So do the failures of the machine around it
(a full disk, a read-only or locked workspace, a damaged database): one line,
no traceback. Anything else is a bug: one line that says so, and the traceback
with ``CONTENTLAB_DEBUG=1``. Heavy libraries are imported inside the command
functions, so ``contentlab --help`` starts fast.
"""

from __future__ import annotations

import argparse
import errno
import importlib
import os
import signal
import sys
import threading

from ..errors import ContentlabError, visible

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

common options go before or after the command:
  contentlab --workspace ~/team-workspace import posts.csv
  (the workspace is --workspace DIR, else $CONTENTLAB_WORKSPACE, else ./contentlab-workspace)

new here?  contentlab demo   runs all of it on an invented demo organisation.
"""


class OneLineParser(argparse.ArgumentParser):
    """A mistyped option gets the one line every refusal gets (exit code 2), naming where --help tells more,
    instead of the whole usage text."""

    def error(self, message: str):
        self.exit(2, f"{self.prog}: {visible(message)}; see {self.prog} --help.\n")


def build_parser() -> argparse.ArgumentParser:
    parser = OneLineParser(
        prog="contentlab",
        description=(
            "Learn from your own post history what drives engagement, score draft headlines "
            "before publishing, split test traffic by Thompson sampling, and write the weekly report."
        ),
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="store_true", help="print the version and exit")
    parser.add_argument("--workspace", metavar="DIR", default=None, help=WORKSPACE_HELP)
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


WORKSPACE_HELP = "workspace folder (default: $CONTENTLAB_WORKSPACE, else ./contentlab-workspace)"


def add_workspace_option(parser: argparse.ArgumentParser) -> None:
    """``--workspace`` after the command; the same option before it (top level) is kept when this one is absent."""
    parser.add_argument("--workspace", metavar="DIR", default=argparse.SUPPRESS, help=WORKSPACE_HELP)


def _number_type(convert, what: str):
    """An argparse type: the value converted, or a message naming the value and what to write instead."""
    def parse(text: str):
        try:
            return convert(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"'{visible(text)[:40]}' is not {what}") from None
    return parse


# Counts, seeds and ports.
whole_number = _number_type(int, "a whole number; write it in digits without separators or decimals, e.g. 1000")
# Rates, thresholds and strengths (their ranges are checked by the command).
decimal_number = _number_type(float, "a number; write it in digits with a decimal point, e.g. 0.95")


def check_out_dir(value: str | None, default: str) -> None:
    """Refuse an --out that cannot be the report folder before any work is done: empty (it would mean the
    current folder) or an existing file."""
    from pathlib import Path

    if value is None:
        return
    if not str(value).strip():
        raise ContentlabError(f"--out is empty: give the folder for the report, or leave the option out for {default}.")
    if Path(value).exists() and not Path(value).is_dir():
        raise ContentlabError(f"--out {value}: is a file, not a folder; give a folder for the report (new or "
                              "existing).")


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


def _tolerant_output() -> None:
    """A terminal whose encoding cannot show a headline's emoji or script (a Windows console, a latin-1 locale)
    gets '?' for those characters instead of a crash half-way through the output (PYTHONIOENCODING=utf-8 shows them)."""
    for stream in (sys.stdout, sys.stderr):
        if hasattr(stream, "reconfigure") and (stream.encoding or "").lower().replace("-", "") not in ("utf8", "utf8sig"):
            try:
                stream.reconfigure(errors="replace")
            except (ValueError, OSError):  # a stream that cannot be changed any more: leave it
                pass


def _parse(parser: argparse.ArgumentParser, argv: list[str] | None) -> argparse.Namespace:
    """Parse the command line; headlines given after an option (``score --channel blog "A" "B"``) still count.

    argparse fills a many-valued positional at its first place, so words after
    an option would be refused as unknown; commands that take headlines add
    them in the order given. Anything else unknown is refused as before.
    """
    args, extra = parser.parse_known_args(argv)
    if extra and isinstance(getattr(args, "headlines", None), list) and not any(e.startswith("-") for e in extra):
        args.headlines += extra
    elif extra:
        parser.error(f"unrecognized arguments: {' '.join(extra)}")
    return args


def main(argv: list[str] | None = None) -> int:
    _tolerant_output()
    parser = build_parser()
    args = _parse(parser, argv)
    if args.version:
        from importlib.metadata import version

        print(f"contentlab {version('contentlab')}")
        return 0
    if not getattr(args, "handler", None):
        parser.print_help()
        return 0
    name = " ".join(str(p) for p in (args.command, getattr(args, "action", None)) if p)
    previous = _stop_on_signals()
    try:
        result = args.handler(args)
        _running.clear()  # finished: a stop signal from here on comes too late to stop anything
    except ContentlabError as exc:
        print(f"contentlab {name}: {visible(str(exc))}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt as exc:
        signum = exc.signum if isinstance(exc, Stopped) else signal.SIGINT
        print(f"contentlab {name}: {_signal_words(signum)}: work finished before it is kept and nothing more was "
              "written; run the command again to finish (a file already imported or recorded is recognised, not "
              "counted twice)", file=sys.stderr)
        return 128 + signum
    except BrokenPipeError:
        return 0
    except Exception as exc:  # the safety net: one line, never a traceback (unless CONTENTLAB_DEBUG=1)
        if os.environ.get("CONTENTLAB_DEBUG") == "1":
            raise
        message, code = explain_failure(exc, getattr(args, "workspace", None))
        print(f"contentlab {name}: {visible(message)}", file=sys.stderr)
        return code
    finally:
        _restore_signals(previous)
    return int(result or 0)


class Stopped(KeyboardInterrupt):
    """A stop signal other than Ctrl-C (SIGTERM from ``kill`` or a service manager, SIGHUP from a closed terminal).

    Raised like Ctrl-C, so it unwinds the same way: the open transaction rolls back, a half-written file is
    removed (``safety.atomic_path``) and one true line is printed, instead of the process vanishing mid-way.
    """

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


STOP_SIGNALS = tuple(getattr(signal, n) for n in ("SIGTERM", "SIGHUP") if hasattr(signal, n))


_running = threading.Event()  # set while a command runs under the handlers below


def _raise_stopped(signum, frame):
    if _running.is_set():
        raise Stopped(signum)


def _stop_on_signals() -> dict:
    """Turn SIGTERM and SIGHUP into :class:`Stopped` while a command runs; the handlers it replaced.

    Only from the main thread (Python's rule for signal handlers), and never over a handler someone else set
    (a test runner, an embedding program).
    """
    previous = {}
    if threading.current_thread() is not threading.main_thread():
        return previous
    for signum in STOP_SIGNALS:
        if signal.getsignal(signum) is signal.SIG_DFL:
            previous[signum] = signal.signal(signum, _raise_stopped)
    _running.set()
    return previous


def _restore_signals(previous: dict) -> None:
    _running.clear()
    for signum, handler in previous.items():
        signal.signal(signum, handler)


def _signal_words(signum: int) -> str:
    if signum == signal.SIGINT:
        return "interrupted (Ctrl-C)"
    return f"stopped by {signal.Signals(signum).name}"


def explain_failure(exc: Exception, workspace=None) -> tuple[str, int]:
    """One line and an exit code for an error that is not a :class:`ContentlabError`.

    Failures of the machine around the tool (disk full, read-only, locked or
    damaged workspace, a file that cannot be written) get exit code 2 and what
    to do; anything else is a bug (exit code 1) and says how to see where.
    """
    import sqlite3

    from ..workspace import disk_is_full, not_usable, read_only_message, resolve_dir

    where = resolve_dir(workspace or None)
    text = str(exc)
    if isinstance(exc, sqlite3.OperationalError):
        low = text.lower()
        # SQLite says "disk I/O error" when a full disk stops its side files (-wal, -shm) from growing
        if "disk is full" in low or "disk i/o" in low and disk_is_full(where):
            return (f"the disk holding the workspace at {where} is full; nothing was written (the change was rolled "
                    "back). Free some space and run the command again."), 2
        if "readonly" in low or "read-only" in low:
            return read_only_message(where), 2
        if "locked" in low or "busy" in low:
            return (f"the workspace at {where} is busy: another contentlab command is writing to it. Nothing was "
                    "written; try again when it has finished."), 2
        if "unable to open" in low:
            return f"cannot open the workspace database in {where} ({text}); check that you may read that folder.", 2
        if "disk i/o" in low:
            return f"a disk error stopped the command ({text}); nothing was written. Check the disk holding {where}.", 2
    if isinstance(exc, sqlite3.DatabaseError):
        return not_usable(where, exc), 2
    if isinstance(exc, OSError):
        target = f"{exc.filename}: " if exc.filename else ""
        if exc.errno == errno.ENOSPC:
            return f"{target}the disk is full; nothing more was written. Free some space and run the command again.", 2
        if exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
            return f"{target}cannot write or read here ({exc.strerror}); check the permissions or choose another place.", 2
        return f"{target}{exc.strerror or text}", 2
    if isinstance(exc, MemoryError):
        return "ran out of memory; try a smaller file or close other programs.", 2
    return (f"unexpected error ({type(exc).__name__}: {' '.join(text.split())[:200]}). This is a bug in contentlab; "
            "run the command again with CONTENTLAB_DEBUG=1 to see where it happened, and report it."), 1


def run() -> None:  # console-script entry point
    sys.exit(main())
