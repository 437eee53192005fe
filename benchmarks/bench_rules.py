"""Benchmark of the metadata rule miner against two mlxtend reference pipelines.

A script, not a timed test: it prints tables. Run from the repository root::

    python benchmarks/bench_rules.py                      # 100k and 1M rows, 3 repeats
    python benchmarks/bench_rules.py --rows 100000 --repeats 5
    python benchmarks/bench_rules.py --quick              # 20k rows, 1 repeat (about a minute)
    python benchmarks/bench_rules.py --skip fpgrowth      # the slow reference left out (said so)

What is measured, side by side in one run, each measurement in a fresh process
(median over ``--repeats`` processes, min-max beside it):

* ``find_slices`` (rules only, ``engine="bitset"``) end to end from a DataFrame, once with
  category columns and once with string (``str`` dtype) columns: the first call in a new
  process (numba cache already on disk) and a second, warm call in the same process.
  The stages of the warm call are timed by wrapping the functions `find_slices` calls
  (``build_eval_table``, ``build_items``, ``search_rules`` and its counting kernel,
  ``score_slices``, ``bh_qvalues``, ``refinement_pvalues``, ``fold_into_refinements``,
  ``fisher_greater`` by caller, ...); a function the library no longer has reads 0.
* reference A: mlxtend ``fpgrowth`` on the one-hot error rows (the same items, the same
  minimum error count, ``max_len=max_terms``), then every itemset counted over all rows
  with numpy (vectorised AND + count_nonzero on bool masks). Building the one-hot inputs
  from the items is timed apart and not counted.
* reference B: the same with mlxtend ``apriori(low_memory=True)``.
  A reference whose first run takes longer than ``--once-after`` seconds runs once only;
  the table says so.
* the bound: a fused AND+popcount numba loop of this script's own (LLVM ctpop, 2 threads
  like the library's kernel) over exactly the (first prefix item, extension item) pairs and
  bitset words the search counted (``RuleCounts.words_touched``), timed in the same process.
* numba's cost: the first ``find_slices`` call in a new process with an empty numba cache
  (compiles), with the cache on disk (loads), and the warm second call.
* the check: the frequent itemsets of the search before the ``min_rows`` prune (run with
  ``min_rows=1``) equal mlxtend's at the same support, with the same counts, once mlxtend's
  are filtered to no two items of one column; the pruning beyond support is reported apart.

Peak memory is the peak resident set size of the measuring process (``VmHWM`` from
``/proc/self/status``, reset through ``/proc/self/clear_refs`` just before the measured
call), so it counts everything the process holds: interpreter, imported libraries, the
input frame. ``+MB`` is that peak minus the resident size just before the call. Each row
also shows the process's CPU time and the 1-minute load average: on a shared machine other
work slows every timing, and the load says how much there was.

To measure one commit while the working tree moves, export it and put it first on the path:
``git archive HEAD slicefind | tar -x -C /tmp/snap && PYTHONPATH=/tmp/snap python
benchmarks/bench_rules.py``; the first line says where slicefind was imported from.

Synthetic data: ``n`` rows x 20 categorical columns with 2-10 levels each, level
probabilities drawn from a Dirichlet (skewed), an error flag at about 8% with three planted
conjunctions (two of 2 terms, one of 3 terms) at higher error rates. Seeded; every size
has the same columns and planted slices.
"""
from __future__ import annotations

import argparse
import gc
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from collections import defaultdict

import numpy as np
import pandas as pd

N_COLUMNS = 20
BASE_RATE = 0.08
#: planted conjunctions: (number of terms, error rate inside)
PLANTED = ((2, 0.30), (2, 0.45), (3, 0.60))
MAX_TERMS = 3
REFERENCES = ("apriori", "fpgrowth")
RESULT = "RESULT "

# ----------------------------------------------------------------------------- data


