"""The review server under load: many clients at once, and a reviewer's rapid tag writes.

A demo-like workspace is built once in a temporary folder: the depot dev set
(`slicefind.demodata.make_depot`, seeded), scanned without embeddings, with slice
descriptions, its pixel arrays as the report artifact and a queue of 100 errors (20 from
the rest), as ``slicefind demo`` leaves it. Each repeat copies that database to a fresh
workspace, starts `make_server` in this process and measures:

(a) ``--clients`` threads (200) released together by a barrier, each opening its own
    connection and sending one ``GET api/state``; a client counts as answered when a 200
    with a complete JSON body arrives within ``--timeout`` seconds (30) of the release.
    Latency runs from the release to the last byte of the answer.
(b) ``--writes`` (1,000) tag toggles, ``POST api/review``, one after another over one
    keep-alive connection (as the page sends them), cycling through the queued rows and
    three categories; latency from sending the request to the last byte of the answer.
(c) ``--tally-reads`` (50) times: one tag toggle, then ``GET api/tally`` on the same
    connection, as the page reads the tally once its writes have settled; latency of the
    tally read alone.

Each figure is the median over ``--repeats`` (3) fresh servers, the min-max beside it.
``--profile`` also runs 200 toggles through the server's application object (no HTTP)
under cProfile and prints where the time goes.

Run:  python benchmarks/bench_review_server.py [--repeats 3] [--profile]
Pin another tree:  PYTHONPATH=/tmp/snap python benchmarks/bench_review_server.py
"""
from __future__ import annotations

import argparse
import cProfile
import http.client
import io
import json
import os
import pstats
import shutil
import statistics
import tempfile
import threading
import time

import numpy as np

import slicefind
from slicefind.page import server as review
from slicefind.demodata import make_depot
from slicefind.discovery.describe import describe_slice
from slicefind.review.queue import build_queue
from slicefind.discovery.find import find_slices
from slicefind.workspace import Workspace

CATEGORIES = ("faded print", "smeared ink", "tape over label")


def build_template(folder: str, n_rows: int) -> str:
    """A workspace like the demo's (scan, descriptions, pixel arrays, queue of 100); its path."""
    depot = make_depot(n_rows, random_state=0)
    images = os.path.join(folder, "images.npy")
    np.save(images, depot.images.astype(np.float32))
    found = find_slices(depot.frame, label="label", prediction="pred", id_column="parcel_id",
                        random_state=0)
    path = os.path.join(folder, "template")
    with Workspace(path) as ws:
        ws.save_scan(found)
        ws.save_artifact("descriptions", {sid: describe_slice(found, sid)
                                          for sid in found.table["slice_id"]})
        ws.save_artifact("report", {"images": images, "image_column": None, "text_column": None,
                                    "data_folder": folder})
        ws.save_queue(build_queue(ws.load_found(), budget=100, rest=20, random_state=0))
    return path


def fresh_copy(template: str, folder: str) -> str:
    """A new workspace folder holding a copy of the template's database."""
    path = tempfile.mkdtemp(prefix="ws-", dir=folder)
    with Workspace(template, create=False) as ws:       # checkpoints the WAL on close
        pass
    shutil.copy(os.path.join(template, "slicefind.sqlite"), os.path.join(path, "slicefind.sqlite"))
    return path


def summary(values: list[float]) -> tuple[float, float]:
    """Median and 95th percentile (nearest rank) in milliseconds; NaN when empty."""
    if not values:
        return float("nan"), float("nan")
    ordered = sorted(values)
    p95 = ordered[min(len(ordered) - 1, int(np.ceil(0.95 * len(ordered))) - 1)]
    return 1000 * statistics.median(ordered), 1000 * p95


