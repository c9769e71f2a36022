"""``contentlab experiment new|next|status|list|stop`` and ``contentlab record``."""

from __future__ import annotations

import argparse
import json
import math
import sys

from . import add_format_option, add_workspace_option, command_parser, decimal_number, whole_number

POLICY_TEXT = (
    "Thompson sampling (thompson) gives each draft a share of traffic that grows with "
    "its probability of being best, so most impressions go to the likely winner while the test runs: the "
    "most clicks during the test. Top-two Thompson sampling splits traffic between the leader and its "
    "closest challenger, to tell them apart with fewer impressions: the quickest answer, at the cost of "
    "more clicks lost while testing."
)
POLICY_HELP = "thompson (default) or top-two. " + POLICY_TEXT


def _paragraphs(*parts: str) -> str:
    """Descriptions wrapped to the terminal-friendly 79 columns (the parsers keep newlines as given)."""
    import textwrap

    return "\n\n".join(textwrap.fill(part, 79) for part in parts)


def register(subparsers) -> None:
    exp = command_parser(
        subparsers,
        "experiment",
        help="test drafts against each other: new, next, status, list, stop",
        description=_paragraphs(
            "Run drafts against each other and let the results decide. 'new' creates an experiment whose arms "
            "are drafts, with priors from the latest model; 'next' says how to split the next impressions; "
            "'status' shows each arm's results and whether to stop; 'list' shows every experiment; 'stop' "
            "closes one. Feed results back with: contentlab record NAME."
        ),
        example="contentlab experiment new makerspace --drafts corpus/drafts.csv --group makerspace-launch",
    )
    add_workspace_option(exp)  # also accepted between 'experiment' and its action
    sub = exp.add_subparsers(dest="action", metavar="ACTION")
    exp.set_defaults(handler=lambda args: (exp.print_help(), 0)[1])

    p = command_parser(
        sub,
        "new",
        help="create an experiment from drafts",
        description=_paragraphs(
            "Create an experiment whose arms are the drafts (a CSV with headline and optional arm, channel, "
            "publish_at, group columns, or headlines as arguments). When your history holds past tests (posts "
            "sharing an experiment_id), the prior is learned from them: how far drafts of one test usually sit "
            "from their test's level (empirical Bayes), so an early gap is judged against the gaps you usually "
            "see. Once results are in, a draft gets traffic only while learning more about it could still pay back, "
            "over the impressions the test has left, what showing it costs; the drafts still in the running share "
            "the traffic by Thompson sampling. The impressions left come from --budget, --ends-at, or else twice your "
            "typical past test. The "
            "model's predicted gaps between the drafts join the prior only if, fitted on your earlier past tests, "
            "they lose fewer clicks in a replay of your latest ones than the same prior without them, by more than "
            "two standard errors; the evidence is printed. Without past tests the former prior is used (the model's predicted rates, at a "
            "strength checked the same way; flat without a model), and the output says so. Before any results no "
            "draft gets more than twice an equal share of traffic (at most 60%) unless the validated prior "
            "justifies it. --budget N tells the allocation how many impressions the test will get, so it explores "
            "more while much remains and commits as it runs out; --ends-at TIME (when the test is planned to end) "
            "does the same with the impressions still to come estimated from the pace of the results so far. "
            "Experiments created by an earlier version keep the policy they were created with.",
        ),
        example='contentlab experiment new laser-cutter "Inside the makerspace laser cutter" '
        '"5 things to know about the makerspace laser cutter" --channel newsletter --budget 20000',
    )
    p.add_argument("name", help="experiment name: letters, digits, '.', '_' or '-'")
    p.add_argument("headlines", nargs="*", metavar="HEADLINE", help="draft headlines (instead of --drafts)")
    p.add_argument("--drafts", metavar="FILE", help="CSV with headline [, arm, channel, publish_at, group]")
    p.add_argument("--group", help="use only the drafts of this group (when the file has a group column)")
    p.add_argument("--channel", help="channel of every arm (overrides the file's channel column)")
    p.add_argument("--flat-prior", action="store_true", help="start every arm at the flat Beta(1, 1) prior")
    p.add_argument("--prior-strength", type=decimal_number, metavar="S",
                   help="use the model's predictions with this strength (pseudo-impressions) instead of the chosen one")
    p.add_argument("--policy", default="thompson", choices=["thompson", "top-two"], help=POLICY_HELP)
    p.add_argument("--seed", type=whole_number,
                   help="random seed for the allocations, 0 to 2147483647 (default: a fresh one, stored)")
    p.add_argument("--budget", type=whole_number, metavar="N",
                   help="impressions the whole test will get: explore more while much remains, commit as it runs "
                        "out (default: twice your typical past test with past tests; else no budget, a fixed balance)")
    p.add_argument("--ends-at", metavar="TIME",
                   help="when the test is planned to end (ISO 8601, e.g. 2026-12-14T18:00, in the workspace's time "
                        "zone unless it has an offset): the pace of results so far gives the impressions still to "
                        "come, used like --budget (not with --budget)")
    add_format_option(p)
    add_workspace_option(p)
    p.set_defaults(handler=cmd_new)

    p = command_parser(
        sub,
        "next",
        help="how to split the next impressions (or which draft to post next)",
        description=_paragraphs(
            "Propose how to split the next N impressions between the arms, from their posteriors. Each arm's "
            "share follows its probability of being best (estimated from 10,000 posterior draws), with a "
            "minimum share for every arm still in the running so none is starved early. --single names the one "
            "draft to post next, for channels without traffic splitting. With a prior learned from past tests, "
            "only the drafts still worth learning about with the impressions left share the traffic (by plain "
            "Thompson sampling, no minimum share), and it says how many impressions are left, where that number "
            "comes from and which drafts are out. With --budget or --ends-at it says how much is left and how that "
            "shapes the split. Asking twice without new results gives the same answer.",
            POLICY_TEXT,
        ),
        example="contentlab experiment next makerspace --impressions 5000",
    )
    p.add_argument("name")
    p.add_argument("--impressions", type=whole_number, default=1000, metavar="N",
                   help="impressions to split (default 1000)")
    p.add_argument("--policy", choices=["thompson", "top-two"],
                   help="thompson or top-two (see above); default: the experiment's own")
    p.add_argument("--single", action="store_true", help="name the single draft to post next")
    add_format_option(p)
    add_workspace_option(p)
    p.set_defaults(handler=cmd_next)

    p = command_parser(
        sub,
        "status",
        help="results per arm and whether to stop",
        description=_paragraphs(
            "Per arm: impressions, clicks, observed rate with its 95% Wilson interval, posterior mean, probability "
            "of being best, and the expected loss of choosing it now (the click-through rate given up against the "
            "best arm, in expectation under the posterior; Scott, 2015). Recommends stopping when the leader is "
            "best with probability at least 0.95 or choosing it now costs less than the loss threshold, and says "
            "why; otherwise gives a rough count of impressions still needed. Warns about peeking with p-values, "
            "too few clicks and drifting rates."
        ),
        example="contentlab experiment status makerspace --discount 0.9 --format json",
    )
    p.add_argument("name")
    p.add_argument("--discount", type=decimal_number, metavar="D",
                   help="down-weight older results: each recording round (in event-time order) multiplies earlier "
                        "results by D in (0, 1]; default 1 (no discount)")
    p.add_argument("--loss-threshold", type=decimal_number, metavar="RATE",
                   help="stop when choosing the leader gives up less than this click-through rate in expectation, "
                        "e.g. 0.0002 for 0.02 percentage points (default: 1%% of the leader's rate)")
    p.add_argument("--prob-threshold", type=decimal_number, metavar="P", help="stop when P(best) >= P (default 0.95)")
    add_format_option(p)
    add_workspace_option(p)
    p.set_defaults(handler=cmd_status)

    p = command_parser(
        sub, "list", help="every experiment in the workspace",
        description="List the experiments with their status, arms, totals so far and current leader.",
        example="contentlab experiment list --format csv",
    )
    add_format_option(p)
    add_workspace_option(p)
    p.set_defaults(handler=cmd_list)

    p = command_parser(
        sub, "stop", help="close an experiment and name its winner",
        description=_paragraphs(
            "Mark the experiment stopped (next then refuses) with the current leader, or --winner, as the winner. "
            "Results recorded later are still kept."
        ),
        example="contentlab experiment stop makerspace",
    )
    p.add_argument("name")
    p.add_argument("--winner", metavar="ARM", help="the arm to adopt (default: the current leader)")
    add_workspace_option(p)
    p.set_defaults(handler=cmd_stop)

    p = command_parser(
        subparsers,
        "record",
        help="feed results of an experiment back (one arm, or a CSV)",
        description=_paragraphs(
            "Add results to an experiment: one arm with --arm/--impressions/--clicks, or a CSV with columns arm, "
            "impressions, clicks and optional at (ISO 8601; local time of the workspace without an offset) and "
            "event_id. Figures are increments since the last report unless --cumulative says they are totals so "
            "far. Replays are recognised by event id; a result without one but with a time by its arm, time and "
            "figures; any other row of a file by the file's rows and its place in them (never the file's name or "
            "bytes), so recording the same file again, even re-saved by a spreadsheet, changes nothing, the same "
            "sheet with rows added below records only the new rows, and a new batch under the same name counts in "
            "full; a single result by its arm, --at and figures. "
            "A single result with neither --event-id nor --at cannot be told from a repeat: running the same "
            "command twice counts it twice (the output says so). One call is one "
            "transaction: a bad row (clicks above impressions, a negative or fractional count, an unknown arm, "
            "a cumulative total that goes down) records nothing. The arms' totals also join the post history, "
            "so the next learn learns from them."
        ),
        example="contentlab record makerspace --arm B --impressions 1200 --clicks 31 --at 2026-12-03T09:00",
    )
    p.add_argument("name")
    p.add_argument("file", nargs="?", metavar="FILE",
                   help="results CSV (the same as --input FILE): arm, impressions, clicks [, at, event_id]")
    p.add_argument("--input", metavar="FILE", help="results CSV: arm, impressions, clicks [, at, event_id]")
    p.add_argument("--arm")
    p.add_argument("--impressions", metavar="N")
    p.add_argument("--clicks", metavar="K")
    p.add_argument("--at", metavar="TIME", help="when these results were measured (default: now)")
    p.add_argument("--event-id", metavar="ID", help="a name for this result, so repeating the call changes nothing")
    p.add_argument("--cumulative", action="store_true", help="the figures are totals so far, not increments")
    p.add_argument("--quiet", action="store_true", help="print only the summary line")
    add_workspace_option(p)
    p.set_defaults(handler=cmd_record)


