"""Small seeded scans for the queue, tally and workspace tests (parcel-depot scenarios)."""
import numpy as np
import pandas as pd
from hypothesis import strategies as st

from slicefind.discovery.find import FoundSlices, find_slices
from slicefind.discovery.table import build_eval_table


def make_found(errors, slices, *, frame=None, id_column="parcel", label=None, prediction=None):
    """A FoundSlices with hand-made slices: `slices` is [(slice_id, description, rows)] ranked.

    Errors come from `errors` (bool per row) unless label/prediction columns are named.
    """
    errors = np.asarray(errors, dtype=bool)
    n = errors.size
    if frame is None:
        frame = pd.DataFrame({"parcel": [f"P{i:05d}" for i in range(n)],
                              "scanner": np.where(np.arange(n) % 2 == 0, "S1", "S2")})
    if label is not None:
        table = build_eval_table(frame, label=label, prediction=prediction, id_column=id_column)
    else:
        table = build_eval_table(frame, errors=errors, id_column=id_column)
    wrong = np.zeros(len(frame), dtype=bool)
    wrong[table.positions] = table.errors
    records, rows = [], {}
    for sid, description, members in slices:
        members = np.unique(np.asarray(members, dtype=np.intp))
        rows[sid] = members
        records.append({"slice_id": sid, "source": "rule", "description": description,
                        "n_rows": int(members.size), "n_errors": int(wrong[members].sum())})
    table_df = pd.DataFrame(records, columns=["slice_id", "source", "description", "n_rows", "n_errors"])
    return FoundSlices(table=table_df, tested=table_df.copy(), eval_table=table, params={"fdr": 0.05},
                       _rows=rows)


def strata_found(sizes, n_rest, n_correct=100):
    """Errors laid out as consecutive blocks: slice R(j+1) holds block j (its errors only) plus
    some correct rows; `n_rest` errors belong to no slice. Exact stratum sizes for checks."""
    n_err = int(sum(sizes)) + int(n_rest)
    errors = np.concatenate([np.ones(n_err, dtype=bool), np.zeros(n_correct, dtype=bool)])
    slices, start = [], 0
    for j, size in enumerate(sizes):
        members = np.concatenate([np.arange(start, start + size), n_err + np.arange(j, n_correct, 7)])
        slices.append((f"R{j + 1}", f"scanner = S{j + 1}", members))
        start += size
    return make_found(errors, slices)


def depot_found(seed=3, n=3000, **kwargs):
    """A seeded depot dev set scanned by find_slices, with label/prediction digit columns."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "parcel": [f"P{i:05d}" for i in range(n)],
        "scanner": rng.choice(["S1", "S2", "S3"], n),
        "shift": rng.choice(["day", "night"], n),
        "label_stock": rng.choice(["matte", "gloss", "recycled"], n),
        "label_image": [f"crops/{i:05d}.png" for i in range(n)],
    })
    digit = rng.integers(0, 10, n)
    rate = np.where((frame["scanner"] == "S3") & (frame["shift"] == "night"), 0.45, 0.07)
    rate = np.where(frame["label_stock"] == "recycled", rate + 0.2, rate)
    wrong = rng.random(n) < rate
    frame["digit"] = digit
    frame["read_as"] = np.where(wrong, (digit + rng.integers(1, 10, n)) % 10, digit)
    found = find_slices(frame, label="digit", prediction="read_as", id_column="parcel",
                        exclude=("label_image",), **kwargs)
    return frame, found


@st.composite
def overlapping_slices(draw, max_rows=80, max_slices=5):
    """A FoundSlices with random, overlapping hand-made slices over random errors."""
    n = draw(st.integers(10, max_rows))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    errors = rng.random(n) < draw(st.floats(0.2, 0.8))
    errors[0], errors[-1] = True, False
    k = draw(st.integers(0, max_slices))
    slices = []
    for j in range(k):
        size = int(rng.integers(1, n))
        slices.append((f"R{j + 1}", f"shift = {j}", rng.choice(n, size, replace=False)))
    return make_found(errors, slices)
