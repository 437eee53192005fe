"""Coverage of the tally's category-share intervals with a simulated reviewer.

A seeded depot dev set (handwritten digits read off parcel labels) is scanned once; every
error row is given its true categories, correlated with the slices found (faded ink on
recycled label stock, torn labels on scanner S3 at night) plus categories that no slice
explains (an overwritten digit, a rare skewed label). The finite population of errors is
fixed, so each category's true share is known exactly. Each repetition draws a new queue
(``random_state`` = repetition), a reviewer tags the reviewed rows with their true
categories, and we count how often the 95% interval holds the true share.

slicefind's interval (``coverage``: the tally's own ``share_low``/``share_high``, the union of
MOVER over per-stratum Wilson-FPC limits and the constrained-MLE score interval) is
compared with each part alone and, for reference, with a Wilson interval at Kish's
effective sample size ``n_eff = p(1-p)/v`` (falling back to the number reviewed when ``p``
is 0 or 1 or ``v`` is 0), the survey-statistics recipe that Korn & Graubard (1998) used
with Clopper-Pearson limits (recalled from memory).

``--adaptive`` measures `Queue.extend(n, adaptive=tally)` instead: on the same seeds, a first
pass (budget 60, rest 10) is reviewed, then the queue grows by the same number of rows with
the fixed rule, the adaptive rule (undecided candidates first, then Neyman allocation) and,
for reference, Neyman allocation alone (the adaptive rule told that nothing is undecided).
It prints, per rule, the reviews used, the candidates decided (verdict confirmed or rejected)
and decided wrongly (against the stratum's true precision), the coverage of the 95%
category-share and candidate-precision intervals (pooled, and the lowest category or
candidate) and their median widths, on the depot world above and on a wider one with seven
planted problems whose categories hold 25% to 81% of their slice's errors.

Run:  python benchmarks/bench_coverage.py [--reps 200]
      python benchmarks/bench_coverage.py --adaptive [--reps 200] [--extra 60]
"""
from __future__ import annotations

import argparse
import time
from dataclasses import replace

import numpy as np
import pandas as pd

from slicefind.review.queue import REST, build_queue
from slicefind.discovery.find import find_slices
from slicefind.stats import (mover_sum_interval, score_sum_interval, stratified_interval,
                             stratified_proportion, wilson_interval_fpc, z_value)
from slicefind.review.tally import UNTAGGED, tally

CATEGORIES = ("faded ink", "torn label", "overwritten digit", "skewed label")

#: (name, budget, rest, reviewed prefix of the sheet or None for all)
SCENARIOS = (
    ("budget 100, all reviewed", 100, 20, None),
    ("budget 100, first 40 reviewed", 100, 20, 40),
    ("budget 60, rest 10, all reviewed", 60, 10, None),
)


def depot_world(seed: int = 11, n: int = 6000):
    """Scan a seeded depot dev set once; return (found, per-error-row true tag sets)."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "parcel": [f"P{i:05d}" for i in range(n)],
        "scanner": rng.choice(["S1", "S2", "S3", "S4"], n),
        "shift": rng.choice(["early", "late", "night"], n),
        "label_stock": rng.choice(["matte", "gloss", "recycled"], n, p=[0.5, 0.3, 0.2]),
        "belt_speed": np.round(rng.uniform(1.0, 3.0, n), 2),
    })
    night_s3 = (frame["scanner"] == "S3") & (frame["shift"] == "night")
    recycled = frame["label_stock"] == "recycled"
    rate = 0.06 + 0.40 * night_s3 + 0.22 * recycled + 0.10 * (frame["belt_speed"] > 2.7)
    wrong = rng.random(n) < rate
    found = find_slices(frame, errors=wrong, id_column="parcel")
    tags = {}
    for i in np.flatnonzero(wrong):
        here = set()
        if rng.random() < (0.8 if recycled[i] else 0.05):
            here.add("faded ink")
        if rng.random() < (0.7 if night_s3[i] else 0.03):
            here.add("torn label")
        if rng.random() < 0.12:
            here.add("overwritten digit")
        if rng.random() < 0.02:
            here.add("skewed label")
        tags[int(i)] = tuple(sorted(here))
    return found, tags


def true_shares(tags, categories=CATEGORIES) -> dict[str, float]:
    """Each category's share of all error rows, and the untagged share."""
    n = len(tags)
    shares = {c: sum(c in t for t in tags.values()) / n for c in categories}
    shares[UNTAGGED] = sum(not t for t in tags.values()) / n
    return shares