# ------------------------------------------------------------------ handlers


def cmd_new(args: argparse.Namespace) -> int:
    from ..errors import ContentlabError
    from ..experiments import create_experiment, read_drafts
    from ..readers import publish_time_notes
    from ..timeparse import clock_notes_for
    from ..workspace import opened

    if args.drafts and args.headlines:
        raise ContentlabError("give drafts either as --drafts FILE or as headlines on the command line, not both.")
    if not args.drafts and not args.headlines:
        raise ContentlabError('give the drafts: --drafts drafts.csv, or headlines as arguments ("Draft one" "Draft two").')
    if args.flat_prior and args.prior_strength is not None:
        raise ContentlabError("give --flat-prior (every arm starts at Beta(1, 1)) or --prior-strength S (the model's "
                              "predictions with strength S), not both.")
    if args.seed is not None and not 0 <= args.seed < 2**31:
        raise ContentlabError(f"--seed must be a whole number from 0 to {2**31 - 1}; got {args.seed}.")
    drafts = read_drafts(args.drafts) if args.drafts else list(args.headlines)
    with opened(args.workspace) as ws:  # a test can start before any history is imported; a refused one leaves none
        created = create_experiment(
            ws, args.name, drafts, flat_prior=args.flat_prior, channel=args.channel, group=args.group,
            prior_strength=args.prior_strength, policy=args.policy, source=args.drafts, seed=args.seed,
            budget=args.budget, ends_at=args.ends_at,
        )
        # Local times at a clock change: how they were read (the drafts' publish times are kept as given).
        notes = publish_time_notes(drafts, ws.timezone, source=args.drafts, group=args.group)
        if args.ends_at is not None:
            notes += clock_notes_for(args.ends_at, ws.timezone, "--ends-at")
    notes += created.notes
    frame = created.arms
    if args.format == "json":
        _print_json({"experiment": created.name, "arms": _records(frame), "prior": created.prior.to_dict(),
                     "notes": notes})
        return 0
    if args.format == "csv":
        _print_csv(frame)
        return 0
    print(f"Experiment {created.name}: {len(frame)} arms, prior: {created.prior.source}"
          + (f", budget {args.budget:,} impressions." if args.budget else "."))
    print(_table(frame, [
        ("arm", "arm", str), ("headline", "headline", lambda v: _clip(v, 60)),
        ("model rate", "predicted_rate", _pct), ("strength", "prior_strength", lambda v: f"{v:,.0f}"),
        ("prior mean", "prior_mean", _pct),
        ("90% prior interval", "prior_low", None),
    ], extra={"90% prior interval": [f"{_pct(lo)} to {_pct(hi)}" for lo, hi in zip(frame["prior_low"], frame["prior_high"])]}))
    print()
    print(_wrap("Prior: " + created.prior.reason + "."))
    for note in notes:
        print(_wrap("Note: " + note))
    print(f"\nNext: contentlab experiment next {created.name} --impressions 1000")
    return 0