def make_data(n_rows: int, seed: int = 0):
    """Synthetic eval table: (frame with category columns, error flags, planted, outside rate).

    The structure (levels, level probabilities, planted slices) depends on `seed` only, so
    every size shows the same table; rows are drawn from a second stream.
    """
    rng = np.random.default_rng(seed)
    n_levels = rng.integers(2, 11, size=N_COLUMNS)          # 2..10 levels per column
    probs = [rng.dirichlet(np.full(k, 0.7)) for k in n_levels]   # skewed level frequencies
    names = [f"col{j:02d}" for j in range(N_COLUMNS)]
    # planted slices on distinct columns, each 1-4% of the rows: levels drawn among each
    # column's levels with probability >= 0.1 until the conjunction has that size
    free = list(rng.permutation(N_COLUMNS))
    chosen = []
    for n_terms, slice_rate in PLANTED:
        for _ in range(1000):
            cols = [int(c) for c in rng.choice(free, size=n_terms, replace=False)]
            levels = [int(rng.choice(np.flatnonzero(probs[c] >= 0.1))) for c in cols]
            share = float(np.prod([probs[c][v] for c, v in zip(cols, levels)]))
            if 0.01 <= share <= 0.04:
                break
        free = [c for c in free if c not in cols]
        chosen.append((sorted(zip(cols, levels)), slice_rate))

    rows = np.random.default_rng([seed, 1])
    codes = np.empty((N_COLUMNS, n_rows), dtype=np.int8)
    for j, k in enumerate(n_levels):
        codes[j] = rows.choice(k, size=n_rows, p=probs[j])
    rate = np.zeros(n_rows)
    inside_any = np.zeros(n_rows, dtype=bool)
    planted = []
    for terms, slice_rate in chosen:
        mask = np.ones(n_rows, dtype=bool)
        for c, v in terms:
            mask &= codes[c] == v
        rate = np.where(mask, np.maximum(rate, slice_rate), rate)
        inside_any |= mask
        planted.append((" and ".join(f"{names[c]} = L{v}" for c, v in terms), int(mask.sum()),
                        slice_rate))
    # the rate outside the planted slices that gives BASE_RATE overall
    outside = max(0.01, (BASE_RATE * n_rows - rate[inside_any].sum()) / max(1, (~inside_any).sum()))
    rate = np.where(inside_any, rate, outside)
    errors = rows.random(n_rows) < rate
    frame = pd.DataFrame({
        name: pd.Categorical.from_codes(codes[j], categories=[f"L{v}" for v in range(n_levels[j])])
        for j, name in enumerate(names)})
    return frame, errors, planted, float(outside)


# ----------------------------------------------------------------------------- memory


