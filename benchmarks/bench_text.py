"""Benchmark of text columns: recall on the help-desk demo, embedding speed and memory.

A script, not a timed test: it prints markdown tables and writes them, with the raw
numbers, to ``--out`` (JSON). Run from the repository root::

    python benchmarks/bench_text.py recall                     # 5 seeds, TF-IDF + SVD
    python benchmarks/bench_text.py recall --text-model PATH   # and a sentence model, side by side
    python benchmarks/bench_text.py speed --rows 100000 1000000
    python benchmarks/bench_text.py all

Sections
--------
recall
    `slicefind.demotext.make_helpdesk` (5,000 messages by default) with four planted
    failure modes, two recorded in no column. ``find_slices(frame, label="team",
    prediction="routed", text="message")`` with each embedding; the ranked table is read
    top down and a planted mode counts as found at K when one of the first K entries has
    rows with Jaccard >= 0.5 with it. With ``--text-model`` (a sentence-transformers
    folder), the same seeds run with that model too; its scans include the time to load
    the model and encode the messages on the CPU.
speed
    ``embed_texts`` on N texts of random words (lengths 20-40, mean 30 tokens, drawn
    Zipf-like from a 30,000-word vocabulary), each size in a fresh process, the median
    of ``--repeats`` runs; beside it, in the same process and on the same texts, the
    reference pipeline a user would write with scikit-learn (``make_pipeline(
    TfidfVectorizer(sublinear_tf=True, min_df=2), TruncatedSVD(64, random_state=0),
    Normalizer())``), and `text_features` (the surface features). Peak memory is the
    process's peak resident set size (``VmHWM``) over the whole run, texts included;
    ``before`` is the resident size with the texts built, before any embedding.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time

import numpy as np


def _jaccard(a, b) -> float:
    a, b = set(np.asarray(a).tolist()), set(np.asarray(b).tolist())
    return len(a & b) / len(a | b) if a | b else 0.0


def _scan_recall(frame, planted, *, seed: int, text_model=None) -> dict:
    import slicefind as sf

    start = time.perf_counter()
    found = sf.find_slices(frame, label="team", prediction="routed", text="message", text_model=text_model,
                           id_column="ticket_id", random_state=seed)
    seconds = time.perf_counter() - start
    ids = list(found.table["slice_id"])
    rank = {}
    for name, p in planted.items():
        hit = next((k for k, sid in enumerate(ids, 1) if _jaccard(found.rows(sid), p.rows) >= 0.5), None)
        rank[name] = hit
    return {"seed": seed, "seconds": seconds, "rank": rank, "n_listed": len(ids),
            "embed_seconds": found.extras["text"].seconds}


def recall(args) -> dict:
    from slicefind.demotext import make_helpdesk

    setups = [("TF-IDF + SVD (default)", None)]
    if args.text_model:
        setups.append((f"sentence model {os.path.basename(os.path.normpath(args.text_model))}", args.text_model))
    runs = {name: [] for name, _ in setups}
    names = None
    for seed in range(args.seeds):
        desk = make_helpdesk(args.rows, random_state=seed)
        names = list(desk.planted)
        for name, model in setups:
            runs[name].append(_scan_recall(desk.frame, desk.planted, seed=seed, text_model=model))
            got = runs[name][-1]
            print(f"  seed {seed} {name}: ranks {got['rank']} in {got['seconds']:.1f} s", flush=True)
    lines = ["| embedding | recall@5 | recall@10 | " + " | ".join(names) + " | scan, median |",
             "|---|---|---|" + "---|" * len(names) + "---|"]
    for name, results in runs.items():
        ranks = [r["rank"][m] for r in results for m in names]
        at = lambda k: sum(r is not None and r <= k for r in ranks) / len(ranks)  # noqa: E731
        per_mode = [f"{sum(r['rank'][m] is not None and r['rank'][m] <= 10 for r in results)}/{len(results)}"
                    for m in names]
        lines.append(f"| {name} | {at(5):.2f} | {at(10):.2f} | " + " | ".join(per_mode)
                     + f" | {statistics.median(r['seconds'] for r in results):.1f} s |")
    table = "\n".join(lines)
    print(f"\nrecall on the help-desk demo ({args.rows:,} messages, seeds 0-{args.seeds - 1}; "
          "per mode: seeds with a top-10 entry at Jaccard >= 0.5)\n" + table)
    return {"table": table, "runs": runs}


_SPEED_CHILD = r"""
import json, statistics, sys, time
import numpy as np
n, repeats = int(sys.argv[1]), int(sys.argv[2])