def many_clients(server, n_clients: int, timeout: float) -> dict:
    """(a): n clients released at once, one GET api/state each."""
    port = server.httpd.server_address[1]
    path = f"/{server.token}/api/state"
    barrier = threading.Barrier(n_clients + 1)
    latencies: list[float | None] = [None] * n_clients
    failures: dict[str, int] = {}
    start = [0.0]
    guard = threading.Lock()

    def client(k):
        barrier.wait()
        try:
            conn = http.client.HTTPConnection("127.0.0.1", port, timeout=timeout)
            conn.request("GET", path)
            answer = conn.getresponse()
            body = answer.read()
            took = time.perf_counter() - start[0]
            conn.close()
            if answer.status == 200 and json.loads(body)["rows"] and took <= timeout:
                latencies[k] = took
                return
            reason = f"HTTP {answer.status}" if answer.status != 200 else "too late"
        except Exception as exc:                          # noqa: BLE001 (counted, not raised)
            reason = type(exc).__name__
        with guard:
            failures[reason] = failures.get(reason, 0) + 1

    threads = [threading.Thread(target=client, args=(k,), daemon=True) for k in range(n_clients)]
    for t in threads:
        t.start()
    start[0] = time.perf_counter()
    barrier.wait()
    for t in threads:
        t.join(timeout + 5)
    answered = [x for x in latencies if x is not None]
    median, p95 = summary(answered)
    return {"answered": len(answered), "median_ms": median, "p95_ms": p95,
            "wall_s": time.perf_counter() - start[0], "failures": failures}


def _page_connection(server):
    """A keep-alive connection to the server and the headers the review page's writes send."""
    port = server.httpd.server_address[1]
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    headers = {"Content-Type": "application/json",
               "Origin": f"http://127.0.0.1:{port}", "Sec-Fetch-Site": "same-origin"}
    return conn, headers


