"""Dask engine vs the in-memory engine: time, peak memory per process, identical results.

Generates n rows x 20 categorical columns (2-10 levels, skewed level frequencies, two
planted conjunctions), written as Parquet partitions of 1M rows. Each measurement runs
in a fresh subprocess; peak memory is the peak resident set (VmHWM) of that process and,
for the Dask engine, of each worker process (read on the workers with client.run after
the scan). (Not ru_maxrss: Linux carries it over from the parent across fork and exec, so
a child of a parent that has just generated the data would report the parent's size.)
The Dask scan time includes reading the Parquet files (``dd.read_parquet`` is lazy); the
in-memory engine's reading is its "load s", outside its scan time. Before the clock starts
the workers import what the in-memory process has imported by then or imports while
loading (slicefind, pyarrow, dask.dataframe); neither has numba loaded. Below each size, the
Dask engine's phases (median over the runs, from the ``slicefind.discovery.distributed`` DEBUG
log; "rest of find_slices" is scoring and selection on the driver, gathering each shown
slice's rows from the workers).

    python benchmarks/bench_dask.py                 # 1M and 10M rows (under a minute, plus ~15 s
                                                    # to write the data the first time)
    python benchmarks/bench_dask.py --rows 1000000  # one size
    python benchmarks/bench_dask.py --rows 1000000 10000000 --repeats 3   # ~80 s

``--embeddings`` measures the embedding path instead: the demo depot (64-d hidden-layer
embeddings, three planted slices) written as Parquet partitions of 100,000 rows with the
vectors in a list column; in memory, the vectors are stacked into an array while loading
and passed as ``embeddings=``; on Dask, ``embeddings="emb"`` (the fit on a 20,000-row
sample on the driver, every partition placing its own rows). "identical" compares the
table, the tests and every row's cluster labels.

    python benchmarks/bench_dask.py --embeddings --rows 200000 1000000
"""
from __future__ import annotations

import argparse
import json
import os
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


EMB_PART_ROWS = 100_000


def generate_embeddings(folder: str, n_rows: int, seed: int = 0) -> None:
    """The demo depot at n_rows with its 64-d embeddings as a list column 'emb', written as
    Parquet partitions of EMB_PART_ROWS rows (the images are not written)."""
    from slicefind.demodata import make_depot

    depot = make_depot(n_rows, random_state=seed)
    frame = depot.frame.copy()
    frame["emb"] = list(np.asarray(depot.embeddings, dtype=np.float32))
    os.makedirs(folder, exist_ok=True)
    for part, start in enumerate(range(0, n_rows, EMB_PART_ROWS)):
        frame.iloc[start:start + EMB_PART_ROWS].to_parquet(
            os.path.join(folder, f"part-{part:04d}.parquet"), index=False)


#: what each child passes to find_slices, by data set
SCAN = {"rules": dict(errors="wrong"),
        "embeddings": dict(label="label", prediction="pred", exclude=("parcel_id",),
                           cluster_options={"progress": False})}


def peak_mb() -> float:
    """Peak resident set of this process in MB (VmHWM of /proc/self/status)."""
    with open("/proc/self/status") as handle:
        for line in handle:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    return float("nan")