def _status(field: str) -> int:
    """One kB field of /proc/self/status, in bytes (0 where unavailable)."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith(field + ":"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return 0


def _load1() -> float:
    """1-minute load average (other work on the machine slows every timing)."""
    try:
        return os.getloadavg()[0]
    except OSError:
        return float("nan")


def _reset_peak() -> int:
    """Reset the peak RSS counter to the current RSS; return the current RSS in bytes."""
    gc.collect()
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
    except OSError:
        pass
    return _status("VmRSS")


def _peak() -> int:
    """Peak RSS since the last reset, in bytes (VmHWM; ru_maxrss where /proc is missing)."""
    hwm = _status("VmHWM")
    if hwm:
        return hwm
    import resource
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


# ----------------------------------------------------------------------------- workers


class _Stages:
    """Wall time of the functions find_slices calls, by wrapping them (nesting-aware)."""

    def __init__(self):
        self.times = defaultdict(float)
        self.stack = []
        self.calls = []           # count_extensions calls: (W, n_ext, seconds, engine, a, b)
        self.keep_pairs = False

    def wrap(self, module, name, key):
        original = getattr(module, name, None)
        if original is None:            # the library moved on: that stage reads 0
            return
        stages = self

        def wrapper(*args, **kwargs):
            label = f"{key} in {stages.stack[-1]}" if key == "fisher_greater" and stages.stack else key
            stages.stack.append(key)
            start = time.perf_counter()
            try:
                return original(*args, **kwargs)
            finally:
                stages.times[label] += time.perf_counter() - start
                stages.stack.pop()

        setattr(module, name, wrapper)

    def wrap_kernel(self, bitset):
        """Time each count_extensions call; the engine used is numpy when _count_numpy ran."""
        original = bitset.count_extensions
        original_numpy = bitset._count_numpy
        stages = self
        used_numpy = []

        def numpy_wrapper(*args, **kwargs):
            used_numpy.append(True)
            return original_numpy(*args, **kwargs)

        def wrapper(bits, prefixes, offsets, extensions, *, engine="auto"):
            used_numpy.clear()
            start = time.perf_counter()
            out = original(bits, prefixes, offsets, extensions, engine=engine)
            seconds = time.perf_counter() - start
            used = "numpy" if used_numpy else "numba"
            stages.times["count_extensions"] += seconds
            a = b = None
            if stages.keep_pairs:
                prefixes = np.asarray(prefixes).reshape(len(offsets) - 1, -1)
                a = np.repeat(np.asarray(prefixes[:, 0], dtype=np.int64), np.diff(offsets))
                b = np.asarray(extensions, dtype=np.int64)
            stages.calls.append((int(bits.shape[1]), int(np.size(extensions)), seconds, used, a, b))
            return out

        bitset.count_extensions = wrapper
        bitset._count_numpy = numpy_wrapper

    def reset(self, keep_pairs=False):
        self.times = defaultdict(float)
        self.calls = []
        self.keep_pairs = keep_pairs


def _bound_kernel():
    """A fused AND + hardware-popcount loop over (a, b) row pairs, 2 threads (numba prange)."""
    import numba
    from numba.core import types
    from numba.extending import intrinsic

    @intrinsic
    def popcnt(typingctx, x):
        def codegen(context, builder, signature, args):
            return builder.ctpop(args[0])
        return types.uint64(types.uint64), codegen

    @numba.njit(parallel=True, nogil=True)
    def and_popcount(bits, a, b, out):
        n_w = bits.shape[1]
        for k in numba.prange(a.size):
            x = bits[a[k]]
            y = bits[b[k]]
            total = np.uint64(0)
            for w in range(n_w):
                total += popcnt(x[w] & y[w])
            out[k] = total

    return and_popcount


def _time_bound(items, calls, repeats=5):
    """Median seconds of the bound kernel over the recorded pairs, and words covered."""
    kernel = _bound_kernel()
    small = np.ones((2, 8), dtype=np.uint64)
    kernel(small, np.zeros(1, np.int64), np.ones(1, np.int64), np.zeros(1, np.uint64))  # compile
    words_all = items.bits.shape[1]
    jobs = []
    for width, n_ext, _, _, a, b in calls:
        if n_ext == 0:
            continue
        matrix = items.bits if width == words_all else items.error_bits
        jobs.append((np.ascontiguousarray(matrix), a, b, np.zeros(a.size, np.uint64)))
    runs = []
    for _ in range(repeats):
        start = time.perf_counter()
        for matrix, a, b, out in jobs:
            kernel(matrix, a, b, out)
        runs.append(time.perf_counter() - start)
    words = int(sum(a.size * m.shape[1] for m, a, _, _ in jobs))
    return statistics.median(runs), words


def worker_ours(args):
    """find_slices twice in this new process: first call, then warm call with its stages."""
    frame = pd.read_pickle(args.frame)
    errors = np.load(args.errors)
    import slicefind
    import slicefind.discovery.bitset as bitset_mod
    import slicefind.discovery.rules as rules_mod
    import slicefind.discovery.find as slices_mod
    import slicefind.stats as stats_mod

    stages = _Stages()
    for name in ("build_eval_table", "build_items", "search_rules", "score_slices", "bh_qvalues",
                 "refinement_pvalues", "fold_into_refinements", "_rule_candidates", "rule_bits"):
        stages.wrap(slices_mod, name, name)
    stages.wrap(rules_mod, "fisher_greater", "fisher_greater")
    stages.wrap(stats_mod, "fisher_greater", "fisher_greater")
    stages.wrap(slices_mod, "fisher_greater", "fisher_greater")
    stages.wrap(bitset_mod, "to_rows", "to_rows")
    stages.wrap_kernel(bitset_mod)

    out = {}
    for call in ("first", "warm"):
        stages.reset(keep_pairs=(call == "warm"))
        rss0 = _reset_peak()
        cpu, start = time.process_time(), time.perf_counter()
        found = slicefind.find_slices(frame, errors=errors, max_terms=MAX_TERMS, engine="bitset")
        total, cpu = time.perf_counter() - start, time.process_time() - cpu
        out[call] = {"total": total, "cpu": cpu, "load": _load1(), "stages": dict(stages.times),
                     "rss0": rss0, "peak": _peak(), "kernel_calls": [c[:4] for c in stages.calls]}
    counts = found.extras["counts"]
    items = found.extras["items"]
    bound, words = _time_bound(items, stages.calls)
    out.update(bound=bound, bound_words=words, words_touched=int(counts.words_touched),
               per_level=[len(x) for x in counts.levels], candidates=list(counts.candidates),
               n_items=len(items), n_tested=len(found.tested), n_shown=len(found.table),
               top=found.table["description"].head(3).tolist(), params=dict(
                   min_rows=found.params["min_rows"], min_errors=found.params["min_errors"]))
    return out


def _load_items(path):
    data = np.load(path)
    return {k: data[k] for k in data.files}


def _count_itemsets(masks, itemsets_by_len):
    """Rows of each itemset over all rows: vectorised AND of bool masks, then count_nonzero."""
    counts = {}
    n = masks.shape[1]
    step = max(1, (1 << 24) // max(1, n))          # about 16 MB of temporaries per block
    for width, arr in itemsets_by_len.items():
        out = np.empty(len(arr), dtype=np.int64)
        for s in range(0, len(arr), step):
            block = arr[s:s + step]
            acc = masks[block[:, 0]]
            for j in range(1, width):
                acc &= masks[block[:, j]]
            out[s:s + len(block)] = np.count_nonzero(acc, axis=1)
        counts[width] = out
    return counts


def worker_reference(args):
    """One mlxtend pipeline: mine the error rows, then count each itemset over all rows."""
    from mlxtend.frequent_patterns import apriori, fpgrowth

    from slicefind.discovery import bitset

    d = _load_items(args.items)
    n_rows, n_err = int(d["n_rows_total"]), int(d["n_errors_total"])
    min_errors = int(d["min_errors"])
    start = time.perf_counter()
    masks = bitset.unpack(d["bits"], n_rows)                        # (m, n) bool, all rows
    onehot = pd.DataFrame(bitset.unpack(d["error_bits"], n_err).T)  # error rows x items
    setup = time.perf_counter() - start
    del d
    # the same integer threshold as min_errors, away from float rounding at the boundary
    support = (min_errors - 0.5) / n_err
    rss0 = _reset_peak()
    cpu, start = time.process_time(), time.perf_counter()
    if args.kind == "fpgrowth":
        found = fpgrowth(onehot, min_support=support, max_len=MAX_TERMS)
    else:
        found = apriori(onehot, min_support=support, max_len=MAX_TERMS, low_memory=True)
    mined = time.perf_counter() - start
    by_len = defaultdict(list)
    err_by_len = defaultdict(list)
    for itemset, s in zip(found["itemsets"], found["support"].to_numpy()):
        terms = sorted(int(i) for i in itemset)
        by_len[len(terms)].append(terms)
        err_by_len[len(terms)].append(int(round(s * n_err)))
    by_len = {w: np.asarray(v, dtype=np.int64).reshape(-1, w) for w, v in sorted(by_len.items())}
    start2 = time.perf_counter()
    row_counts = _count_itemsets(masks, by_len)
    counted = time.perf_counter() - start2
    total, cpu = time.perf_counter() - start, time.process_time() - cpu
    peak = _peak()
    if args.dump:
        np.savez(args.dump, **{f"items{w}": v for w, v in by_len.items()},
                 **{f"rows{w}": row_counts[w] for w in by_len},
                 **{f"errs{w}": np.asarray(err_by_len[w], np.int64) for w in by_len})
    return {"mine": mined, "count": counted, "total": total, "cpu": cpu, "load": _load1(),
            "setup": setup, "rss0": rss0, "peak": peak, "n_itemsets": int(len(found))}


def worker_compile(args):
    """find_slices twice in this new process: the first call pays numba's compile or cache load."""
    start = time.perf_counter()
    import slicefind
    t_import_sf = time.perf_counter() - start
    frame = pd.read_pickle(args.frame)
    errors = np.load(args.errors)
    start = time.perf_counter()
    import numba
    t_import_numba = time.perf_counter() - start
    times = []
    for _ in range(2):
        start = time.perf_counter()
        slicefind.find_slices(frame, errors=errors, max_terms=MAX_TERMS, engine="bitset")
        times.append(time.perf_counter() - start)
    return {"import_slicefind": t_import_sf, "import_numba": t_import_numba, "first": times[0],
            "warm": times[1], "threads": numba.config.NUMBA_NUM_THREADS}