def cmd_next(args: argparse.Namespace) -> int:
    from ..errors import ContentlabError
    from ..experiments import next_allocation
    from ..readers import MAX_COUNT
    from ..workspace import Workspace

    if args.impressions > MAX_COUNT:
        raise ContentlabError(f"--impressions must be at most 2^53 ({MAX_COUNT:,}); got {args.impressions:,}.")

    with Workspace.open(args.workspace, create=False) as ws:
        alloc = next_allocation(ws, args.name, args.impressions, args.policy, single=args.single)
    frame = alloc.arms
    if args.format == "json":
        _print_json({"experiment": alloc.name, "policy": alloc.policy, "impressions": alloc.impressions,
                     "next_single": alloc.single, "arms": _records(frame), "why": list(alloc.why),
                     "notes": list(alloc.notes)})
        return 0
    if args.format == "csv":
        _print_csv(frame)
        return 0
    policy = "Thompson sampling" if alloc.policy == "thompson" else "top-two Thompson sampling"
    if alloc.single is not None:
        row = frame[frame["arm"] == alloc.single].iloc[0]
        print(f"Post next ({policy}): {alloc.single}  {row['headline']}")
    else:
        print(f"Split of the next {alloc.impressions:,} impressions ({policy}):")
        print(_table(frame, [
            ("arm", "arm", str), ("headline", "headline", lambda v: _clip(v, 60)),
            ("impressions", "impressions", lambda v: f"{int(v):,}"), ("share", "share", lambda v: _pct(v, 1)),
        ]))
    for line in alloc.why:
        print(_wrap("Why: " + line))
    for note in alloc.notes:
        print(_wrap("Note: " + note))
    print(f"Then: contentlab record {alloc.name} --arm ARM --impressions N --clicks K")
    return 0


