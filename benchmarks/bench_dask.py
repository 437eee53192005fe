"""Dask engine vs the in-memory engine: time, peak memory per process, identical results.

Generates n rows x 20 categorical columns (2-10 levels, skewed level frequencies, two
planted conjunctions), written as Parquet partitions of 1M rows. Each measurement runs
in a fresh subprocess; peak memory is ru_maxrss of that process and, for the Dask
engine, of each worker process (read on the workers with client.run after the scan).

    python benchmarks/bench_dask.py                 # 1M and 10M rows (about 10 minutes)
    python benchmarks/bench_dask.py --rows 1000000  # one size
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np
import pandas as pd

PART_ROWS = 1_000_000


def generate(folder: str, n_rows: int, seed: int = 0) -> None:
    """Write the table as Parquet partitions of PART_ROWS rows (generated part by part)."""
    rng = np.random.default_rng(seed)
    levels = rng.integers(2, 11, 20)
    probs = [rng.dirichlet(np.ones(k) * 2) for k in levels]
    os.makedirs(folder, exist_ok=True)
    for part, start in enumerate(range(0, n_rows, PART_ROWS)):
        m = min(PART_ROWS, n_rows - start)
        prng = np.random.default_rng([seed, part])
        cols = {f"c{j}": pd.Categorical.from_codes(prng.choice(levels[j], m, p=probs[j]),
                                                   [f"v{k}" for k in range(levels[j])])
                for j in range(20)}
        frame = pd.DataFrame(cols)
        rate = np.full(m, 0.07)
        rate[((frame["c0"] == "v0") & (frame["c1"] == "v1")).to_numpy()] = 0.3
        rate[((frame["c2"] == "v0") & (frame["c3"] == "v0") & (frame["c4"] == "v1")).to_numpy()] = 0.4
        frame["wrong"] = prng.random(m) < rate
        frame.to_parquet(os.path.join(folder, f"part-{part:04d}.parquet"), index=False)


def _child(mode: str, folder: str, out: str) -> None:
    """One measurement in this (fresh) process; writes a JSON result to `out`."""
    import slicefind as sf

    result = {}
    if mode == "memory":
        start = time.perf_counter()
        frame = pd.read_parquet(folder)
        loaded = time.perf_counter()
        found = sf.find_slices(frame, errors="wrong")
        result["load_s"] = loaded - start
        result["scan_s"] = time.perf_counter() - loaded
        result["peak_mb"] = {"driver": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}
    else:
        import dask.dataframe as dd
        from distributed import Client, LocalCluster

        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                          dashboard_address=None, memory_limit="4GB") as cluster, Client(cluster) as client:
            client.run(lambda: __import__("numpy"))            # workers up before the clock starts
            start = time.perf_counter()
            frame = dd.read_parquet(folder)
            found = sf.find_slices(frame, errors="wrong", client=client)
            result["load_s"] = 0.0
            result["scan_s"] = time.perf_counter() - start
            workers = client.run(lambda: __import__("resource").getrusage(
                __import__("resource").RUSAGE_SELF).ru_maxrss / 1024)
            result["peak_mb"] = {"driver": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
                                 **{f"worker{i}": v for i, v in enumerate(workers.values())}}
    result["table"] = found.table[["description", "n_rows", "n_errors", "p_value"]].to_dict("list")
    result["tested"] = [int(len(found.tested)), int(found.tested["n_rows"].sum()),
                        int(found.tested["n_errors"].sum())]
    with open(out, "w") as handle:
        json.dump(result, handle)


def measure(mode: str, folder: str) -> dict:
    with tempfile.NamedTemporaryFile(suffix=".json", delete=False) as handle:
        out = handle.name
    subprocess.run([sys.executable, __file__, "--child", mode, folder, out], check=True,
                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    with open(out) as handle:
        return json.load(handle)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--rows", type=int, nargs="*", default=[1_000_000, 10_000_000])
    parser.add_argument("--repeats", type=int, default=1, help="runs per engine and size (median)")
    parser.add_argument("--folder", default=os.path.join(tempfile.gettempdir(), "slicefind-bench-dask"))
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        _child(*args.child)
        return
    print(f"{'rows':>11} {'engine':>7} {'scan s':>8} {'load s':>7} {'peak MB per process':<40} identical")
    for n in args.rows:
        folder = os.path.join(args.folder, f"rows-{n}")
        if not os.path.exists(folder):
            generate(folder, n)
        runs = {mode: [measure(mode, folder) for _ in range(args.repeats)] for mode in ("memory", "dask")}
        ref = runs["memory"][0]
        for mode, results in runs.items():
            scan = float(np.median([r["scan_s"] for r in results]))
            load = float(np.median([r["load_s"] for r in results]))
            peaks = results[0]["peak_mb"]
            same = all(r["table"] == ref["table"] and r["tested"] == ref["tested"] for r in results)
            peak_text = ", ".join(f"{k} {v:,.0f}" for k, v in peaks.items())
            print(f"{n:>11,} {mode:>7} {scan:>8.1f} {load:>7.1f} {peak_text:<40} {same}")
        ratio = np.median([r["scan_s"] for r in runs["dask"]]) / np.median([r["scan_s"] for r in runs["memory"]])
        print(f"{'':>11} dask / in-memory scan time: {ratio:.2f}x (target at 10M rows: <= 2x); "
              f"max process peak {max(max(r['peak_mb'].values()) for r in runs['dask']):,.0f} MB "
              "(target: <= 2,048 MB)")


if __name__ == "__main__":
    main()