def _child(mode: str, folder: str, out: str) -> None:
    """One measurement in this (fresh) process; writes a JSON result to `out`."""
    import slicefind as sf

    result = {}
    data_set = "embeddings" if mode.endswith("-emb") else "rules"
    mode = mode.removesuffix("-emb")
    options = dict(SCAN[data_set])
    if mode == "memory":
        start = time.perf_counter()
        frame = pd.read_parquet(folder)
        if data_set == "embeddings":
            options["embeddings"] = np.stack(frame.pop("emb").to_numpy())
        loaded = time.perf_counter()
        found = sf.find_slices(frame, **options)
        result["load_s"] = loaded - start
        result["scan_s"] = time.perf_counter() - loaded
        result["peak_mb"] = {"driver": peak_mb()}
    else:
        import logging

        import dask.dataframe as dd
        from distributed import Client, LocalCluster

        class Phases(logging.Handler):
            def emit(self, record):
                result["phases"] = dict(getattr(record, "seconds", {}))

        engine_log = logging.getLogger("slicefind.discovery.distributed")
        engine_log.setLevel(logging.DEBUG)
        engine_log.addHandler(Phases())

        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                          dashboard_address=None, memory_limit="4GB") as cluster, Client(cluster) as client:
            # workers up, with the libraries the in-memory child has imported before its clock
            # starts (slicefind) or reads with outside it (pyarrow); numba is left to both scans
            client.run(lambda: [__import__(m) for m in ("slicefind.discovery.distributed", "pyarrow.parquet",
                                                        "dask.dataframe")])
            if data_set == "embeddings":
                options["embeddings"] = "emb"
            start = time.perf_counter()
            frame = dd.read_parquet(folder)
            found = sf.find_slices(frame, client=client, **options)
            result["load_s"] = 0.0
            result["scan_s"] = time.perf_counter() - start
            workers = client.run(peak_mb)
            result["peak_mb"] = {"driver": peak_mb(),
                                 **{f"worker{i}": v for i, v in enumerate(workers.values())}}
    result["table"] = found.table[["description", "n_rows", "n_errors", "p_value"]].to_dict("list")
    result["tested"] = [int(len(found.tested)), int(found.tested["n_rows"].sum()),
                        int(found.tested["n_errors"].sum())]
    clusters = found.extras.get("clusters")
    if clusters is not None:
        import hashlib

        result["cluster_s"] = dict(clusters.diagnostics["timings"])
        result["tested"].append(hashlib.sha1(b"".join(np.ascontiguousarray(v).tobytes()
                                                      for v in clusters.labels.values())).hexdigest())
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
    parser.add_argument("--rows", type=int, nargs="*", default=None,
                        help="sizes (default 1M and 10M rows; with --embeddings 200k and 1M)")
    parser.add_argument("--repeats", type=int, default=1, help="runs per engine and size (median)")
    parser.add_argument("--folder", default=os.path.join(tempfile.gettempdir(), "slicefind-bench-dask"))
    parser.add_argument("--embeddings", action="store_true",
                        help="the embedding path on the demo depot (default sizes 200k and 1M rows)")
    parser.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        _child(*args.child)
        return
    print(f"{'rows':>11} {'engine':>7} {'scan s':>7} {'runs':<17} {'load s':>6}  "
          f"{'peak MB per process (max over runs)':<42} identical")
    sizes = args.rows if args.rows is not None else (
        [200_000, 1_000_000] if args.embeddings else [1_000_000, 10_000_000])
    suffix = "-emb" if args.embeddings else ""
    for n in sizes:
        folder = os.path.join(args.folder, f"{'depot' if args.embeddings else 'rows'}-{n}")
        if not os.path.exists(folder):
            (generate_embeddings if args.embeddings else generate)(folder, n)
        load_before = os.getloadavg()[0]
        # alternate the engines, so that a change in the machine's load hits both
        runs = {"memory": [], "dask": []}
        for _ in range(args.repeats):
            for mode in runs:
                runs[mode].append(measure(mode + suffix, folder))
        ref = runs["memory"][0]
        for mode, results in runs.items():
            scans = [r["scan_s"] for r in results]
            load = float(np.median([r["load_s"] for r in results]))
            peaks = {k: max(r["peak_mb"][k] for r in results) for k in results[0]["peak_mb"]}
            same = all(r["table"] == ref["table"] and r["tested"] == ref["tested"] for r in results)
            peak_text = ", ".join(f"{k} {v:,.0f}" for k, v in peaks.items())
            runs_text = " ".join(f"{x:.1f}" for x in scans)
            print(f"{n:>11,} {mode:>7} {float(np.median(scans)):>7.1f} {runs_text:<17} {load:>6.1f}  "
                  f"{peak_text:<42} {same}")
        scan = {mode: float(np.median([r["scan_s"] for r in results])) for mode, results in runs.items()}
        load = float(np.median([r["load_s"] for r in runs["memory"]]))
        target = "" if args.embeddings else " (target at 10M rows: <= 2x)"
        print(f"{'':>11} dask / in-memory scan time: {scan['dask'] / scan['memory']:.2f}x{target}; "
              f"against in-memory load + scan: {scan['dask'] / (scan['memory'] + load):.2f}x; "
              f"max process peak {max(max(r['peak_mb'].values()) for r in runs['dask']):,.0f} MB "
              "(target: <= 2,048 MB)")
        phases = [r.get("phases", {}) for r in runs["dask"]]
        names = list(phases[0])
        rest = [r["scan_s"] - sum(p.values()) for r, p in zip(runs["dask"], phases)]
        text = ", ".join(f"{k} {np.median([p.get(k, 0.0) for p in phases]):.2f}" for k in names)
        print(f"{'':>11} dask phases, s (median of {len(phases)}): {text}, rest of find_slices "
              f"{np.median(rest):.2f}; load average {load_before:.1f} -> {os.getloadavg()[0]:.1f}")
        for mode, results in runs.items():
            steps = [r["cluster_s"] for r in results if "cluster_s" in r]
            if steps:
                text = ", ".join(f"{k} {np.median([t[k] for t in steps]):.1f}" for k in steps[0])
                print(f"{'':>11} {mode} cluster steps, s (median of {len(steps)}): {text}")


if __name__ == "__main__":
    main()
