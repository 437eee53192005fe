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

Run:  python benchmarks/bench_coverage.py [--reps 200]
"""
from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from slicefind.queue import REST, build_queue
from slicefind.slices import find_slices
from slicefind.stats import (mover_sum_interval, score_sum_interval, stratified_interval,
                             stratified_proportion, wilson_interval_fpc, z_value)
from slicefind.tally import UNTAGGED, tally

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


def true_shares(tags) -> dict[str, float]:
    """Each category's share of all error rows, and the untagged share."""
    n = len(tags)
    shares = {c: sum(c in t for t in tags.values()) / n for c in CATEGORIES}
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


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=200)
    args = parser.parse_args()
    start = time.perf_counter()
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