def kish_wilson(k, n, N, confidence_level=0.95):
    """Wilson interval at Kish's effective n of the stratified estimate (reviewed strata only)."""
    k, n, N = (np.asarray(x, dtype=float) for x in (k, n, N))
    seen = n > 0
    p, v = stratified_proportion(k[seen], n[seen], N[seen], population=N[seen].sum())
    n_eff = p * (1 - p) / v if (0 < p < 1 and v > 0) else n[seen].sum()
    z = z_value(confidence_level)
    denom = 1 + z * z / n_eff
    centre = (p + z * z / (2 * n_eff)) / denom
    half = z * np.sqrt(p * (1 - p) / n_eff + z * z / (4 * n_eff ** 2)) / denom
    return max(0.0, centre - half) if p > 0 else 0.0, min(1.0, centre + half) if p < 1 else 1.0


def _parts(k, n, N):
    """MOVER-only and score-only limits over the reviewed strata (unreviewed: none/all)."""
    seen = n > 0
    w = N / N.sum()
    unknown = w[~seen].sum()
    k, n, N, w = k[seen], n[seen], N[seen], w[seen]
    mover = mover_sum_interval(k / n, *wilson_interval_fpc(k, n, N), w)
    score = score_sum_interval(k, n, N, w)
    return ((max(mover[0], 0.0), min(mover[1] + unknown, 1.0)),
            (max(score[0], 0.0), min(score[1] + unknown, 1.0)))


def simulate(reps: int, scenarios=SCENARIOS, world=None):
    """Coverage rows per scenario and category: true share, mean estimate, coverages, width."""
    found, tags = world if world is not None else depot_world()
    truth = true_shares(tags)
    methods = ("coverage", "coverage_mover", "coverage_score", "coverage_kish_wilson")
    rows = []
    for name, budget, rest, prefix in scenarios:
        hits = {c: dict.fromkeys(methods + ("width", "estimate", "misses_low", "misses_high"), 0.0)
                for c in truth}
        for rep in range(reps):
            queue = build_queue(found, budget=budget, rest=rest, random_state=rep)
            sheet = queue.table[["row", "stratum"]].copy()
            if prefix is not None:
                sheet = sheet.head(prefix)
            sheet["reviewed"] = "yes"
            sheet["tags"] = [";".join(tags[int(r)]) for r in sheet["row"]]
            result = tally(queue, sheet[["row", "reviewed", "tags"]])
            cats = result.categories.set_index("category")
            strata = list(queue.strata["stratum"])
            N_h = queue.strata["n_errors"].to_numpy(dtype=float)
            n_h = sheet["stratum"].value_counts().reindex(strata, fill_value=0).to_numpy(dtype=float)
            for c, share in truth.items():
                has = [(c in tags[int(r)]) if c != UNTAGGED else not tags[int(r)] for r in sheet["row"]]
                k_h = (pd.Series(has, dtype=float).groupby(sheet["stratum"].to_numpy()).sum()
                       .reindex(strata, fill_value=0).to_numpy())
                if c in cats.index:
                    est, low, high = cats.at[c, "share"], cats.at[c, "share_low"], cats.at[c, "share_high"]
                else:      # never tagged in this sample, so the tally has no line: same formula
                    est, low, high = stratified_interval(k_h, n_h, N_h)
                mover, score = _parts(k_h, n_h, N_h)
                kish = kish_wilson(k_h, n_h, N_h)
                h = hits[c]
                h["coverage"] += low <= share <= high
                h["misses_low"] += share < low
                h["misses_high"] += share > high
                h["coverage_mover"] += mover[0] <= share <= mover[1]
                h["coverage_score"] += score[0] <= share <= score[1]
                h["coverage_kish_wilson"] += kish[0] <= share <= kish[1]
                h["width"] += high - low
                h["estimate"] += est
        for c, h in hits.items():
            row = {"scenario": name, "category": c, "true_share": truth[c],
                   "mean_estimate": h["estimate"] / reps}
            row.update({m: h[m] / reps for m in methods})
            row.update({"misses_low": int(h["misses_low"]), "misses_high": int(h["misses_high"]),
                        "mean_width": h["width"] / reps})
            rows.append(row)
    return pd.DataFrame(rows)


# --- adaptive extension: where the next reviews go -----------------------------------------