def cmd_status(args: argparse.Namespace) -> int:
    from ..experiments import experiment_status
    from ..workspace import Workspace

    with Workspace.open(args.workspace, create=False) as ws:
        status = experiment_status(
            ws, args.name, discount=args.discount, loss_threshold=args.loss_threshold,
            prob_threshold=args.prob_threshold,
        )
    frame = status.arms
    if args.format == "json":
        _print_json(status.to_dict())
        return 0
    if args.format == "csv":
        _print_csv(frame)
        return 0
    d = status.decision
    print(f"Experiment {status.name} ({status.status}): {status.impressions:,} impressions, {status.clicks:,} clicks "
          f"in {status.n_events:,} results.")
    print(_table(frame, [
        ("arm", "arm", str), ("headline", "headline", lambda v: _clip(v, 44)),
        ("impr.", "impressions", lambda v: f"{int(v):,}"), ("clicks", "clicks", lambda v: f"{int(v):,}"),
        ("rate [95% Wilson]", "rate", None), ("posterior", "posterior_mean", _pct),
        ("P(best)", "prob_best", _prob), ("exp. loss", "expected_loss", lambda v: f"{100 * v:.3f} pp"),
    ], extra={"rate [95% Wilson]": [
        "-" if not math.isfinite(r) else f"{_pct(r)} [{_pct(lo)}, {_pct(hi)}]"
        for r, lo, hi in zip(frame["rate"], frame["rate_low"], frame["rate_high"])
    ]}))
    print()
    print(_wrap(f"Leader: {d.leader}. " + d.reason))
    for line in status.why:
        print(_wrap(line))
    gained = status.clicks_gained
    if status.impressions:
        print(_wrap(
            f"Clicks gained against an equal split so far: about {int(round(gained)):+,d} (impressions times each arm's "
            "posterior mean, against the same impressions at the average arm's)."
        ))
    for w in status.warnings:
        print(_wrap("Warning: " + w))
    return 0


