"""Hypothesis strategies shared by the property tests."""
import numpy as np
import pandas as pd
from hypothesis import strategies as st


@st.composite
def small_tables(draw, max_rows=120, max_columns=4):
    """A small eval table: categorical (some with missing), numeric and bool columns plus errors."""
    n = draw(st.integers(30, max_rows))
    n_cols = draw(st.integers(1, max_columns))
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    data = {}
    for j in range(n_cols):
        kind = draw(st.sampled_from(["cat", "cat_missing", "num", "bool"]))
        if kind == "cat":
            levels = draw(st.integers(2, 5))
            data[f"c{j}"] = rng.choice([f"v{k}" for k in range(levels)], n)
        elif kind == "cat_missing":
            values = rng.choice(["a", "b", "c"], n).astype(object)
            values[rng.random(n) < 0.2] = None
            data[f"m{j}"] = values
        elif kind == "num":
            data[f"x{j}"] = np.round(rng.normal(size=n), 1)
        else:
            data[f"b{j}"] = rng.random(n) < 0.4
    frame = pd.DataFrame(data)
    errors = rng.random(n) < draw(st.floats(0.1, 0.5))
    if errors.all():
        errors[0] = False
    if not errors.any():
        errors[0] = True
    return frame, errors
