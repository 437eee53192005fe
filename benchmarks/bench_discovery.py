"""Benchmark of slice discovery: recall on planted data, null data, real tables, speed.

A script, not a timed test: it prints markdown tables and writes them, with the raw
numbers, to ``--out`` (JSON). Run from the repository root::

    python benchmarks/bench_discovery.py recall             # 2 x 5 seeds x 6 set-ups, ~15 min
    python benchmarks/bench_discovery.py stamped            # 10 seeds, with the notebook reference
    python benchmarks/bench_discovery.py null               # 100 seeds of null data
    python benchmarks/bench_discovery.py real               # statsmodels' randhie and fair
    python benchmarks/bench_discovery.py placing --rows 1000000
    python benchmarks/bench_discovery.py speed --rows 10000 50000 100000 1000000
    python benchmarks/bench_discovery.py sampling --rows 100000 --seeds 5
    python benchmarks/bench_discovery.py options --rows 5000  # ways to be reproducible
    python benchmarks/bench_discovery.py all

Sections
--------
recall
    `slicefind.demodata.make_depot` (default 6,000 rows, 64-d hidden-layer embeddings)
    with three planted degradations, two recorded by columns and one ("packing tape") by
    none; run once with tape on 5% of the parcels and once, harder, on 1.5%
    (``--tape-share``). For each seed and each set-up, the ranked ``found.table`` is read top down; a
    planted slice counts as found at K when one of the first K entries has rows with
    Jaccard >= 0.5 with it. Set-ups: ``rules`` (no embeddings), ``regions`` and
    ``error_modes`` alone (the frame cut down to label and prediction, so no rule
    competes), and rules together with ``clusters="regions"``, ``"error_modes"`` and
    ``"both"``.
stamped
    `slicefind.demodata.make_stamped`: a customs stamp over every class, recorded in no
    column, embeddings a 10-d PCA of the pixels. find_slices with the whole cluster trees
    (default), with the flat HDBSCAN cut only (``hierarchy=False``: the candidates before
    the trees), and the reference a user would write in a notebook, ``umap.UMAP(
    n_components=5)`` + ``hdbscan.HDBSCAN(min_cluster_size=30)``, scored by its best cluster.
null
    The depot's metadata and embeddings with errors drawn by a coin: the share of seeds in
    which nothing is listed (the false discovery control over rules and tree nodes).
real
    statsmodels' ``randhie`` and ``fair`` scored out of fold (``tests/real_tables.py``):
    listed slices, the largest listed share of rows, the top ten's largest pairwise Jaccard.
placing
    Rows outside the fit placed with faiss's inverted file (default) and with an exact
    search, same scan otherwise: seconds, ARI of the flat labels, share of rows on the same
    tree node, and for each listed slice the Jaccard of its closest exact-run slice.
speed
    ``find_slices`` with 384-d embeddings, each run in a fresh process: *first* with an
    empty numba cache (``NUMBA_CACHE_DIR`` pointed at a new folder: everything numba
    compiles, including umap-learn's own cached functions at import), then *repeat* with
    that cache warm. The 384-d embeddings are made, honestly labelled, from the depot's
    64-d hidden layer: a fixed Gaussian random projection to 384 dims plus independent
    Gaussian noise at 10% of the projected values' standard deviation. Peak memory is
    the peak resident set size of the measuring process over the ``find_slices`` call
    (``VmHWM``, reset through ``/proc/self/clear_refs`` just before it), so it includes
    the input frame and embeddings already held (``before``; ``input`` is their size). The
    EvalTable converts the embeddings to float64, a copy twice the float32 input; the
    last column times the clustering step alone once more, in the same process, on an
    EvalTable holding the float32 array, with its own peak.
sampling
    At ``--rows`` (default 100,000, 384-d as above) the sample-and-assign path (default
    options) against a full fit (``sample_above`` raised above the row count): adjusted
    Rand index of the region and error-mode labels (scikit-learn ``adjusted_rand_score``;
    noise convention: every noise row is a cluster of its own,
    `slicefind.discovery.clusters.noise_as_singletons`), the same index between two full fits
    with different seeds as a yardstick, and planted-slice recall of both paths.

options
    How to be reproducible without paying numba's compile cost in every process: the
    same 8-d layout of 5,000 depot embeddings made four ways (umap-learn's ``UMAP``
    seeded, unseeded, seeded with an exact kNN graph passed in, and slicefind's path),
    each in fresh processes with numba's cache warm, and whether two processes agree.

The machine this runs on may be shared: the load average at the start of each
measurement is printed beside it.
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

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
SETUPS = ("rules", "regions", "error_modes", "rules+regions", "rules+error_modes", "rules+both")
JACCARD_FOUND = 0.5


def _load() -> str:
    """The 1-minute load average, as text."""
    try:
        return f"{os.getloadavg()[0]:.1f}"
    except OSError:
        return "?"


def embeddings_384(depot, seed: int = 1) -> np.ndarray:
    """384-d float32 embeddings: random projection of the 64-d hidden layer plus noise."""
    rng = np.random.default_rng(seed)
    e = depot.embeddings
    projection = (rng.normal(size=(e.shape[1], 384)) / np.sqrt(e.shape[1])).astype(np.float32)
    out = np.empty((e.shape[0], 384), dtype=np.float32)
    for lo in range(0, e.shape[0], 100_000):
        out[lo:lo + 100_000] = e[lo:lo + 100_000] @ projection
    scale = float(out[: min(len(out), 100_000)].std())
    for lo in range(0, e.shape[0], 100_000):
        block = out[lo:lo + 100_000]
        block += rng.normal(0.0, 0.1 * scale, block.shape).astype(np.float32)
    return out


def _jaccard(a: np.ndarray, b: np.ndarray) -> float:
    union = np.union1d(a, b).size
    return np.intersect1d(a, b).size / union if union else 0.0


def found_ranks(found, planted) -> dict[str, int | None]:
    """Planted name -> 1-based rank of the first table entry with Jaccard >= 0.5 (None)."""
    ranks = {}
    ids = list(found.table["slice_id"])
    rows = [found.rows(s) for s in ids]
    for name, p in planted.items():
        ranks[name] = next((i + 1 for i, r in enumerate(rows) if _jaccard(r, p.rows) >= JACCARD_FOUND), None)
    return ranks


def run_setup(depot, setup: str, *, embeddings=None, random_state=0, cluster_options=None):
    """`find_slices` for one set-up of the recall table."""
    from slicefind import find_slices

    frame = depot.frame
    emb = depot.embeddings if embeddings is None else embeddings
    opts = dict(label="label", prediction="pred", random_state=random_state,
                cluster_options=cluster_options)
    if setup == "rules":
        return find_slices(frame, exclude=("parcel_id",), **opts)
    if setup in ("regions", "error_modes"):
        return find_slices(frame[["label", "pred"]], embeddings=emb, clusters=setup, **opts)
    strategy = setup.split("+")[1]
    return find_slices(frame, exclude=("parcel_id",), embeddings=emb, clusters=strategy, **opts)


def recall_section(n_rows: int, seeds: list[int], tape_share: float = 0.05) -> dict:
    """Recall@5/@10 per set-up over `seeds`; whether the unrecorded slice is found."""
    import warnings

    from slicefind.demodata import make_depot

    raw = []
    for seed in seeds:
        depot = make_depot(n_rows, tape_share=tape_share, random_state=seed)
        for setup in SETUPS:
            load = _load()
            start = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                found = run_setup(depot, setup, random_state=seed)
            seconds = time.perf_counter() - start
            ranks = found_ranks(found, depot.planted)
            raw.append(dict(seed=seed, setup=setup, seconds=round(seconds, 2), load=load,
                            n_slices=len(found.table), ranks=ranks))
            print(f"seed {seed} {setup:18s} {seconds:6.1f}s load {load}  ranks {ranks}", flush=True)
    planted = list(make_depot(200, random_state=0).planted)
    latent = [k for k, p in make_depot(200, random_state=0).planted.items() if not p.recorded]
    rows = []
    for setup in SETUPS:
        mine = [r for r in raw if r["setup"] == setup]
        hits = {k: [r["ranks"][name] for r in mine for name in planted if r["ranks"][name] is not None
                    and r["ranks"][name] <= k] for k in (5, 10)}
        total = len(mine) * len(planted)
        per = {name: sum(1 for r in mine if r["ranks"][name] is not None and r["ranks"][name] <= 10)
               for name in planted}
        rows.append(dict(setup=setup, recall_at_5=len(hits[5]) / total, recall_at_10=len(hits[10]) / total,
                         latent_found=sum(per[n] for n in latent), per_planted=per,
                         seconds=float(np.median([r["seconds"] for r in mine])),
                         n_slices=float(np.median([r["n_slices"] for r in mine]))))
    lines = [f"Planted-slice recall, make_depot({n_rows}, tape_share={tape_share}) x seeds {seeds} "
             "(found: Jaccard >= 0.5)", "",
             "| set-up | recall@5 | recall@10 | " + " | ".join(f"{n} (of {len(seeds)})" for n in planted)
             + " | slices shown (median) | seconds (median) |",
             "|---|---|---|" + "---|" * len(planted) + "---|---|"]
    for r in rows:
        lines.append(f"| {r['setup']} | {r['recall_at_5']:.2f} | {r['recall_at_10']:.2f} | "
                     + " | ".join(str(r["per_planted"][n]) for n in planted)
                     + f" | {r['n_slices']:.0f} | {r['seconds']:.1f} |")
    text = "\n".join(lines)
    print(text, flush=True)
    return dict(raw=raw, table=rows, markdown=text)


# ------------------------------------------------------------------ speed (subprocesses)

def _worker(args) -> None:
    """Measure one find_slices run in this (fresh) process and print JSON."""
    import warnings

    t0 = time.perf_counter()
    import slicefind  # noqa: F401
    t_import = time.perf_counter() - t0
    from slicefind.demodata import make_depot

    depot = make_depot(args.rows, random_state=args.seed)
    emb = embeddings_384(depot)
    frame, planted = depot.frame, depot.planted
    del depot                                  # the images are not part of the measurement
    import gc
    from dataclasses import replace

    from slicefind import find_slices
    from slicefind.discovery.clusters import cluster_slices

    gc.collect()

    load = _load()
    _reset_peak()
    base = _rss_mb("VmRSS")
    start = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        found = find_slices(frame, label="label", prediction="pred", embeddings=emb,
                            exclude=("parcel_id",), random_state=args.seed,
                            cluster_options={"progress": False})
    seconds = time.perf_counter() - start
    peak = _rss_mb("VmHWM")
    clusters = found.extras["clusters"]
    diag = dict(clusters.diagnostics)
    ranks = found_ranks(found, planted)
    n_slices = len(found.table)
    # the clustering step alone on the float32 embeddings (EvalTable holds a float64 copy)
    table32 = replace(found.eval_table, embeddings=emb)
    items = found.extras["items"]
    del found, clusters
    gc.collect()
    _reset_peak()
    base32 = _rss_mb("VmRSS")
    start = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cluster_slices(table32, random_state=args.seed, items=items, progress=False)
    seconds32 = time.perf_counter() - start
    peak32 = _rss_mb("VmHWM")
    out = dict(rows=args.rows, seconds=round(seconds, 2), import_s=round(t_import, 2), load=load,
               peak_mb=round(peak), before_mb=round(base),
               input_mb=round((emb.nbytes + frame.memory_usage(deep=True).sum()) / 2**20),
               clusters32_s=round(seconds32, 2), clusters32_peak_mb=round(peak32),
               clusters32_before_mb=round(base32),
               timings=diag["timings"], sampled=diag["sampled"], n_fit=diag["n_fit"],
               n_clusters=diag["n_clusters"], noise_share=diag["noise_share"],
               connected=diag["connected"], n_slices=n_slices,
               warnings=[str(w.message)[:120] for w in caught], ranks=ranks)
    print("RESULT " + json.dumps(out), flush=True)


def _reset_peak() -> None:
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
    except OSError:
        pass


def _rss_mb(field: str) -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith(field + ":"):
                return int(line.split()[1]) / 1024
    return float("nan")


def _spawn(rows: int, seed: int, cache_dir: str, timeout: int) -> dict:
    env = dict(os.environ, NUMBA_CACHE_DIR=cache_dir, PYTHONPATH=ROOT)
    cmd = [sys.executable, os.path.abspath(__file__), "--worker", "--rows", str(rows), "--seed", str(seed)]
    start = time.perf_counter()
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=timeout)
    wall = time.perf_counter() - start
    for line in proc.stdout.splitlines():
        if line.startswith("RESULT "):
            result = json.loads(line[7:])
            result["process_s"] = round(wall, 1)
            return result
    raise RuntimeError(f"worker failed ({proc.returncode}): {proc.stderr[-2000:]}")


def speed_section(sizes: list[int], seed: int, timeout: int, repeats: int = 3) -> dict:
    """First (cold numba cache) and `repeats` repeat (warm cache) runs at each size, each in
    a fresh process; the table ends with the median of the repeats."""
    results = []
    for rows in sizes:
        with tempfile.TemporaryDirectory(prefix="slicefind-numba-") as cache:
            for run in ["first"] + [f"repeat {i + 1}" for i in range(repeats)]:
                try:
                    r = _spawn(rows, seed, cache, timeout)
                except (RuntimeError, subprocess.TimeoutExpired) as exc:
                    r = dict(rows=rows, error=str(exc)[:300])
                r["run"] = run
                results.append(r)
                print(json.dumps(r), flush=True)
    lines = ["find_slices with 384-d embeddings (rules + regions + error modes), fresh process per run", "",
             "| rows | run | find_slices s | import slicefind s | process s | sampled (fit rows) | "
             "pca | knn graph | layout | map | hdbscan | assign | peak MB (before, input) | "
             "clusters alone, float32: s, peak MB (before) | load |",
             "|---|---|---|---|---|---|---|---|---|---|---|---|---|---|---|"]
    for r in results:
        if "error" in r:
            lines.append(f"| {r['rows']:,} | {r['run']} | failed: {r['error'][:60]} |" + " |" * 12)
            continue
        t = r["timings"]
        hd = t.get("hdbscan_regions", 0) + t.get("hdbscan_error_modes", 0)
        lines.append(f"| {r['rows']:,} | {r['run']} | {r['seconds']:.1f} | {r['import_s']:.1f} | "
                     f"{r['process_s']:.0f} | {'yes' if r['sampled'] else 'no'} ({r['n_fit']:,}) | "
                     f"{t['pca']:.1f} | {t['knn_graph']:.1f} | {t['layout']:.1f} | {t['map']:.1f} | "
                     f"{hd:.1f} | {t['assign']:.1f} | {r['peak_mb']:,} ({r['before_mb']:,}, {r['input_mb']:,}) | "
                     f"{r['clusters32_s']:.1f}, {r['clusters32_peak_mb']:,} ({r['clusters32_before_mb']:,}) | "
                     f"{r['load']} |")
    lines += ["", "| rows | median of repeats: find_slices s | assign s | layout s | peak MB |", "|---|---|---|---|---|"]
    for rows in sizes:
        reps = [r for r in results if r["rows"] == rows and r["run"].startswith("repeat") and "error" not in r]
        if reps:
            lines.append(f"| {rows:,} | {np.median([r['seconds'] for r in reps]):.1f} | "
                         f"{np.median([r['timings']['assign'] for r in reps]):.1f} | "
                         f"{np.median([r['timings']['layout'] for r in reps]):.1f} | "
                         f"{np.median([r['peak_mb'] for r in reps]):,.0f} |")
    text = "\n".join(lines)
    print(text, flush=True)
    return dict(raw=results, markdown=text)


# ------------------------------------------------------------------ sampling vs full fit

def sampling_section(rows: int, seeds: list[int]) -> dict:
    """Sample-and-assign against a full fit: ARI of labels and planted-slice recall."""
    import warnings

    from sklearn.metrics import adjusted_rand_score  # the named check

    from slicefind.discovery.clusters import noise_as_singletons
    from slicefind.demodata import make_depot

    full_opts = {"sample_above": rows + 1, "sample_size": rows, "progress": False}
    raw = []
    for seed in seeds:
        depot = make_depot(rows, random_state=seed)
        emb = embeddings_384(depot)
        runs = {}
        for name, opts, rs in (("sampled", {"progress": False}, seed), ("full", full_opts, seed),
                               ("full_other_seed", full_opts, seed + 100)):
            if name == "full_other_seed" and seed != seeds[0]:
                continue                         # the yardstick once is enough
            load = _load()
            start = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                found = run_setup(depot, "rules+both", embeddings=emb, random_state=rs,
                                  cluster_options=opts)
            seconds = time.perf_counter() - start
            runs[name] = (found, seconds, load)
            print(f"seed {seed} {name}: {seconds:.1f}s load {load} ranks {found_ranks(found, depot.planted)}",
                  flush=True)
        full = runs["full"][0].extras["clusters"].labels
        entry = dict(seed=seed)
        for name, (found, seconds, load) in runs.items():
            labels = found.extras["clusters"].labels
            entry[name] = dict(seconds=round(seconds, 1), load=load,
                               ranks=found_ranks(found, depot.planted),
                               noise_share={k: round(float(np.mean(v == -1)), 3) for k, v in labels.items()},
                               n_clusters={k: int(v.max()) + 1 for k, v in labels.items()})
            if name != "full":
                entry[name]["ari_vs_full"] = {
                    k: round(float(adjusted_rand_score(noise_as_singletons(full[k]),
                                                       noise_as_singletons(labels[k]))), 3)
                    for k in labels}
        raw.append(entry)
        print(json.dumps(entry), flush=True)

    def recall(name, k):
        hits = total = 0
        for e in raw:
            if name in e:
                for rank in e[name]["ranks"].values():
                    total += 1
                    hits += rank is not None and rank <= k
        return hits / total if total else float("nan")

    lines = [f"Sample-and-assign vs full fit, make_depot({rows:,}) with 384-d embeddings, seeds {seeds}", "",
             "| path | seconds (median) | regions ARI vs full | error modes ARI vs full | recall@5 | recall@10 |",
             "|---|---|---|---|---|---|"]
    for name in ("sampled", "full", "full_other_seed"):
        have = [e[name] for e in raw if name in e]
        if not have:
            continue
        aris = {k: [h["ari_vs_full"][k] for h in have if "ari_vs_full" in h] for k in ("region", "error_mode")}
        fmt = {k: (f"{np.median(v):.3f}" + (f" ({min(v):.3f}-{max(v):.3f})" if len(v) > 1 else "")
                   if v else "1 (itself)") for k, v in aris.items()}
        lines.append(f"| {name.replace('_', ' ')} | {np.median([h['seconds'] for h in have]):.1f} | "
                     f"{fmt['region']} | {fmt['error_mode']} | {recall(name, 5):.2f} | {recall(name, 10):.2f} |")
    text = "\n".join(lines)
    print(text, flush=True)
    return dict(raw=raw, markdown=text)


# ------------------------------------------------------------------ ways to be reproducible

_OPTION_CODE = {
    "umap.UMAP, seeded": "umap.UMAP(n_components=8, random_state=0).fit_transform(x)",
    "umap.UMAP, unseeded (parallel)": "umap.UMAP(n_components=8).fit_transform(x)",
    "umap.UMAP, seeded, exact kNN passed in": (
        "from slicefind.discovery.clusters import _knn\n"
        "idx, dist = _knn(x.astype(np.float32), 15)\n"
        "umap.UMAP(n_components=8, random_state=0, precomputed_knn=(idx, dist, None)).fit_transform(x)"),
    "slicefind: exact kNN + numpy fuzzy graph + seeded layout": (
        "from slicefind import clusters as C\n"
        "z = C._project(x, *C._pca_axes(x, 50, 'cosine'), 'cosine')\n"
        "idx, dist = C._knn(z, 15)\n"
        "C._umap_layout(z, C._fuzzy_graph(idx, dist), 8, 0, init='pca', n_epochs=100, progress=False, what='')"),
}

_OPTION_TEMPLATE = """
import hashlib, json, time, warnings
warnings.simplefilter("ignore")
import numpy as np
from slicefind.demodata import make_depot
x = make_depot({rows}, random_state=0).embeddings.astype(np.float64)
t0 = time.perf_counter()
import umap
t1 = time.perf_counter()
out = None
def run():
{body}
t2 = time.perf_counter()
out = run()
t3 = time.perf_counter()
print("RESULT " + json.dumps(dict(import_s=t1 - t0, fit_s=t3 - t2)))
"""


def options_section(rows: int, timeout: int) -> dict:
    """8-d layouts of `rows` depot embeddings four ways, each in two fresh processes (numba
    cache warm): seconds, and whether the two processes give the same layout."""
    results = []
    for name, code in _OPTION_CODE.items():
        lines = code.split("\n")
        body = "\n".join("    " + line for line in lines[:-1]) + "\n    return " + lines[-1]
        script = _OPTION_TEMPLATE.format(rows=rows, body=body).replace(
            'print("RESULT', 'print("HASH", hashlib.sha1(np.ascontiguousarray(out).tobytes()).hexdigest())\nprint("RESULT')
        runs = []
        for attempt in range(3):                 # the first warms numba's cache
            proc = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                                  timeout=timeout, env=dict(os.environ, PYTHONPATH=ROOT))
            got = [ln for ln in proc.stdout.splitlines() if ln.startswith(("RESULT", "HASH"))]
            if len(got) < 2:
                raise RuntimeError(proc.stderr[-1500:])
            record = json.loads(got[1][7:])
            record["hash"] = got[0].split()[1]
            record["load"] = _load()
            runs.append(record)
        same = runs[1]["hash"] == runs[2]["hash"]
        results.append(dict(option=name, runs=runs, identical=same))
        print(name, json.dumps(runs), flush=True)
    lines = [f"8-d UMAP layout of make_depot({rows:,}) embeddings (64-d), fresh processes, numba cache warm "
             "(the first of three runs warms it; the table shows runs 2 and 3)", "",
             "| way | import umap s | fit s (run 2, run 3) | same layout in both processes | load |",
             "|---|---|---|---|---|"]
    for r in results:
        a, b = r["runs"][1], r["runs"][2]
        lines.append(f"| {r['option']} | {a['import_s']:.1f} | {a['fit_s']:.1f}, {b['fit_s']:.1f} | "
                     f"{'yes' if r['identical'] else 'no'} | {a['load']}, {b['load']} |")
    text = "\n".join(lines)
    print(text, flush=True)
    return dict(raw=results, markdown=text)


# ------------------------------------------------------------------ stamped: a cross-class degradation

def _best(found, planted: np.ndarray, top: int = 10) -> tuple[float, int | None]:
    """(best Jaccard of the top entries with `planted`, 1-based rank of the first >= 0.5)."""
    ids = list(found.table["slice_id"].head(top))
    js = [_jaccard(found.rows(s), planted) for s in ids]
    rank = next((i + 1 for i, j in enumerate(js) if j >= JACCARD_FOUND), None)
    return (max(js) if js else 0.0), rank


def stamped_section(seeds: list[int], n_rows: int = 1797) -> dict:
    """`make_stamped` over `seeds`: find_slices (whole trees), find_slices with the flat
    cut only (``hierarchy=False``, the candidates before the trees), and the reference
    notebook: ``umap.UMAP(n_components=5, random_state=seed)`` then
    ``hdbscan.HDBSCAN(min_cluster_size=30)`` on the same embeddings, scored by its best
    cluster (it has no test and no ranking, so any of its clusters may count)."""
    import warnings

    import hdbscan
    import umap

    from slicefind import find_slices
    from slicefind.demodata import make_stamped

    raw = []
    for seed in seeds:
        data = make_stamped(n_rows, random_state=seed)
        planted = data.planted["customs stamp"].rows
        entry = dict(seed=seed, n_stamped=int(planted.size))
        for name, opts in (("trees", {}), ("flat cut only", {"hierarchy": False})):
            start = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                found = find_slices(data.frame, label="true_digit", prediction="read_as",
                                    id_column="parcel_id", embeddings=data.embeddings,
                                    random_state=seed, cluster_options=opts)
            best, rank = _best(found, planted)
            entry[name] = dict(best=round(best, 3), rank=rank, seconds=round(time.perf_counter() - start, 2))
        start = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            layout = umap.UMAP(n_components=5, random_state=seed).fit_transform(data.embeddings)
        labels = hdbscan.HDBSCAN(min_cluster_size=30).fit_predict(layout)
        clusters = [np.flatnonzero(labels == c) for c in np.unique(labels[labels >= 0])]
        best = max((_jaccard(c, planted) for c in clusters), default=0.0)
        entry["notebook"] = dict(best=round(best, 3), n_clusters=len(clusters),
                                 seconds=round(time.perf_counter() - start, 2))
        raw.append(entry)
        print(json.dumps(entry), flush=True)
    lines = [f"Cross-class stamp (make_stamped({n_rows}), 12% stamped, 10-d pixel PCA), seeds {seeds}; "
             "found = Jaccard >= 0.5", "",
             "| method | recall@10 | best Jaccard per seed | median seconds |", "|---|---|---|---|"]
    for name, label in (("trees", "find_slices (whole trees, default)"),
                        ("flat cut only", "find_slices, flat cut only (hierarchy=False)"),
                        ("notebook", "notebook: UMAP(5) + HDBSCAN(30), best cluster")):
        got = [e[name] for e in raw]
        found_n = sum(g["best"] >= JACCARD_FOUND for g in got)
        bests = " ".join(f"{g['best']:.2f}" for g in got)
        lines.append(f"| {label} | {found_n / len(got):.2f} | {bests} | "
                     f"{np.median([g['seconds'] for g in got]):.1f} |")
    text = "\n".join(lines)
    print(text, flush=True)
    return dict(raw=raw, markdown=text)


# ------------------------------------------------------------------ null: nothing to find

def null_section(seeds: list[int], n_rows: int = 3000) -> dict:
    """Errors independent of everything (a coin with the depot's error rate), the depot's
    metadata and embeddings given: the share of seeds in which nothing is listed."""
    import warnings

    from slicefind import find_slices
    from slicefind.demodata import make_depot

    depot = make_depot(n_rows, random_state=0)
    frame = depot.frame.drop(columns=["label", "pred"])
    rate = float((depot.frame["label"] != depot.frame["pred"]).mean())
    raw = []
    for seed in seeds:
        errors = np.random.default_rng(1000 + seed).random(n_rows) < rate
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            found = find_slices(frame, errors=errors, embeddings=depot.embeddings, exclude=("parcel_id",),
                                random_state=seed)
        n_clusters = int((found.tested["source"] != "rule").sum())
        raw.append(dict(seed=seed, listed=len(found.table), tested=len(found.tested),
                        cluster_candidates=n_clusters))
    clean = sum(r["listed"] == 0 for r in raw)
    text = (f"Null data (make_depot({n_rows}) metadata and embeddings, errors a coin at {rate:.3f}), "
            f"{len(seeds)} seeds: nothing listed in {clean} ({clean / len(seeds):.0%}); candidates "
            f"tested per seed median {np.median([r['tested'] for r in raw]):.0f}, of them cluster "
            f"nodes {np.median([r['cluster_candidates'] for r in raw]):.0f}; most listed in one seed "
            f"{max(r['listed'] for r in raw)}")
    print(text, flush=True)
    return dict(raw=raw, markdown=text)


# ------------------------------------------------------------------ real tables

def real_section() -> dict:
    """statsmodels' randhie and fair, scored out of fold (tests/real_tables.py): what the
    top of the table looks like."""
    sys.path.insert(0, os.path.join(ROOT, "tests"))
    from real_tables import scored

    from slicefind import find_slices

    out, lines = {}, []
    for name in ("randhie", "fair"):
        frame, label = scored(name)
        start = time.perf_counter()
        found = find_slices(frame, label=label, prediction="predicted")
        seconds = time.perf_counter() - start
        ids = list(found.table["slice_id"].head(10))
        rows = {s: found.rows(s) for s in ids}
        worst = max((_jaccard(rows[a], rows[b]) for i, a in enumerate(ids) for b in ids[i + 1:]), default=0.0)
        top = found.table.head(10)
        out[name] = dict(n_rows=len(frame), listed=len(found.table), seconds=round(seconds, 2),
                         max_share=float(found.table["n_rows"].max() / len(frame)) if len(found.table) else 0.0,
                         max_pairwise_jaccard_top10=round(worst, 3),
                         top=[dict(slice_id=r.slice_id, share=round(r.n_rows / len(frame), 3),
                                   error_rate=round(r.error_rate, 3), lift=round(r.lift, 2),
                                   description=r.description) for r in top.itertuples()])
        lines += [f"{name}: {len(frame):,} rows, error rate {found.error_rate:.3f}, {len(found.table)} listed "
                  f"in {seconds:.1f} s; largest listed share {out[name]['max_share']:.1%}; top-10 max "
                  f"pairwise Jaccard {worst:.3f}", "",
                  "| id | rows | error rate | lift | description |", "|---|---|---|---|---|"]
        lines += [f"| {t['slice_id']} | {t['share']:.1%} | {t['error_rate']:.3f} | {t['lift']:.2f} | "
                  f"{t['description']} |" for t in out[name]["top"][:6]] + [""]
    text = "\n".join(lines)
    print(text, flush=True)
    return dict(raw=out, markdown=text)


# ------------------------------------------------------------------ placing: approximate vs exact

def _matched(a, b) -> list[float]:
    """For each slice listed in `a`, the largest Jaccard with a slice listed in `b`."""
    rows_b = [b.rows(s) for s in b.table["slice_id"]]
    return [round(max((_jaccard(a.rows(s), r) for r in rows_b), default=0.0), 4) for s in a.table["slice_id"]]


def placing_section(rows: int, seed: int) -> dict:
    """At `rows` (384-d depot embeddings), the clusters placed with faiss's inverted file
    (default) and with an exact search: seconds of the placing step, agreement of the
    flat labels (ARI, noise as singletons) and of the tree nodes (share of rows on the
    same deepest node), and for each listed slice the Jaccard of its closest exact-run slice."""
    import warnings

    from sklearn.metrics import adjusted_rand_score  # the named check

    from slicefind import find_slices
    from slicefind.discovery.clusters import noise_as_singletons
    from slicefind.demodata import make_depot

    depot = make_depot(rows, random_state=seed)
    emb = embeddings_384(depot)
    frame = depot.frame
    del depot
    runs = {}
    for placing in ("approximate", "exact"):
        start = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            found = find_slices(frame, label="label", prediction="pred", embeddings=emb,
                                exclude=("parcel_id",), random_state=seed,
                                cluster_options={"placing": placing, "progress": False})
        runs[placing] = (found, time.perf_counter() - start)
        print(f"{placing}: {runs[placing][1]:.1f} s, assign "
              f"{found.extras['clusters'].diagnostics['timings']['assign']:.1f} s", flush=True)
    a, b = runs["approximate"][0].extras["clusters"], runs["exact"][0].extras["clusters"]
    result = dict(rows=rows,
                  seconds={k: round(v[1], 1) for k, v in runs.items()},
                  assign_s={k: v[0].extras["clusters"].diagnostics["timings"]["assign"] for k, v in runs.items()},
                  ari={k: round(float(adjusted_rand_score(noise_as_singletons(a.labels[k]),
                                                          noise_as_singletons(b.labels[k]))), 4)
                       for k in a.labels},
                  same_node={k: round(float(np.mean(a.nodes[k] == b.nodes[k])), 4) for k in a.nodes},
                  n_listed={k: len(v[0].table) for k, v in runs.items()},
                  # each slice listed with the inverted file, against its closest exact-run slice
                  matched_jaccard=_matched(runs["approximate"][0], runs["exact"][0]))
    text = (f"Placing at {rows:,} rows (384-d): assign {result['assign_s']['approximate']:.1f} s (inverted "
            f"file) vs {result['assign_s']['exact']:.1f} s (exact); flat labels ARI {result['ari']}; "
            f"rows on the same tree node {result['same_node']}; slices listed {result['n_listed']}; "
            f"closest exact-run slice per listed slice, Jaccard min {min(result['matched_jaccard'], default=0):.3f}, "
            f"median {np.median(result['matched_jaccard']) if result['matched_jaccard'] else 0:.3f}")
    print(text, flush=True)
    return dict(raw=result, markdown=text)


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("section", nargs="?", default="all",
                        choices=("recall", "stamped", "null", "real", "placing", "speed", "sampling", "options", "all"))
    parser.add_argument("--rows", type=int, nargs="*", default=None)
    parser.add_argument("--seeds", type=int, default=None,
                        help="seeds 0..N-1 (default: recall and sampling 5, stamped 10, null 100)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--tape-share", type=float, nargs="*", default=[0.05, 0.015],
                        help="recall: share of parcels with the unrecorded degradation")
    parser.add_argument("--timeout", type=int, default=3600, help="seconds per speed run")
    parser.add_argument("--repeats", type=int, default=3, help="speed: warm-cache runs per size")
    parser.add_argument("--out", default=None, help="JSON file for the results")
    parser.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        args.rows = args.rows[0]
        _worker(args)
        return
    def seeds_or(default: int) -> list[int]:
        return list(range(args.seeds if args.seeds is not None else default))

    seeds = seeds_or(5)
    results = {}
    if args.section in ("recall", "all"):
        for share in args.tape_share:
            results[f"recall_tape_{share}"] = recall_section((args.rows or [6000])[0], seeds, share)
    if args.section in ("stamped", "all"):
        results["stamped"] = stamped_section(seeds_or(10))
    if args.section in ("null", "all"):
        results["null"] = null_section(seeds_or(100))
    if args.section in ("real", "all"):
        results["real"] = real_section()
    if args.section in ("placing", "all"):
        results["placing"] = placing_section((args.rows or [1_000_000])[0], args.seed)
    if args.section in ("speed", "all"):
        results["speed"] = speed_section(args.rows or [10_000, 50_000, 100_000, 1_000_000], args.seed,
                                         args.timeout, args.repeats)
    if args.section in ("sampling", "all"):
        results["sampling"] = sampling_section((args.rows or [100_000])[0], seeds)
    if args.section in ("options", "all"):
        results["options"] = options_section((args.rows or [5000])[0], args.timeout)
    if args.out:
        with open(args.out, "w") as fh:
            json.dump(results, fh, indent=1, default=str)


if __name__ == "__main__":
    main()