WORKERS = {"ours": worker_ours, "fpgrowth": worker_reference, "apriori": worker_reference,
           "compile": worker_compile}


def _spawn(kind, *extra, env=None, timeout=3600):
    cmd = [sys.executable, os.path.abspath(__file__), "--worker", kind, *extra]
    proc = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=timeout)
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith(RESULT)]
    if proc.returncode != 0 or not lines:
        sys.stderr.write(proc.stdout + proc.stderr)
        raise RuntimeError(f"worker {kind} failed (exit {proc.returncode})")
    return json.loads(lines[-1][len(RESULT):])


# ----------------------------------------------------------------------------- driver


def _med(values):
    return statistics.median(values)


def _fmt_s(values):
    if len(values) == 1:
        return f"{values[0]:9.3f}", "        (1 run)"
    return f"{_med(values):9.3f}", f"{min(values):7.3f}-{max(values):.3f}"


def _mb(x):
    return x / 2**20


def _levels_dict(levels, rows, errs):
    out = {}
    for level, r, e in zip(levels, rows, errs):
        for terms, nr, ne in zip(np.asarray(level).tolist(), np.asarray(r).tolist(), np.asarray(e).tolist()):
            out[tuple(terms)] = (nr, ne)
    return out


def _reference_dict(path):
    d = np.load(path)
    out = {}
    for key in d.files:
        if key.startswith("items"):
            w = key[5:]
            for terms, nr, ne in zip(d[key].tolist(), d[f"rows{w}"].tolist(), d[f"errs{w}"].tolist()):
                out[tuple(terms)] = (nr, ne)
    return out