def cmd_list(args: argparse.Namespace) -> int:
    from ..experiments import list_experiments
    from ..workspace import Workspace

    with Workspace.open(args.workspace, create=False) as ws:
        frame = list_experiments(ws)
    if args.format == "json":
        _print_json(_records(frame))
        return 0
    if args.format == "csv":
        _print_csv(frame)
        return 0
    if frame.empty:
        print("No experiments yet. Create one with: contentlab experiment new NAME --drafts drafts.csv")
        return 0
    print(_table(frame, [
        ("experiment", "experiment", str), ("created", "created_at", lambda v: str(v)[:10]),
        ("channel", "channel", _text_or_dash), ("status", "status", str), ("arms", "arms", str),
        ("impressions", "impressions", lambda v: f"{int(v):,}"), ("clicks", "clicks", lambda v: f"{int(v):,}"),
        ("leader", "leader", _text_or_dash),
    ]))
    return 0


def cmd_stop(args: argparse.Namespace) -> int:
    from ..experiments import TRUTH_CAUTION, stop_experiment
    from ..workspace import Workspace

    with Workspace.open(args.workspace, create=False) as ws:
        out = stop_experiment(ws, args.name, winner=args.winner)
    d = out["decision"]
    if "winner_before" in out:
        print(f"{out['experiment']} was stopped already; its winner is now {out['winner']} "
              f"(was {out['winner_before'] or 'none'}).")
        return 0
    print(f"Stopped {out['experiment']}; winner: {out['winner']}.")
    if out["stopped_early"]:
        print(_wrap("Note: the evidence did not yet meet the stopping rule: " + d.reason))
    print(_wrap("Note: " + TRUTH_CAUTION))
    return 0