#: (mask builder, extra error rate, category, chance that an error of the group carries it)
WIDE_GROUPS = (
    (lambda f: f["label_stock"] == "recycled", 0.22, "faded ink", 0.80),
    (lambda f: (f["scanner"] == "S3") & (f["shift"] == "night"), 0.35, "torn label", 0.62),
    (lambda f: f["belt_speed"] > 2.75, 0.15, "smeared print", 0.42),
    (lambda f: f["lane"] == "L7", 0.15, "overwritten digit", 0.58),
    (lambda f: f["label_stock"] == "thermal", 0.12, "heat-darkened label", 0.35),
    (lambda f: f["scanner"] == "S5", 0.12, "glare on wrap", 0.68),
    (lambda f: (f["lane"] == "L2") & (f["shift"] == "early"), 0.25, "skewed label", 0.25),
)


def wide_world(seed: int = 5, n: int = 12000):
    """A depot dev set with seven planted problems whose categories sit near and far from 0.5
    of their slice's errors; returns (found, per-error-row true tag sets)."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "parcel": [f"P{i:05d}" for i in range(n)],
        "scanner": rng.choice(["S1", "S2", "S3", "S4", "S5", "S6"], n),
        "shift": rng.choice(["early", "late", "night"], n),
        "label_stock": rng.choice(["matte", "gloss", "recycled", "thermal"], n, p=[0.4, 0.25, 0.2, 0.15]),
        "lane": rng.choice([f"L{i}" for i in range(1, 9)], n),
        "belt_speed": np.round(rng.uniform(1.0, 3.0, n), 2),
    })
    masks = [build(frame).to_numpy() for build, *_ in WIDE_GROUPS]
    rate = 0.05 + sum(extra * m for m, (_, extra, _, _) in zip(masks, WIDE_GROUPS))
    wrong = rng.random(n) < rate
    found = find_slices(frame, errors=wrong, id_column="parcel")
    tags = {}
    for i in np.flatnonzero(wrong):
        here = {cat for m, (_, _, cat, q) in zip(masks, WIDE_GROUPS) if rng.random() < (q if m[i] else 0.02)}
        tags[int(i)] = tuple(sorted(here))
    return found, tags


def _review(queue, tags, names, threshold=0.5):
    """Tally `queue` with every queued row reviewed and tagged with its true categories."""
    sheet = queue.table[["row"]].copy()
    sheet["reviewed"] = "yes"
    sheet["tags"] = [";".join(tags[int(r)]) for r in sheet["row"]]
    return tally(queue, sheet, names=names, threshold=threshold)


def _candidate_names(queue, tags):
    """Each candidate named after the category most of its stratum's errors carry (the truth)."""
    names = {}
    for s in queue.strata["stratum"]:
        if s == REST:
            continue
        counts = pd.Series([t for r in queue.order(s) for t in tags[int(r)]], dtype=object).value_counts()
        names[s] = str(counts.index[0]) if len(counts) else CATEGORIES[0]
    return names


