"""Benchmark ``contentlab serve`` (issue 11, item 6): warm request latency over real HTTP.

Starts the server (``contentlab serve`` in a subprocess, uvicorn, on a free
loopback port) on a demo workspace, waits until it answers, then sends N
requests of each kind one after another and prints the median, 90th and 99th
percentile and the maximum (no timed assertions; the issue's targets are in
brackets):

* ``POST /api/score`` with one draft                  [median <= 50 ms, p99 <= 150 ms]
* ``POST /api/score`` with 20 drafts                  [<= 300 ms]
* ``GET /api/experiments/{name}``, ``GET /api/drivers``
* the pages: Drafts, Experiments, an experiment, History and drivers, a driver, Report, Import
  [each <= 500 ms]; the first (cold) request of each is printed separately.

The demo workspace is built with ``contentlab demo`` in a temporary folder
unless ``--workspace`` names one (it must have a model). The machine is
shared: the load average is printed beside the figures.

Run:  .venv/bin/python benchmarks/bench_serve.py [--requests 200] [--workspace DIR]
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

DRAFTS = [
    "5 things to know about the makerspace laser cutter", "Have you tried the makerspace laser cutter yet?",
    "Winter reading challenge: 6 books to start with", "Storytime moves to Saturday mornings at Eastgate",
]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def request(url: str, body: dict | None = None) -> tuple[int, bytes]:
    data = None if body is None else json.dumps(body).encode()
    req = urllib.request.Request(url, data=data, headers={"Content-Type": "application/json"} if data else {})
    try:
        with urllib.request.urlopen(req, timeout=60) as r:
            return r.status, r.read()
    except urllib.error.HTTPError as exc:
        return exc.code, exc.read()


def timed(url: str, body: dict | None, n: int) -> tuple[float, list[float]]:
    """Cold (first) time and the warm times of ``n`` further requests, in ms."""
    t = time.perf_counter()
    status, text = request(url, body)
    cold = (time.perf_counter() - t) * 1000
    if status != 200:
        raise SystemExit(f"{url}: HTTP {status}: {text[:300]!r}")
    times = []
    for _ in range(n):
        t = time.perf_counter()
        request(url, body)
        times.append((time.perf_counter() - t) * 1000)
    return cold, times


def pct(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(round(q / 100 * (len(ordered) - 1))))]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--requests", type=int, default=200, help="warm requests of each kind (default 200)")
    parser.add_argument("--page-requests", type=int, default=50, help="warm requests of each page (default 50)")
    parser.add_argument("--workspace", help="a workspace with a model (default: a fresh demo workspace)")
    args = parser.parse_args()

    tmp = tempfile.TemporaryDirectory(prefix="bench-serve-")
    workspace = args.workspace
    if workspace is None:
        workspace = str(Path(tmp.name) / "demo-workspace")
        print("building the demo workspace (contentlab demo) ...", flush=True)
        subprocess.run([sys.executable, "-c", "from contentlab.cli import run; run()", "demo", "--workspace",
                        workspace, "--out", str(Path(tmp.name) / "reports")], check=True, stdout=subprocess.DEVNULL)
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    server = subprocess.Popen(
        [sys.executable, "-c", "from contentlab.cli import run; run()", "serve", "--workspace", workspace,
         "--port", str(port), "--no-browser"],
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
    )
    try:
        started = time.perf_counter()
        while True:
            try:
                if request(base + "/api/experiments")[0] == 200:
                    break
            except OSError:
                pass
            if server.poll() is not None:
                raise SystemExit(f"the server stopped: {server.stderr.read().decode()[-500:]}")
            if time.perf_counter() - started > 120:
                raise SystemExit("the server did not answer within 120 s")
            time.sleep(0.1)
        print(f"server ready after {time.perf_counter() - started:.1f} s (model loaded at start)")
        experiments = json.loads(request(base + "/api/experiments")[1])["experiments"]
        name = experiments[0]["experiment"] if experiments else None

        one = {"drafts": [{"headline": DRAFTS[0], "channel": "newsletter", "publish_at": "2026-12-03T09:00"}]}
        twenty = {"drafts": [{"headline": f"{DRAFTS[i % 4]} ({i})", "channel": "newsletter",
                              "publish_at": "2026-12-03T09:00"} for i in range(20)]}
        kinds = [("POST /api/score, 1 draft", base + "/api/score", one, args.requests),
                 ("POST /api/score, 20 drafts", base + "/api/score", twenty, args.requests),
                 ("GET /api/drivers", base + "/api/drivers", None, args.requests)]
        if name:
            kinds.append((f"GET /api/experiments/{name}", base + f"/api/experiments/{name}", None, args.requests))
        pages = ["/drafts", "/experiments", "/history", "/history/drivers/1", "/report", "/import"]
        if name:
            pages.insert(2, f"/experiments/{name}")
        kinds += [(f"page {p}", base + p, None, args.page_requests) for p in pages]

        print(f"load average {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
        print(f"{'request':<44} {'n':>4} {'cold':>8} {'median':>8} {'p90':>8} {'p99':>8} {'max':>8}  (ms)")
        for label, url, body, n in kinds:
            cold, times = timed(url, body, n)
            print(f"{label:<44} {n:>4} {cold:>8.1f} {statistics.median(times):>8.1f} {pct(times, 90):>8.1f} "
                  f"{pct(times, 99):>8.1f} {max(times):>8.1f}", flush=True)
        print(f"load average {os.getloadavg()[0]:.2f} after the run")
    finally:
        server.terminate()
        try:
            server.wait(timeout=10)
        except subprocess.TimeoutExpired:
            server.kill()
        tmp.cleanup()


if __name__ == "__main__":
    main()