def cmd_record(args: argparse.Namespace) -> int:
    import pandas as pd

    from ..errors import ContentlabError
    from ..experiments import read_results, record_results
    from ..readers import RESULT_COLUMNS, unused_columns
    from ..workspace import Workspace

    single = [args.arm, args.impressions, args.clicks]
    if args.file is not None:
        if args.input is not None and args.input != args.file:
            raise ContentlabError(f"two results files given ({args.file} and --input {args.input}); "
                                  "record one at a time.")
        args.input = args.file
    if args.input:
        if any(v is not None for v in single + [args.at, args.event_id]):
            raise ContentlabError("give either --input FILE or --arm/--impressions/--clicks, not both.")
    elif any(v is None for v in single):
        raise ContentlabError("give --arm, --impressions and --clicks (or --input results.csv).")
    with Workspace.open(args.workspace, create=False) as ws:
        if args.input:
            frame = read_results(args.input)
            summary = record_results(ws, args.name, frame, cumulative=args.cumulative, source_file=args.input)
            unused = unused_columns(frame, RESULT_COLUMNS)
        else:
            row = {"arm": args.arm, "impressions": args.impressions, "clicks": args.clicks}
            if args.at is not None:
                row["at"] = args.at
            if args.event_id is not None:
                row["event_id"] = args.event_id
            summary = record_results(ws, args.name, pd.DataFrame([row]), cumulative=args.cumulative)
    print(summary.line())
    if not args.quiet:
        if args.input and unused:
            print(_wrap(f"Note: not read: column(s) {', '.join(repr(c) for c in unused[:8])} of {args.input} (a "
                        "results file has arm, impressions, clicks, at and event_id)."))
        for note in summary.notes:
            print(_wrap("Note: " + note))
        if summary.added:
            print(f"See: contentlab experiment status {args.name}")
    return 0


# ------------------------------------------------------------------ formatting


def _pct(v, digits: int = 2) -> str:
    """A rate or share in a terminal table: "4.56%", or "-" in an empty cell."""
    from ..percentages import percent

    return percent(v, digits, missing="-")


def _prob(v) -> str:
    """A probability in a terminal table, in the report's words ("87%", ">99%"), or "-" in an empty cell."""
    from ..percentages import probability

    return probability(v, missing="-")


def _text_or_dash(v) -> str:
    """A text cell, or '-' when it is missing (None, or NaN where pandas mixed missing and text)."""
    return "-" if v is None or (isinstance(v, float) and math.isnan(v)) or v == "" else str(v)


def _clip(v, n: int) -> str:
    from ..readers import short

    return short("" if v is None else str(v), n)


def _wrap(text: str, width: int = 100) -> str:
    import textwrap

    return textwrap.fill(text, width=width, subsequent_indent="  ")


def _table(frame, columns, extra=None) -> str:
    """Fixed-width text table; ``columns`` are (title, column, formatter); ``extra`` gives ready cells by title."""
    extra = extra or {}
    cells = []
    for title, col, fmt in columns:
        if title in extra:
            cells.append([str(c) for c in extra[title]])
        else:
            cells.append([str(fmt(v)) for v in frame[col]])
    widths = [max([len(t)] + [len(c) for c in cs]) for (t, _, _), cs in zip(columns, cells)]
    numeric = [title not in ("arm", "headline", "experiment", "channel", "status", "leader") for title, _, _ in columns]
    lines = ["  ".join(t.ljust(w) if not num else t.rjust(w) for (t, _, _), w, num in zip(columns, widths, numeric))]
    for i in range(len(frame)):
        lines.append("  ".join(
            cs[i].ljust(w) if not num else cs[i].rjust(w) for cs, w, num in zip(cells, widths, numeric)
        ))
    return "\n".join("  " + line.rstrip() for line in lines)


def _records(frame) -> list[dict]:
    return frame.astype(object).where(frame.notna(), None).to_dict(orient="records")


def _print_json(data) -> None:
    from ..experiments import jsonable

    print(json.dumps(jsonable(data), indent=2, allow_nan=False))


def _print_csv(frame) -> None:
    from ..safety import write_csv

    write_csv(frame, sys.stdout)