def rss(field):
    for line in open("/proc/self/status"):
        if line.startswith(field):
            return int(line.split()[1]) * 1024
rng = np.random.default_rng(0)
vocab = np.array([f"w{i}" for i in range(30000)], dtype=object)
p = 1.0 / np.arange(1, 30001); p /= p.sum()
lengths = rng.integers(20, 41, n)
words = vocab[rng.choice(30000, int(lengths.sum()), p=p)]
ends = np.cumsum(lengths)
texts = [" ".join(words[e - l:e]) for e, l in zip(ends, lengths)]
del words
before = rss("VmRSS")
from slicefind.discovery.text import embed_texts, text_features
from sklearn.decomposition import TruncatedSVD
from sklearn.feature_extraction.text import TfidfVectorizer
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import Normalizer
ours, ref, feats = [], [], []
for _ in range(repeats):
    t = time.perf_counter(); v = embed_texts(texts); ours.append(time.perf_counter() - t)
    peak_ours = rss("VmHWM")
    del v
for _ in range(repeats):
    t = time.perf_counter()
    r = make_pipeline(TfidfVectorizer(sublinear_tf=True, min_df=2), TruncatedSVD(64, random_state=0),
                      Normalizer()).fit_transform(texts)
    ref.append(time.perf_counter() - t)
    del r
for _ in range(repeats):
    t = time.perf_counter(); text_features(texts); feats.append(time.perf_counter() - t)
print(json.dumps({"n": n, "tokens": float(lengths.mean()), "ours": ours, "reference": ref, "features": feats,
                  "before": before, "peak_after_ours": peak_ours, "peak": rss("VmHWM")}))
"""


def speed(args) -> dict:
    results = []
    for n in args.rows_speed:
        repeats = args.repeats if n <= 200_000 else max(1, min(args.repeats, 3))
        out = subprocess.run([sys.executable, "-c", _SPEED_CHILD, str(n), str(repeats)],
                             capture_output=True, text=True, check=True)
        got = json.loads(out.stdout.strip().splitlines()[-1])
        results.append(got)
        print(f"  {n:,}: ours {got['ours']}, reference {got['reference']}", flush=True)
    lines = ["| texts | embed_texts, median | scikit-learn pipeline, median | ratio | text_features, median "
             "| peak memory of embed_texts (before) | runs |", "|---|---|---|---|---|---|---|"]
    for got in results:
        a, b = statistics.median(got["ours"]), statistics.median(got["reference"])
        lines.append(f"| {got['n']:,} (mean {got['tokens']:.0f} tokens) | {a:.1f} s | {b:.1f} s | {a / b:.2f} | "
                     f"{statistics.median(got['features']):.1f} s | {got['peak_after_ours'] / 2**20:,.0f} MB "
                     f"({got['before'] / 2**20:,.0f} MB) | {len(got['ours'])} |")
    table = "\n".join(lines)
    print("\nembedding speed (64 dims, TF-IDF + randomized SVD, 2 cores)\n" + table)
    return {"table": table, "results": results}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("section", choices=("recall", "speed", "all"))
    parser.add_argument("--rows", type=int, default=5000, help="messages per demo (recall)")
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--text-model", default=None, help="a sentence-transformers model folder")
    parser.add_argument("--rows-speed", type=int, nargs="+", default=[100_000, 1_000_000])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--out", default=None, help="write the tables and raw numbers here (JSON)")
    args = parser.parse_args(argv)
    report = {}
    if args.section in ("recall", "all"):
        report["recall"] = recall(args)
    if args.section in ("speed", "all"):
        report["speed"] = speed(args)
    if args.out:
        with open(args.out, "w", encoding="utf-8") as handle:
            json.dump(report, handle, indent=1, default=str)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
