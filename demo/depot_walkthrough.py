"""The whole loop from Python on the built-in parcel-depot demo: a walk-through to read and run.

    python demo/depot_walkthrough.py [--rows 6000] [--seed 0] [--out slicefind-walkthrough]

A parcel depot reads the handwritten digit on each parcel's label. The dev set comes from
`slicefind.demodata.make_depot` (the same generator `slicefind demo` uses): scikit-learn's
bundled digits, augmented, with three degradations planted on purpose, one of them recorded
in no column. The steps below are the ones a user runs on their own dev set; only step 4,
the review, is SIMULATED here (tags drawn from the planted ground truth, which real data
never gives).
"""
import argparse
import os

import slicefind as sf
from slicefind.demodata import make_depot, simulated_reviews


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=6000)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", default="slicefind-walkthrough")
    args = parser.parse_args(argv)
    os.makedirs(args.out, exist_ok=True)

    # 1. The dev set: one row per parcel, the true digit, the model's reading, its embedding.
    depot = make_depot(args.rows, random_state=args.seed)
    print(f"1. dev set: {len(depot.frame):,} parcels, error rate {depot.error_rate:.1%}")

    # 2. Candidate slices: metadata rules and embedding clusters, tested against chance.
    found = sf.find_slices(depot.frame, label="label", prediction="pred", embeddings=depot.embeddings,
                           id_column="parcel_id", random_state=args.seed)
    print(f"2. {len(found.table)} slices pass FDR 0.05 of {len(found.tested):,} tested; the top three:")
    for row in found.table.head(3).itertuples():
        print(f"   {row.slice_id}: {row.description[:70]} ({row.n_rows} rows, {row.error_rate:.0%} errors)")

    # 3. A review queue: 100 errors, stratified by slice, 20 of them from no slice.
    queue = sf.build_queue(found, budget=100, rest=20, random_state=args.seed)
    sheet_path = os.path.join(args.out, "queue.csv")
    queue.to_csv(sheet_path, overwrite=True)
    print(f"3. review sheet: {sheet_path} ({len(queue.table)} rows; fill reviewed, tags, note)")

    # 4. SIMULATED review (a person fills the sheet, or uses `slicefind review`).
    filled = os.path.join(args.out, "queue_reviewed_SIMULATED.csv")
    simulated_reviews(queue, depot.planted).to_csv(filled, index=False)
    print(f"4. SIMULATED reviewer filled {filled}")

    # 5. The tally: each category's share of all errors, verdicts on the slices, headroom.
    result = sf.tally(queue, filled)
    print("5. tally (from the SIMULATED reviews):")
    print(result.categories[["category", "n_tagged", "share", "share_low", "share_high", "headroom"]]
          .to_string(index=False, float_format=lambda x: f"{x:.3f}"))
    for paragraph in sf.decision_paragraphs(result):
        print("   " + paragraph)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