def run_size(n_rows, args, workdir):
    print(f"\n=== {n_rows:,} rows x {N_COLUMNS} categorical columns, max_terms={MAX_TERMS} ===",
          flush=True)
    frame, errors, planted, outside = make_data(n_rows, seed=args.seed)
    tag = f"{n_rows}"
    p_cat = os.path.join(workdir, f"cat{tag}.pkl")
    p_str = os.path.join(workdir, f"str{tag}.pkl")
    p_err = os.path.join(workdir, f"err{tag}.npy")
    p_items = os.path.join(workdir, f"items{tag}.npz")
    frame.to_pickle(p_cat)
    frame.astype("str").to_pickle(p_str)
    np.save(p_err, errors)
    print(f"errors: {int(errors.sum()):,} ({errors.mean():.2%}); rate outside planted slices "
          f"{outside:.3f}; levels per column {[len(frame[c].cat.categories) for c in frame]}")
    for text, size, rate in planted:
        print(f"planted: {text}  ({size:,} rows, error rate {rate:.2f})")

    # prime the numba disk cache and get the items the references mine
    import slicefind
    from slicefind.discovery.bitset import n_words as bitset_words
    from slicefind.discovery.rules import search_rules
    found = slicefind.find_slices(frame, errors=errors, max_terms=MAX_TERMS, engine="bitset")
    items = found.extras["items"]
    min_rows, min_errors = found.params["min_rows"], found.params["min_errors"]
    n_err = int(errors.sum())
    np.savez(p_items, bits=items.bits, error_bits=items.error_bits, column_of=items.column_of,
             n_rows_total=n_rows, n_errors_total=n_err, min_errors=min_errors, min_rows=min_rows)
    print(f"min_rows={min_rows}, min_errors={min_errors} (support {min_errors}/{n_err} of error "
          f"rows), {len(items)} items", flush=True)

    res = {"n_rows": n_rows, "n_errors": n_err, "min_rows": min_rows, "min_errors": min_errors}
    ours = {"category": [], "str": []}
    for r in range(args.repeats):
        for dtype, path in (("category", p_cat), ("str", p_str)):
            ours[dtype].append(_spawn("ours", "--frame", path, "--errors", p_err))
        print(f"  ours: repeat {r + 1}/{args.repeats} done", flush=True)
    refs = {}
    once = {}
    for kind in [k for k in REFERENCES if k not in args.skip]:
        runs = []
        dump = os.path.join(workdir, f"{kind}{tag}.npz")
        for r in range(args.repeats):
            runs.append(_spawn(kind, "--items", p_items, "--dump", dump if r == 0 else ""))
            print(f"  {kind}: run {r + 1} took {runs[-1]['total']:.1f} s", flush=True)
            if runs[-1]["total"] > args.once_after and r + 1 < args.repeats:
                once[kind] = runs[-1]["total"]
                break
        refs[kind] = runs

    # ---- table: times and memory
    def col(runs, f):
        return [f(x) for x in runs]

    rows = []
    for dtype in ("category", "str"):
        runs = ours[dtype]
        for call in ("first", "warm"):
            label = f"find_slices end to end, {dtype} columns, " + (
                "1st call in new process" if call == "first" else "warm 2nd call")
            rows.append((label, col(runs, lambda x: x[call]["total"]),
                         col(runs, lambda x: x[call]["cpu"]), col(runs, lambda x: x[call]["load"]),
                         col(runs, lambda x: x[call]["peak"]),
                         col(runs, lambda x: x[call]["peak"] - x[call]["rss0"])))
    w_all = bitset_words(n_rows)
    named = ("build_eval_table", "build_items", "search_rules", "score_slices", "bh_qvalues",
             "refinement_pvalues", "fold_into_refinements", "_rule_candidates", "rule_bits",
             "to_rows", "fisher_greater")

    def stage_table(runs):
        """label -> per-process seconds, for the warm call of `runs`."""
        warm = [x["warm"]["stages"] for x in runs]

        def st(*names):
            return [sum(s.get(n, 0.0) for n in names) for s in warm]

        def kernel(all_rows):
            return [sum(c[2] for c in x["warm"]["kernel_calls"] if (c[0] == w_all) == all_rows)
                    for x in runs]

        return {
            "  build_eval_table (validation, column kinds)": st("build_eval_table"),
            "  build_items (items + packing)": st("build_items"),
            "  search_rules": st("search_rules"),
            "    counting kernel, error-row bitsets": kernel(False),
            "    counting kernel, all-row bitsets": kernel(True),
            "    join, prune, bookkeeping": [a - b for a, b in zip(st("search_rules"),
                                                                  st("count_extensions"))],
            "  score_slices (Wilson, Fisher vs rest)": st("score_slices"),
            "    of which fisher_greater": st("fisher_greater in score_slices"),
            "  bh_qvalues": st("bh_qvalues"),
            "  = search + scoring": st("search_rules", "score_slices", "bh_qvalues"),
            "  refinement_pvalues (Fisher vs each parent)": st("refinement_pvalues"),
            "    of which fisher_greater ": st("fisher_greater in refinement_pvalues"),
            "  fold_into_refinements": st("fold_into_refinements"),
            "  fisher_greater called by find_slices itself (selection)": st("fisher_greater"),
            "  _rule_candidates (descriptions)": st("_rule_candidates"),
            "  rule_bits + to_rows (rows of shown slices)": st("rule_bits", "to_rows"),
            "  rest of find_slices (tables, ranking)": [
                x["warm"]["total"] - sum(s.get(n, 0.0) for n in named) for x, s in zip(runs, warm)],
            "  = everything after build_items": [
                x["warm"]["total"] - s.get("build_eval_table", 0) - s.get("build_items", 0)
                for x, s in zip(runs, warm)],
            "  = find_slices total (warm call)": [x["warm"]["total"] for x in runs],
        }

    by_dtype = {d: stage_table(ours[d]) for d in ours}
    search_scoring = by_dtype["category"]["  = search + scoring"]
    after_items = by_dtype["category"]["  = everything after build_items"]
    searches = by_dtype["category"]["  search_rules"]
    stage_rows = [(label, t, by_dtype["str"][label]) for label, t in by_dtype["category"].items()]
    stage_rows.append(("bound: fused AND+popcount over the words touched",
                       [x["bound"] for x in ours["category"]], [x["bound"] for x in ours["str"]]))
    for kind in REFERENCES:
        name = "apriori(low_memory=True)" if kind == "apriori" else "fpgrowth"
        if kind not in refs:
            rows.append((f"reference {name} + numpy counts: NOT RUN (--skip {kind})", None, None,
                         None, None, None))
            continue
        runs = refs[kind]
        note = f" [ran once: {once[kind]:.0f} s > {args.once_after:.0f} s]" if kind in once else ""
        rows.append((f"reference {name} + numpy counts{note}", col(runs, lambda x: x["total"]),
                     col(runs, lambda x: x["cpu"]), col(runs, lambda x: x["load"]),
                     col(runs, lambda x: x["peak"]), col(runs, lambda x: x["peak"] - x["rss0"])))
        stage_rows.append((f"{name}: mining the error rows", col(runs, lambda x: x["mine"]), None))
        stage_rows.append((f"{name}: counting itemsets over all rows", col(runs, lambda x: x["count"]), None))
        stage_rows.append((f"({name}: building its inputs from the items, not counted)",
                           col(runs, lambda x: x["setup"]), None))

    print(f"\nTime and peak memory, {n_rows:,} rows (median of {args.repeats} fresh processes; "
          "peak = VmHWM of the measuring process)")
    print(f"{'measurement':<70} {'median s':>9} {'min-max s':>15} {'cpu s':>7} {'load':>5} "
          f"{'peak MB':>8} {'+MB':>6}")
    for label, t, cpu, load, peak, delta in rows:
        if t is None:
            print(label)
            continue
        m, rng = _fmt_s(t)
        print(f"{label:<70} {m} {rng:>15} {_med(cpu):7.2f} {_med(load):5.1f} "
              f"{_mb(_med(peak)):8.0f} {_mb(_med(delta)):6.0f}")
    print("(cpu s: CPU time of the measuring process, all threads; load: 1-minute load average "
          f"when it ended, on {os.cpu_count()} CPUs; +MB: peak minus RSS just before the call)")
    print(f"\nStages of the warm find_slices call, and of the references, {n_rows:,} rows (seconds)")
    print(f"{'stage':<62} {'category':>9} {'min-max':>15} {'str':>9} {'min-max':>15}")
    for label, t, t_str in stage_rows:
        m, rng = _fmt_s(t)
        m2, rng2 = _fmt_s(t_str) if t_str is not None else ("", "")
        print(f"{label:<62} {m} {rng:>15} {m2:>9} {rng2:>15}")
    o = ours["category"][0]
    calls = o["warm"]["kernel_calls"]
    print(f"rules: per level {o['per_level']}, candidates per level {o['candidates']}, "
          f"tested {o['n_tested']:,}, shown {o['n_shown']}")
    print("kernel calls (words per bitset, extensions, engine): "
          + "; ".join(f"{c[0]}x{c[1]:,} {c[3]}" for c in calls))
    print(f"words touched: RuleCounts.words_touched={o['words_touched']:,}; bound covered "
          f"{o['bound_words']:,}")
    print(f"top slices: {o['top']}")

    # ---- equivalence check (not timed)
    print(f"\nCheck: frequent itemsets vs mlxtend at support {min_errors}/{n_err} error rows, {n_rows:,} rows")
    loose = search_rules(items, max_terms=MAX_TERMS, min_rows=1, min_errors=min_errors,
                         n_errors=n_err, engine="bitset")
    final = search_rules(items, max_terms=MAX_TERMS, min_rows=min_rows, min_errors=min_errors,
                         n_errors=n_err, engine="bitset")
    ours_loose = _levels_dict(loose.levels, loose.n_rows, loose.n_errors)
    ours_final = _levels_dict(final.levels, final.n_rows, final.n_errors)
    col_of = items.column_of
    check = {}
    for kind in REFERENCES:
        if kind not in refs:
            print(f"  {kind:<8}: NOT RUN (--skip {kind}), no comparison")
            continue
        ref = _reference_dict(os.path.join(workdir, f"{kind}{tag}.npz"))
        same_col = {k: v for k, v in ref.items() if len(set(col_of[list(k)].tolist())) < len(k)}
        ref_ok = {k: v for k, v in ref.items() if k not in same_col}
        only_ours = set(ours_loose) - set(ref_ok)
        only_ref = set(ref_ok) - set(ours_loose)
        diff = [k for k in set(ours_loose) & set(ref_ok) if ours_loose[k] != ref_ok[k]]
        ok = not only_ours and not only_ref and not diff
        check[kind] = ok
        print(f"  {kind:<8}: {len(ref):,} itemsets, {len(same_col):,} with two items of one column "
              f"removed -> {len(ref_ok):,}; ours (min_rows=1) {len(ours_loose):,}; "
              f"only ours {len(only_ours)}, only {kind} {len(only_ref)}, count mismatches "
              f"{len(diff)} -> {'SAME itemsets and counts' if ok else 'DIFFERENT'}")
        pruned_ref = {k for k, v in ref_ok.items() if v[0] >= min_rows}
        print(f"            after min_rows={min_rows}: {kind} {len(pruned_ref):,}, ours "
              f"{len(ours_final):,} -> {'same' if pruned_ref == set(ours_final) else 'DIFFERENT'}")
    removed = set(ours_loose) - set(ours_final)
    by_len = defaultdict(int)
    for k in removed:
        by_len[len(k)] += 1
    print(f"  pruning beyond support: min_rows={min_rows} removes {len(removed):,} of "
          f"{len(ours_loose):,} frequent itemsets (by length {dict(sorted(by_len.items()))}); "
          f"same-column rules are never generated by the search (see counts above)")
    print(f"  find_slices tested {o['n_tested']:,} rules = search at min_rows: {len(ours_final):,}")

    # ---- targets
    print(f"\nTargets (stated for 1M rows), {n_rows:,} rows; load average now {_load()}")
    e2e_first = _med([x["first"]["total"] for x in ours["category"]])
    e2e_warm = _med([x["warm"]["total"] for x in ours["category"]])
    s_s = _med(search_scoring)
    s_after = _med(after_items)
    search = _med(searches)
    bound = _med([x["bound"] for x in ours["category"]])
    nan = float("nan")
    apr = _med([x["total"] for x in refs["apriori"]]) if "apriori" in refs else nan
    fpg = _med([x["total"] for x in refs["fpgrowth"]]) if "fpgrowth" in refs else nan
    peak = max(_med([x["first"]["peak"] for x in ours[d]]) for d in ours)
    targets = [
        ("search + scoring (search_rules + score_slices + bh_qvalues) <= 1.5 s", s_s, s_s <= 1.5),
        ("everything after build_items (incl. refinement tests) <= 1.5 s", s_after, s_after <= 1.5),
        ("end to end, category columns, warm call <= 3 s", e2e_warm, e2e_warm <= 3.0),
        ("end to end, category columns, 1st call in new process <= 3 s", e2e_first, e2e_first <= 3.0),
        ("apriori pipeline / search + scoring >= 20x", apr / s_s, apr / s_s >= 20),
        ("fpgrowth pipeline / search + scoring >= 100x", fpg / s_s, fpg / s_s >= 100),
        ("apriori pipeline / end to end (warm), for reference >= 20x", apr / e2e_warm, apr / e2e_warm >= 20),
        ("fpgrowth pipeline / end to end (warm), for reference >= 100x", fpg / e2e_warm, fpg / e2e_warm >= 100),
        ("search_rules / bound <= 2x", search / bound, search / bound <= 2),
        ("peak RSS of find_slices process (1st call, either dtype) <= 1024 MB", _mb(peak), peak <= 2**30),
    ]
    for label, value, ok in targets:
        verdict = "n/a " if value != value else ("PASS" if ok else "MISS")   # NaN: not run
        print(f"  {verdict}  {label:<72} {value:10.2f}")
    res.update(ours=ours, refs=refs, once=once, check=check, targets=[(a, b, c) for a, b, c in targets])
    return res


