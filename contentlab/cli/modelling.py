"""``contentlab learn``, ``contentlab drivers`` and ``contentlab evaluate``."""

from __future__ import annotations

import argparse
import json
import sys

from . import add_format_option, add_workspace_option, command_parser, whole_number

# Topic words `drivers` lists unless --top says otherwise (learn saves that table with the model).
DEFAULT_TOP_TERMS = 15


def register(subparsers) -> None:
    p = command_parser(
        subparsers,
        "learn",
        help="learn what drove engagement from the posts in the workspace",
        description=(
            "Fit the engagement model on every post in the workspace: clicks (or engagements) per impression, "
            "channel as a baseline, A/B tests compared within themselves, penalty chosen on later weeks the "
            "model did not see. Prints the held-out validation against simple baselines and the top drivers, "
            "and saves the model in the workspace for drivers, score and experiments."
        ),
        example="contentlab learn --outcome clicks",
    )
    p.add_argument("--outcome", choices=("clicks", "engagements"), default="clicks",
                   help="what to model per impression (default: %(default)s)")
    p.add_argument("--bootstrap", type=whole_number, default=100, metavar="N",
                   help="bootstrap refits for the intervals (default: %(default)s; 0 for none)")
    p.add_argument("--no-meaning", action="store_true",
                   help="leave out headline meaning (sentence embeddings; with many A/B tests it ranks headlines "
                        "about new topics better, and encoding their headlines takes a few ms each)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_format_option(p, choices=("table", "json"))
    add_workspace_option(p)
    p.set_defaults(handler=cmd_learn)

    p = command_parser(
        subparsers,
        "drivers",
        help="list what raised and what lowered engagement, with 90%% intervals",
        description=(
            "Each effect of the saved model as the relative change of the rate for a meaningful step "
            "(one more negative word, ten more characters, 18:00 rather than 09:00, a topic word present), "
            "with a 90% bootstrap interval that resamples whole experiments or weeks: how the headline is "
            "written first, then when it is posted, then topic words (only those with support), the surest "
            "effects first in each part."
        ),
        example="contentlab drivers --format csv > drivers.csv",
    )
    p.add_argument("--outcome", choices=("clicks", "engagements"), default=None,
                   help="which saved model (default: the newest)")
    p.add_argument("--top", type=whole_number, default=DEFAULT_TOP_TERMS, metavar="N",
                   help="topic words to list (default: %(default)s)")
    add_format_option(p)
    add_workspace_option(p)
    p.set_defaults(handler=cmd_drivers)

    p = command_parser(
        subparsers,
        "evaluate",
        help="learn on one post-history file and check the model on another",
        description=(
            "Learn on TRAIN and report on TEST: pairwise accuracy on clearly different arms of the same A/B "
            "test and image (with the number of pairs and a 95% interval), the deviance gain over each "
            "test's mean rate, the gain over simple baselines, and calibration in deciles. No workspace is used."
        ),
        example="contentlab evaluate --train tests-2013.csv --test tests-2014.csv --format json",
    )
    p.add_argument("--train", required=True, metavar="TRAIN.csv", help="post history to learn from")
    p.add_argument("--test", required=True, metavar="TEST.csv", help="later posts to check the model on")
    p.add_argument("--outcome", choices=("clicks", "engagements"), default="clicks")
    p.add_argument("--timezone", default="UTC", metavar="IANA", help="time zone of times without an offset")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_format_option(p, choices=("table", "json"))
    p.set_defaults(handler=cmd_evaluate)


# ----------------------------------------------------------------------------- learn

# More refits than this make a percentile interval no surer (about 1,000 to 2,000 is the usual advice for
# percentile intervals, Efron and Tibshirani 1993, from memory) and would take hours.
MAX_BOOTSTRAP = 5000


def cmd_learn(args: argparse.Namespace) -> int:
    from ..errors import ContentlabError
    from ..model import EngagementModel
    from ..workspace import Workspace

    if not 0 <= args.bootstrap <= MAX_BOOTSTRAP:
        raise ContentlabError(f"--bootstrap must be from 0 to {MAX_BOOTSTRAP:,}; got {args.bootstrap:,}. "
                              "The default 100 is enough for 90% intervals; 1,000 or 2,000 for finer ones.")
    with Workspace.open(args.workspace, create=False) as ws:
        if ws.count_posts() == 0:
            raise ContentlabError(f"no posts in the workspace at {ws.path}; import first: contentlab import FILE")
        posts = ws.posts()
        fingerprint = ws.fingerprint(args.outcome)
        # n_jobs=None: large histories spread folds and bootstrap over every core (small ones stay in one process).
        model = EngagementModel(n_bootstrap=args.bootstrap, n_jobs=None, meaning=False if args.no_meaning else "auto",
                                progress=not args.quiet and sys.stderr.isatty())
        model.fit(posts, outcome=args.outcome)
        summary = model.summary()
        drivers = model.drivers()
        summary["drivers"] = _records(drivers)
        summary["cautions"] = drivers.attrs["cautions"]
        # What `contentlab drivers` prints, so it can answer from this summary without loading the model.
        summary["drivers_top"] = DEFAULT_TOP_TERMS
        summary["interval"] = model.interval
        summary["typical_rate"] = model.typical_rate_
        model_id = ws.save_model(args.outcome, fingerprint, summary, model)
    if args.format == "json":
        print(json.dumps({"model_id": model_id, **summary}, indent=2, default=_json_default))
        return 0
    print(format_learn(model, drivers, model_id))
    return 0


def format_learn(model, drivers, model_id: int) -> str:
    from ..drivers import driver_sentences

    v = model.validation_
    lines = [
        f"Learned {model.outcome_} per impression from {model.n_posts_} posts"
        + (f" ({model.n_experiment_posts_} in {model.n_experiments_} A/B tests)" if model.n_experiments_ else "")
        + f"; saved as model {model_id}.",
        f"Penalty chosen on {v['n_held_out']} held-out later posts ({v['n_folds']} forward time folds): "
        f"alpha {model.alpha_:.3g}; {len(model.dense_columns_)} features, {len(model.term_names_)} topic terms, "
        f"{len(model.wording_names_)} wording n-grams.",
        f"Headline meaning: {getattr(model, 'meaning_note_', 'not used (older model)')}.",
        "",
        "Validation on held-out later posts (deviance; lower is better):",
    ]
    from ..model import _merged_baselines

    for name, row in _merged_baselines(v["deviance"]):
        lines.append(
            f"  vs {name}: model {row['model_deviance']:,.0f}, baseline {row['baseline_deviance']:,.0f}, "
            f"gain {row['gain']:+.1%} (log-loss per impression {row['model_log_loss']:.5f} vs "
            f"{row['baseline_log_loss']:.5f})"
        )
    cov = v.get("coverage", {})
    if cov.get("n_posts"):
        lines.append(f"  {cov['nominal']:.0%} intervals held {cov['coverage']:.1%} of {cov['n_posts']} held-out posts' rates "
                     "(their width is calibrated on these posts)")
    lines.append("")
    lines.extend(v["messages"])
    lines.append("")
    lines.append("Top drivers (contentlab drivers lists them all):")
    lines.extend(f"  - {s}" for s in driver_sentences(drivers, 5))
    lines.append("")
    lines.extend(f"Note: {c}" for c in drivers.attrs["cautions"])
    return "\n".join(lines)


# ----------------------------------------------------------------------------- drivers

def cmd_drivers(args: argparse.Namespace) -> int:
    from ..errors import ContentlabError
    from ..workspace import Workspace

    if args.top < 0:
        raise ContentlabError(f"--top must be 0 or more; got {args.top}")
    with Workspace.open(args.workspace, create=False) as ws:
        frame, about = _saved_drivers(ws, args.outcome, args.top)
        if frame is None:  # another --top, or a model saved before its summary kept the table
            model, _ = ws.load_model(args.outcome)
            frame = model.drivers(top_terms=args.top)
            about = {"outcome": model.outcome_, "interval": model.interval, "typical_rate": model.typical_rate_,
                     "cautions": frame.attrs["cautions"]}
        stale = ws.fingerprint(about["outcome"]) != ws.latest_model_row(args.outcome)[3]
    cautions = list(about["cautions"])
    if stale:
        cautions.insert(0, "The history changed since this model was learned; run contentlab learn to update it.")
    if args.format == "json":
        print(json.dumps({"outcome": about["outcome"], "interval": about["interval"], "drivers": _records(frame),
                          "cautions": cautions}, indent=2, default=_json_default))
    elif args.format == "csv":
        from ..safety import write_csv

        write_csv(frame, sys.stdout)
    else:
        print(format_drivers(frame, about, cautions))
    return 0


def _saved_drivers(ws, outcome: str | None, top: int):
    """The drivers table `learn` saved in the newest model's summary, when it answers this --top; else (None, None).

    Reading it from the summary's JSON spares `drivers` loading the model and the libraries behind it.
    """
    row = ws.latest_model_row(outcome)
    if row is None:
        return None, None  # load_model says there is no model
    try:
        summary = json.loads(row[4])
    except (TypeError, ValueError):
        return None, None
    needed = ("drivers", "drivers_top", "interval", "typical_rate", "cautions", "outcome")
    if not all(k in summary for k in needed) or summary["drivers_top"] != top or not summary["drivers"]:
        return None, None
    import pandas as pd

    frame = pd.DataFrame(summary["drivers"])
    for column in ("relative_change", "low", "high"):
        if column in frame:
            frame[column] = pd.to_numeric(frame[column], errors="coerce")  # JSON null stands for NaN
    return frame, {k: summary[k] for k in needed if k != "drivers"}


def format_drivers(frame, about: dict, cautions: list[str]) -> str:
    from ..drivers import driver_sentences
    from ..percentages import signed_percent

    head = (f"What went with more or fewer {about['outcome']} per impression in your history "
            f"(relative change at the typical rate {about['typical_rate']:.2%}, "
            f"{about['interval']:.0%} bootstrap interval):")
    lines = [head, ""]
    group = None
    for r in frame.itertuples():
        if r.group != group:
            group = r.group
            title = {"writing style": "How the headline is written", "posting time": "When it is posted",
                     "topic words": "What it is about (topic words)"}.get(group, str(group))
            lines.append(f"{title} (surest first):")
            lines.append(f"{'#':>3}  {'driver':<34} {'step':<24} {'change':>8} {'interval':>17}  {'evidence':<22}")
        interval = f"{signed_percent(r.low, 1)} to {signed_percent(r.high, 1)}" if r.low == r.low else "n/a"
        flag = "  uncertain" if r.uncertain else ""
        lines.append(f"{r.rank:>3}  {r.label[:34]:<34} {r.step[:24]:<24} {signed_percent(r.relative_change, 1):>8} "
                     f"{interval:>17}  {r.evidence[:22]:<22}{flag}")
        if r.rank < len(frame) and frame["group"].iloc[r.rank] != group:
            lines.append("")  # between groups; the blank line before "In words" ends the last
    lines.append("")
    lines.append("In words:")
    lines.extend(f"  - {s}" for s in driver_sentences(frame, 5))
    lines.append("")
    lines.extend(f"Note: {c}" for c in cautions)
    return "\n".join(lines)


# ----------------------------------------------------------------------------- evaluate

def cmd_evaluate(args: argparse.Namespace) -> int:
    from ..holdout import evaluate_files
    from ..workspace import check_timezone

    check_timezone(args.timezone)
    result = evaluate_files(args.train, args.test, outcome=args.outcome, timezone=args.timezone,
                            progress=not args.quiet and sys.stderr.isatty())
    if args.format == "json":
        print(json.dumps(result, indent=2, default=_json_default))
        return 0
    print(format_evaluation(result))
    return 0


def format_evaluation(res: dict) -> str:
    lines = [f"Learned on {res['train']['file']} ({res['train']['n_posts']} posts), "
             f"checked on {res['test_file']} ({res['n_test_posts']} posts)."]
    pw = res.get("pairwise")
    if pw and pw["n_pairs"]:
        lines.append(
            f"Pairwise accuracy on clearly different arms (|z| >= 1.96, same test and image): {pw['accuracy']:.3f} "
            f"over {pw['n_pairs']} pairs in {pw['n_clusters']} tests (95% interval {pw['ci_low']:.3f} to "
            f"{pw['ci_high']:.3f}; chance is 0.5)."
        )
    elif pw is not None:
        lines.append("Pairwise accuracy: no clearly different pairs of arms in the test file.")
    we = res.get("within_experiment")
    if we:
        lines.append(f"Within-test deviance: model {we['model_deviance']:,.0f} vs each test's mean "
                     f"{we['per_experiment_mean_deviance']:,.0f} (gain {we['gain']:+.2%}).")
    for row in res["deviance"]:
        lines.append(f"Held-out deviance vs {row['baseline']}: gain {row['gain']:+.2%}"
                     + ("" if row["beats_baseline"] else "  (the model does not beat it)"))
    lines.append(f"Share of test posts inside the 90% interval (no bootstrap): {res['interval_coverage']:.1%}")
    lines.append("Calibration (deciles of the predicted rate):")
    lines.append(f"  {'predicted':>10} {'observed':>10} {'posts':>7}")
    for row in res["calibration"]:
        lines.append(f"  {row['mean_predicted']:>10.4f} {row['observed_rate']:>10.4f} {row['n_posts']:>7}")
    return "\n".join(lines)


def _records(frame) -> list[dict]:
    import numpy as np

    out = []
    for rec in frame.to_dict(orient="records"):
        out.append({k: (None if isinstance(v, float) and not np.isfinite(v) else v) for k, v in rec.items()})
    return out


def _json_default(value):
    import numpy as np

    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating,)):
        v = float(value)
        return v if np.isfinite(v) else None
    if isinstance(value, (np.bool_,)):
        return bool(value)
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")