def simulate_adaptive(reps: int, world, *, budget: int = 60, rest: int = 10, extra: int = 60,
                      threshold: float = 0.5):
    """Per rule (fixed, adaptive, Neyman only): decisions, coverage and widths after a first
    pass of `budget` and `extra` more reviews, on the same seeds for every rule."""
    found, tags = world
    truth = true_shares(tags, sorted({c for t in tags.values() for c in t}))
    reference = build_queue(found, budget=budget, rest=rest, random_state=0)
    names = _candidate_names(reference, tags)
    precision_truth = {s: float(np.mean([names[s] in tags[int(r)] for r in reference.order(s)]))
                       for s in names}
    rules = ("first pass", "fixed", "adaptive", "Neyman only")
    out = {rule: {"reviews": [], "decided": [], "wrong": [], "share_width": [], "precision_width": [],
                  "share_hits": {c: [] for c in truth}, "precision_hits": {s: [] for s in names}}
           for rule in rules}
    per_rep = {rule: [] for rule in rules}
    for rep in range(reps):
        queue = build_queue(found, budget=budget, rest=rest, random_state=rep)
        first = _review(queue, tags, names, threshold)
        neyman_view = replace(first, slices=first.slices.assign(verdict="confirmed", more_needed=0))
        queues = {"first pass": queue, "fixed": queue.extend(extra),
                  "adaptive": queue.extend(extra, adaptive=first),
                  "Neyman only": queue.extend(extra, adaptive=neyman_view)}
        for rule, q in queues.items():
            result = first if rule == "first pass" else _review(q, tags, names, threshold)
            got = out[rule]
            got["reviews"].append(int(result.summary["n_reviewed"]))
            slices = result.slices.set_index("slice_id")
            decided = slices["verdict"] != "undecided"
            per_rep[rule].append(int(decided.sum()))
            got["decided"].append(int(decided.sum()))
            wrong = ((slices["verdict"] == "confirmed") & (slices.index.map(precision_truth) < threshold)) | \
                    ((slices["verdict"] == "rejected") & (slices.index.map(precision_truth) >= threshold))
            got["wrong"].append(int(wrong.sum()))
            for s, p in precision_truth.items():
                low, high = slices.at[s, "precision_low"], slices.at[s, "precision_high"]
                got["precision_hits"][s].append(low <= p <= high)
                got["precision_width"].append(high - low)
            cats = result.categories.set_index("category")
            for c, share in truth.items():
                if c in cats.index:
                    low, high = cats.at[c, "share_low"], cats.at[c, "share_high"]
                else:        # never tagged in this sample, so the tally has no line: same formula
                    design = result._design
                    _, low, high = stratified_interval(np.zeros(len(design.sizes)), design.n_reviewed,
                                                       design.sizes)
                got["share_hits"][c].append(low <= share <= high)
                got["share_width"].append(high - low)
    rows = []
    for rule in rules:
        got = out[rule]
        rows.append({"rule": rule, "reviews": float(np.mean(got["reviews"])),
                     "decided": float(np.mean(got["decided"])), "wrong": float(np.mean(got["wrong"])),
                     "share_coverage": float(np.mean(list(got["share_hits"].values()))),
                     "share_coverage_min": min(float(np.mean(h)) for h in got["share_hits"].values()),
                     "share_median_width": float(np.median(got["share_width"])),
                     "precision_coverage": float(np.mean(list(got["precision_hits"].values()))),
                     "precision_coverage_min": min(float(np.mean(h)) for h in got["precision_hits"].values()),
                     "precision_median_width": float(np.median(got["precision_width"]))})
    paired = np.array(per_rep["adaptive"]) - np.array(per_rep["fixed"])
    return pd.DataFrame(rows), paired, precision_truth, names


def main_adaptive(reps: int, extra: int):
    """Print the adaptive-extension tables for both worlds."""
    print(f"adaptive extension: first pass budget 60 (rest 10), then {extra} more by each rule; "
          f"{reps} repetitions (random_state = repetition), 95% intervals, threshold 0.5")
    for label, world in (("depot", depot_world()), ("wide depot", wide_world())):
        found = world[0]
        table, paired, truth, names = simulate_adaptive(reps, world, extra=extra)
        print(f"\n{label} world: {found.n_rows} rows, {found.n_errors} errors, {len(truth)} candidates; "
              "true precision " + ", ".join(f"{s} {names[s]} {p:.3f}" for s, p in truth.items()))
        print(table.to_string(index=False, float_format=lambda x: f"{x:.3f}"))
        print(f"adaptive vs fixed, candidates decided in the same repetition: more in "
              f"{int((paired > 0).sum())}, as many in {int((paired == 0).sum())}, fewer in "
              f"{int((paired < 0).sum())}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=200)
    parser.add_argument("--adaptive", action="store_true",
                        help="measure the adaptive queue extension instead")
    parser.add_argument("--extra", type=int, default=60, help="rows each rule adds (--adaptive)")
    args = parser.parse_args()
    start = time.perf_counter()
    if args.adaptive:
        main_adaptive(args.reps, args.extra)
        print(f"took {time.perf_counter() - start:.1f} s")
        return
    world = depot_world()
    found, tags = world
    print(f"depot world: {found.n_rows} rows, {found.n_errors} errors, {len(found.table)} slices")
    queue = build_queue(found, budget=100, rest=20, random_state=0)
    print(queue.strata[["stratum", "description", "n_errors", "n_queued"]].to_string(index=False))
    table = simulate(args.reps, world=world)
    pd.set_option("display.width", 140)
    print(f"\n{args.reps} repetitions, 95% intervals")
    print(table.to_string(index=False, float_format=lambda x: f"{x:.3f}"))
    columns = ["coverage", "coverage_mover", "coverage_score", "coverage_kish_wilson"]
    print("\nmean coverage per scenario")
    print(table.groupby("scenario", sort=False)[columns].mean().to_string(
        float_format=lambda x: f"{x:.3f}"))
    print("lowest coverage over scenarios and categories: " + ", ".join(
        f"{c.replace('coverage_', '').replace('coverage', 'slicefind')} {table[c].min():.3f}"
        for c in columns))
    print(f"took {time.perf_counter() - start:.1f} s")


if __name__ == "__main__":
    main()