def run_compile(args, workdir, n_rows=100_000):
    print(f"\n=== numba: first find_slices call in a new process vs warm ({n_rows:,} rows) ===",
          flush=True)
    frame, errors, _, _ = make_data(n_rows, seed=args.seed)
    p_frame, p_err = os.path.join(workdir, "compile.pkl"), os.path.join(workdir, "compile.npy")
    frame.to_pickle(p_frame)
    np.save(p_err, errors)
    cache = os.path.join(workdir, "numba-cache")
    env = dict(os.environ, NUMBA_CACHE_DIR=cache)
    extra = ("--frame", p_frame, "--errors", p_err)
    cold = _spawn("compile", *extra, env=env)
    loads = [_spawn("compile", *extra, env=env) for _ in range(args.repeats)]
    print(f"{'process':<50} {'import slicefind':>16} {'import numba':>12} {'1st call':>9} "
          f"{'2nd call':>9} {'1st - 2nd':>9}")
    for label, runs in (("new process, empty numba cache (compiles)", [cold]),
                        (f"new process, cache on disk (median of {len(loads)})", loads)):
        print(f"{label:<50} {_med([r['import_slicefind'] for r in runs]):16.3f} "
              f"{_med([r['import_numba'] for r in runs]):12.3f} {_med([r['first'] for r in runs]):9.3f} "
              f"{_med([r['warm'] for r in runs]):9.3f} "
              f"{_med([r['first'] - r['warm'] for r in runs]):9.3f}")
    files = sum(len(f) for _, _, f in os.walk(cache))
    print(f"(seconds; numba imported before the 1st call; cache files written: {files}; numba "
          f"threads {cold['threads']})")
    return {"cold": cold, "loads": loads}


