"""The loop from Python on a real table: the RAND Health Insurance Experiment sample.

    python demo/randhie_walkthrough.py [--out slicefind-randhie]

Data: ``statsmodels.datasets.randhie``, bundled with statsmodels (``pip install statsmodels``;
no download): 20,190 people of the RAND Health Insurance Experiment, as used by Cameron and
Trivedi (2005), *Microeconometrics: Methods and Applications*; statsmodels marks it public
domain and its ``SOURCE`` note gives the provenance (printed below). The task here is ours:
predict whether a person had any outpatient visit (``mdvis > 0``) from the other columns,
with scikit-learn's HistGradientBoostingClassifier scored out of fold (5-fold
``cross_val_predict``), as a dev set is scored.

The columns describe people (health, chronic diseases, insurance plan). A slice found here
is a lead for investigation, not proof of cause, and differences between groups of people
call for a fairness review of their own.

Step 4 has no person to review the queue, so it is SCRIPTED: each queued error is tagged
from two fields of its own record (whether the model missed a visit or predicted one that
did not happen, and whether the person rated their health fair or poor), standing in for
what a reviewer reading the record would note. With your data, a person tags the sheet.
"""
import argparse
import os

import numpy as np
import pandas as pd

import slicefind as sf
from slicefind.report import CAUTIONS


def scored_randhie() -> pd.DataFrame:
    """randhie with ``visit`` (any outpatient visit, 0/1) and the out-of-fold ``predicted``."""
    import statsmodels.api as sm
    from sklearn.ensemble import HistGradientBoostingClassifier
    from sklearn.model_selection import cross_val_predict

    data = sm.datasets.randhie.load_pandas().data
    visit = (data["mdvis"] > 0).astype(int)
    features = data.drop(columns=["mdvis"])
    predicted = cross_val_predict(HistGradientBoostingClassifier(random_state=0), features, visit, cv=5)
    return features.assign(visit=visit.to_numpy(), predicted=predicted)


def scripted_sheet(queue, frame: pd.DataFrame) -> pd.DataFrame:
    """SCRIPTED tags from each queued row's own record (no person reviewed these rows)."""
    rows = queue.table["row"].astype(int).to_numpy()
    record = frame.iloc[rows]
    kind = np.where(record["visit"].to_numpy() == 1, "missed a visit", "predicted a visit")
    health = np.where((record["hlthf"] + record["hlthp"]).to_numpy() > 0, ";fair or poor health", "")
    return pd.DataFrame({"row": rows, "reviewed": 1, "tags": [k + h for k, h in zip(kind, health)]})


def main(argv=None) -> int:
    import statsmodels.api as sm

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default="slicefind-randhie")
    args = parser.parse_args(argv)
    os.makedirs(args.out, exist_ok=True)
    print("data:", " ".join(sm.datasets.randhie.SOURCE.split()[:40]), "...")

    # 1. The dev set, scored out of fold.
    frame = scored_randhie()
    wrong = frame["visit"] != frame["predicted"]
    print(f"1. {len(frame):,} people, error rate {wrong.mean():.1%}")

    # 2. Candidate slices over the metadata (the label itself is mined too).
    found = sf.find_slices(frame, label="visit", prediction="predicted")
    print(f"2. {len(found.table)} slices pass FDR 0.05 of {len(found.tested):,} tested; the top five:")
    for row in found.table.head(5).itertuples():
        print(f"   {row.slice_id}: {row.description} ({row.n_rows:,} rows, {row.error_rate:.0%} errors, "
              f"lift {row.lift:.2f})")
    for caution in CAUTIONS[:2]:
        print("   caution:", caution)

    # 3. The review queue.
    queue = sf.build_queue(found, budget=100, rest=20, random_state=0)
    sheet = os.path.join(args.out, "queue.csv")
    queue.to_csv(sheet, overwrite=True)
    print(f"3. review sheet: {sheet}")

    # 4. SCRIPTED tags (see the module docstring), then 5. the tally.
    filled = os.path.join(args.out, "queue_tagged_SCRIPTED.csv")
    scripted_sheet(queue, frame).to_csv(filled, index=False)
    result = sf.tally(queue, filled)
    print("4-5. tally of the SCRIPTED tags:")
    print(result.categories[["category", "n_tagged", "share", "share_low", "share_high", "headroom"]]
          .to_string(index=False, float_format=lambda x: f"{x:.3f}"))
    print("   The counts of tagged rows mislead on their own: the queue takes a fixed number of rows\n"
          "   per stratum, so each stratum's tags are weighted by its share of all errors.")
    combined = result.combined(["missed a visit", "fair or poor health"])
    print(f"   missed a visit or fair/poor health: {combined.share:.1%} of errors "
          f"({combined.share_low:.1%}-{combined.share_high:.1%})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