def rapid_writes(server, rows: list[int], n_writes: int) -> dict:
    """(b): n tag toggles one after another over one keep-alive connection."""
    conn, headers = _page_connection(server)
    latencies, bad = [], 0
    start = time.perf_counter()
    for k in range(n_writes):
        body = json.dumps({"row": rows[k % len(rows)], "toggle": CATEGORIES[(k // len(rows)) % 3]})
        began = time.perf_counter()
        conn.request("POST", f"/{server.token}/api/review", body=body, headers=headers)
        answer = conn.getresponse()
        answer.read()
        latencies.append(time.perf_counter() - began)
        bad += answer.status != 200
    conn.close()
    median, p95 = summary(latencies)
    return {"n_ok": n_writes - bad, "median_ms": median, "p95_ms": p95,
            "wall_s": time.perf_counter() - start}


def tally_reads(server, rows: list[int], n_reads: int) -> dict:
    """(c): n times a toggle then GET api/tally over one keep-alive connection; the reads' latency."""
    conn, headers = _page_connection(server)
    latencies, bad = [], 0
    for k in range(n_reads):
        body = json.dumps({"row": rows[k % len(rows)], "toggle": CATEGORIES[k % 3]})
        conn.request("POST", f"/{server.token}/api/review", body=body, headers=headers)
        conn.getresponse().read()
        began = time.perf_counter()
        conn.request("GET", f"/{server.token}/api/tally")
        answer = conn.getresponse()
        ok = answer.status == 200 and "categories" in json.loads(answer.read())
        latencies.append(time.perf_counter() - began)
        bad += not ok
    conn.close()
    median, p95 = summary(latencies)
    return {"n_ok": n_reads - bad, "median_ms": median, "p95_ms": p95}


def profile_writes(workspace: str, rows: list[int], n_writes: int, top: int = 18) -> str:
    """cProfile of n toggles through the application object (no HTTP), by cumulative time."""
    app = review._ReviewApp(workspace)
    try:
        profiler = cProfile.Profile()
        profiler.enable()
        for k in range(n_writes):
            app.review({"row": rows[k % len(rows)], "toggle": CATEGORIES[k % 3]})
        profiler.disable()
    finally:
        app.close()
    out = io.StringIO()
    pstats.Stats(profiler, stream=out).sort_stats("cumulative").print_stats(top)
    return out.getvalue()


def spread(values: list[float], fmt: str) -> str:
    """'median (min-max)' of a list of figures."""
    values = [v for v in values if v == v]
    if not values:
        return "–"
    return f"{format(statistics.median(values), fmt)} ({format(min(values), fmt)}–{format(max(values), fmt)})"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=6000, help="rows of the depot dev set (6000)")
    parser.add_argument("--clients", type=int, default=200, help="simultaneous clients in (a) (200)")
    parser.add_argument("--writes", type=int, default=1000, help="sequential tag writes in (b) (1000)")
    parser.add_argument("--tally-reads", type=int, default=50,
                        help="toggle-then-tally rounds in (c) (50)")
    parser.add_argument("--timeout", type=float, default=30.0, help="seconds a client waits in (a) (30)")
    parser.add_argument("--repeats", type=int, default=3, help="fresh servers per figure (3)")
    parser.add_argument("--profile", action="store_true", help="also profile 200 toggles (cProfile)")
    parser.add_argument("--json", help="also write the raw figures to this file")
    args = parser.parse_args(argv)

    folder = tempfile.mkdtemp(prefix="slicefind-bench-review-")
    try:
        began = time.perf_counter()
        template = build_template(folder, args.rows)
        with Workspace(template, create=False) as ws:
            rows = [int(r) for r in ws.load_queue().table["row"]]
        print(f"workspace: depot {args.rows:,} rows, queue of {len(rows)} "
              f"(built in {time.perf_counter() - began:.1f} s); slicefind from "
              f"{os.path.dirname(slicefind.__file__)}; load average {os.getloadavg()[0]:.2f}\n")
        runs = []
        for repeat in range(args.repeats):
            with review.make_server(fresh_copy(template, folder)).start() as server:
                clients = many_clients(server, args.clients, args.timeout)
                writes = rapid_writes(server, rows, args.writes)
                tallies = tally_reads(server, rows, args.tally_reads)
            runs.append({"clients": clients, "writes": writes, "tallies": tallies})
            print(f"repeat {repeat + 1}: answered {clients['answered']}/{args.clients} "
                  f"(failures {clients['failures'] or 'none'}), state median "
                  f"{clients['median_ms']:.0f} ms; writes median {writes['median_ms']:.1f} ms, "
                  f"{writes['n_ok']}/{args.writes} ok; tally reads median "
                  f"{tallies['median_ms']:.1f} ms", flush=True)

        c = [r["clients"] for r in runs]
        w = [r["writes"] for r in runs]
        print(f"\n### (a) {args.clients} simultaneous clients, one GET api/state each "
              f"(median of {args.repeats}, min–max)\n")
        print("| answered within {:.0f} s | latency median (ms) | latency p95 (ms) | all answered after (s) |"
              .format(args.timeout))
        print("|---|---|---|---|")
        print(f"| {spread([x['answered'] for x in c], '.0f')} of {args.clients} | "
              f"{spread([x['median_ms'] for x in c], '.0f')} | {spread([x['p95_ms'] for x in c], '.0f')} | "
              f"{spread([x['wall_s'] for x in c], '.1f')} |")
        print(f"\n### (b) {args.writes:,} sequential tag writes, POST api/review "
              f"(median of {args.repeats}, min–max)\n")
        print("| answered 200 | latency median (ms) | latency p95 (ms) | total (s) |")
        print("|---|---|---|---|")
        print(f"| {spread([x['n_ok'] for x in w], '.0f')} of {args.writes} | "
              f"{spread([x['median_ms'] for x in w], '.1f')} | {spread([x['p95_ms'] for x in w], '.1f')} | "
              f"{spread([x['wall_s'] for x in w], '.1f')} |")
        t = [r["tallies"] for r in runs]
        print(f"\n### (c) {args.tally_reads} tally reads, GET api/tally after a toggle "
              f"(median of {args.repeats}, min–max)\n")
        print("| answered 200 | latency median (ms) | latency p95 (ms) |")
        print("|---|---|---|")
        print(f"| {spread([x['n_ok'] for x in t], '.0f')} of {args.tally_reads} | "
              f"{spread([x['median_ms'] for x in t], '.1f')} | {spread([x['p95_ms'] for x in t], '.1f')} |")
        print(f"\n(2 cores shared with other work: load average {os.getloadavg()[0]:.2f} at the end)")
        if args.profile:
            print("\n### where a tag write's time goes (200 toggles, application object, no HTTP)\n")
            print("```\n" + profile_writes(fresh_copy(template, folder), rows, 200).strip() + "\n```")
        if args.json:
            with open(args.json, "w", encoding="utf-8") as handle:
                json.dump({"args": vars(args), "runs": runs}, handle, indent=1)
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
