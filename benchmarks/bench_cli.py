"""Wall time and peak memory of each command of the README's weekly walkthrough.

Builds a fresh demo workspace (``contentlab demo``), then runs every command of
the walkthrough five times as a user would type it, each in its own process,
and prints the median wall time and the peak resident memory of that process
beside the cost of a bare ``python -c "import numpy, pandas"`` measured in the
same run (the floor any command that touches a table pays).

    python benchmarks/bench_cli.py [--repeat 5] [--keep DIR]
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def run_once(argv: list[str], env: dict) -> tuple[float, float, int]:
    """Run one process; return (wall seconds, peak RSS in MiB, exit code) of that process alone."""
    start = time.perf_counter()
    proc = subprocess.Popen(argv, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, cwd=env["PWD"])
    # wait4 gives the resource usage of this child only (ru_maxrss in KiB on Linux).
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - start
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode:
        err = proc.stderr.read().decode("utf-8", "replace").strip().splitlines()
        print(f"  ! {' '.join(argv[1:])} exited {proc.returncode}: {err[-1] if err else ''}", file=sys.stderr)
    proc.stderr.close()
    return wall, usage.ru_maxrss / 1024, proc.returncode


def walkthrough(drafts: Path, results: Path) -> list[tuple[str, list[str]]]:
    """The README's weekly commands; ``{i}`` is replaced by the run number where a name must be new."""
    return [
        ("settings", ["settings"]),
        ("import (unchanged)", ["import", str(ROOT / "corpus" / "posts.csv")]),
        ("learn", ["learn"]),
        ("drivers", ["drivers"]),
        ("score 1 draft", ["score", "5 things to know about the makerspace laser cutter", "--channel", "newsletter"]),
        ("score drafts file", ["score", "--input", str(drafts)]),
        ("experiment new", ["experiment", "new", "bench-{i}", "--drafts", str(drafts), "--group", "winter-reading"]),
        ("experiment next", ["experiment", "next", "bench-{i}", "--impressions", "2000"]),
        ("record", ["record", "bench-{i}", "--input", str(results)]),
        ("experiment status", ["experiment", "status", "bench-{i}"]),
        ("experiment list", ["experiment", "list"]),
        ("report", ["report"]),
    ]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--repeat", type=int, default=5, help="runs of each command (default: %(default)s)")
    parser.add_argument("--keep", metavar="DIR", help="build the demo workspace here and keep it")
    args = parser.parse_args(argv)

    base = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="contentlab-bench-cli-"))
    base.mkdir(parents=True, exist_ok=True)
    workspace = base / "ws"
    # The console script installed beside this interpreter, as a user runs it.
    exe = [str(Path(sys.executable).parent / "contentlab")]
    env = dict(os.environ, CONTENTLAB_WORKSPACE=str(workspace), PWD=str(base))
    try:
        print(f"building the demo workspace in {workspace} ...", flush=True)
        subprocess.run(exe + ["demo", "--workspace", str(workspace), "--out", str(base / "demo-reports")],
                       env=env, cwd=base, check=True, stdout=subprocess.DEVNULL)
        drafts = ROOT / "corpus" / "drafts.csv"
        results = ROOT / "corpus" / "results.csv"
        if not results.exists():  # older checkouts ship no results example: write one batch
            results = base / "results.csv"
            results.write_text("arm,impressions,clicks\nA,500,30\nB,500,24\n", encoding="utf-8")

        floor = [run_once([sys.executable, "-c", "import numpy, pandas"], env) for _ in range(args.repeat)]
        rows = [("python -c 'import numpy, pandas'", floor)]
        for label, template in walkthrough(drafts, results):
            runs = []
            for i in range(args.repeat):
                cmd = [part.replace("{i}", str(i)) for part in template]
                runs.append(run_once(exe + cmd, env))
            rows.append((f"contentlab {label}", runs))
            print(f"  {label}: done", file=sys.stderr, flush=True)

        print()
        print(f"{'command':<40} {'median s':>9} {'min s':>7} {'peak MiB':>9} {'failed':>6}")
        for label, runs in rows:
            walls = [w for w, _, _ in runs]
            peak = max(m for _, m, _ in runs)
            failed = sum(1 for _, _, c in runs if c)
            print(f"{label:<40} {statistics.median(walls):>9.2f} {min(walls):>7.2f} {peak:>9.0f} {failed:>6}")
        print(f"\n{args.repeat} runs each on {os.cpu_count()} cores; load average {os.getloadavg()[0]:.1f} at the end")
    finally:
        if not args.keep:
            shutil.rmtree(base, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