def _source() -> str:
    """Where the workers' slicefind comes from, with its git commit when it is a checkout."""
    spec = __import__("importlib.util").util.find_spec("slicefind")
    folder = os.path.dirname(os.path.dirname(spec.origin))
    try:
        sha = subprocess.run(["git", "-C", folder, "rev-parse", "--short", "HEAD"], capture_output=True,
                             text=True, check=True).stdout.strip()
        dirty = subprocess.run(["git", "-C", folder, "status", "--porcelain", "--", "slicefind"],
                               capture_output=True, text=True, check=True).stdout.strip()
        return f"{folder} (git {sha}{', slicefind/ has uncommitted changes' if dirty else ''})"
    except (OSError, subprocess.CalledProcessError):
        return folder


def _load() -> str:
    try:
        return " ".join(f"{x:.2f}" for x in os.getloadavg())
    except OSError:
        return "n/a"


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, nargs="+", default=[100_000, 1_000_000])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--quick", action="store_true", help="20k rows, 1 repeat")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--once-after", type=float, default=120.0,
                        help="a reference run longer than this (s) is not repeated")
    parser.add_argument("--skip", nargs="+", default=[], choices=REFERENCES,
                        help="reference pipelines not to run (the tables say so)")
    parser.add_argument("--json", help="also write the raw measurements here")
    parser.add_argument("--worker", choices=sorted(WORKERS), help=argparse.SUPPRESS)
    parser.add_argument("--frame", help=argparse.SUPPRESS)
    parser.add_argument("--errors", help=argparse.SUPPRESS)
    parser.add_argument("--items", help=argparse.SUPPRESS)
    parser.add_argument("--dump", default="", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.worker:
        args.kind = args.worker
        print(RESULT + json.dumps(WORKERS[args.worker](args)))
        return
    if args.quick:
        args.rows, args.repeats = [20_000], 1
    # versions without importing numba here: the library sets numba's cache folder before
    # its first import, and the priming call below must write the cache the workers read
    from importlib.metadata import version
    print(", ".join(f"{p} {version(p)}" for p in ("slicefind", "numpy", "pandas", "mlxtend", "numba"))
          + f", python {sys.version.split()[0]}, {os.cpu_count()} CPUs")
    print(f"slicefind imported from {_source()}; load average {_load()}")
    workdir = tempfile.mkdtemp(prefix="bench_rules_")
    results = {}
    try:
        results["compile"] = run_compile(args, workdir)
        for n in args.rows:
            results[n] = run_size(n, args, workdir)
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    if args.json:
        with open(args.json, "w") as f:
            json.dump(results, f, default=str, indent=1)


if __name__ == "__main__":
    main()
