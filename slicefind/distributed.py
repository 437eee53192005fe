"""Mining a Dask DataFrame: the counting runs on the workers, everything else on the driver.

Three passes over the partitions, each the same code the in-memory engine runs:

1. *profile*: per partition, the error flags, each column's dtype, distinct values with
   their row and error counts, and a bounded random sample of rows (the rows with the
   smallest seeded random keys, so the sample does not depend on the partitioning);
2. *items*: the driver turns the summed counts into the same candidate items as
   `items.build_items` (categorical codes over the global sorted values; numeric cut
   points fitted on the sample, which is every row when the table has at most
   ``sample_rows`` rows; hour and weekday items); each partition packs the candidates'
   masks into bitsets that stay in the workers' memory, and returns counts and a hash
   per candidate, from which the driver keeps and de-duplicates items exactly as the
   in-memory builder does;
3. *search*: each level's candidate counts come from `bitset.count_extensions` run on
   every partition and summed; joining, pruning and scoring stay on the driver
   (`rules.search_levels`), so both engines give the same rules and counts.

Dask retries the tasks of a worker that dies, and every task here is a pure function
of its partition, so a lost worker does not change the result.
"""
from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
import pandas as pd

from slicefind import bitset
from slicefind.items import (CONDITIONAL_ITEMS, Item, ItemSet, _Builder, categorical_items,
                             code_mask, datetime_masks, numeric_cuts, numeric_masks,
                             numeric_values)
from slicefind.rules import search_levels
from slicefind.stats import fisher_greater
from slicefind.table import (CATEGORICAL, DATETIME, MAX_INT_LEVELS, NUMERIC, EvalTable,
                             SlicefindTypeError, SlicefindValueError, _suggest, column_kind)

__all__ = ["is_dask_frame", "DaskMined", "mine_dask", "SAMPLE_ROWS"]

#: rows gathered to the driver to fit numeric cut points (all rows when the table is smaller)
SAMPLE_ROWS = 200_000
#: distinct values a partition reports for a float column before it counts as "many"
_FLOAT_DISTINCT_CAP = 1_000


def is_dask_frame(data) -> bool:
    """True for a dask DataFrame (checked without importing dask)."""
    return type(data).__module__.split(".")[0] in ("dask", "dask_expr")


def _errors_of(part: pd.DataFrame, how: dict) -> np.ndarray:
    """The error flags of one partition, as `table.build_eval_table` derives them."""
    if how["kind"] == "label":
        label, pred = part[how["label"]], part[how["prediction"]]
        if label.isna().any() or pred.isna().any():
            which = how["label"] if label.isna().any() else how["prediction"]
            raise SlicefindValueError(f"column {which!r} has missing values in a partition; "
                                      "labels and predictions must be complete.")
        return (label.to_numpy() != pred.to_numpy()).astype(bool)
    if how["kind"] == "errors":
        flags = part[how["errors"]]
        bad = ~flags.isin([True, False, 0, 1])
        if bad.any():
            value = flags[bad].iloc[0]
            raise SlicefindValueError(f"errors column {how['errors']!r} must hold booleans or 0/1; "
                                      f"a partition holds {value!r}.")
        return flags.to_numpy().astype(bool)
    return pd.to_numeric(part[how["loss"]]).to_numpy(dtype=float) > how["threshold"]


def _profile(part: pd.DataFrame, index: int, how: dict, columns: Sequence[str], seed: int,
             sample_rows: int) -> dict:
    """Pass 1 on one partition: schema, errors, per-column distinct values, a sample."""
    schema = {c: str(part[c].dtype) for c in part.columns}
    needed = list(columns) + [v for k, v in how.items() if k in ("label", "prediction", "errors", "loss")]
    if any(c not in part.columns for c in needed):
        return {"index": index, "n": len(part), "schema": schema, "incomplete": True}
    errors = _errors_of(part, how)
    out: dict[str, Any] = {"index": index, "n": len(part), "schema": schema,
                           "n_errors": int(errors.sum()), "columns": {}}
    for column in columns:
        series = part[column]
        info: dict[str, Any] = {"dtype": series.dtype, "missing": int(series.isna().sum()),
                                "missing_errors": int((series.isna().to_numpy() & errors).sum())}
        if pd.api.types.is_float_dtype(series.dtype) and series.nunique() > _FLOAT_DISTINCT_CAP:
            info["many"] = True
        elif not pd.api.types.is_datetime64_any_dtype(series.dtype):
            codes, uniques = pd.factorize(series, sort=True, use_na_sentinel=True)
            info["uniques"] = uniques
            info["counts"] = np.bincount(codes[codes >= 0], minlength=len(uniques))
            info["error_counts"] = np.bincount(codes[(codes >= 0) & errors], minlength=len(uniques))
        else:
            info["uniques"] = pd.Index(series.dropna().unique())
        out["columns"][column] = info
    keys = np.random.default_rng([seed, index]).random(len(part))
    take = np.argsort(keys, kind="stable")[:sample_rows]
    sample = part.iloc[take][list(columns)].reset_index(drop=True)
    sample["__error__"] = errors[take]
    sample["__key__"] = keys[take]
    out["sample"] = sample
    return out


def _candidates_masks(part: pd.DataFrame, spec: list) -> list[np.ndarray]:
    """The masks of every candidate item of `spec`, in order, on one partition."""
    masks = []
    for column, kind, payload in spec:
        series = part[column]
        if kind == CATEGORICAL:
            uniques, selections = payload
            codes = pd.Categorical(series, categories=uniques).codes if len(uniques) else \
                np.full(len(series), -1)
            masks += [code_mask(np.asarray(codes), sel) for sel in selections]
        elif kind == NUMERIC:
            masks += [mask for _, mask in numeric_masks(column, numeric_values(series), payload)]
        else:
            masks += [mask for _, mask in datetime_masks(column, series)]
    return masks


def _item_bits(part: pd.DataFrame, how: dict, spec: list) -> dict:
    """Pass 2 on one partition: candidates packed over all rows and over error rows."""
    errors = _errors_of(part, how)
    masks = _candidates_masks(part, spec)
    n_words, e_words = bitset.n_words(len(part)), bitset.n_words(int(errors.sum()))
    bits = np.zeros((len(masks), n_words), dtype=np.uint64)
    error_bits = np.zeros((len(masks), e_words), dtype=np.uint64)
    for i, mask in enumerate(masks):
        if len(part):
            bits[i] = bitset.pack(mask)[0]
            error_bits[i] = bitset.pack(mask[errors])[0]
    return {"bits": bits, "error_bits": error_bits, "n": len(part), "errors": errors}


def _item_summary(packed: dict) -> dict:
    """Counts and a hash of each candidate's rows (equal hashes everywhere = equal rows)."""
    bits = packed["bits"]
    return {"n_rows": bitset.popcount(bits) if len(bits) else np.zeros(0, np.int64),
            "n_errors": bitset.popcount(packed["error_bits"]) if len(bits) else np.zeros(0, np.int64),
            "hash": [hashlib.blake2b(row.tobytes(), digest_size=8).hexdigest() for row in bits]}


def _select_bits(packed: dict, keep: np.ndarray) -> dict:
    """The kept items' bitsets of one partition (what the search counts)."""
    return {"bits": np.ascontiguousarray(packed["bits"][keep]),
            "error_bits": np.ascontiguousarray(packed["error_bits"][keep]),
            "n": packed["n"], "errors": packed["errors"]}


def _count(part_bits: dict, which: str, prefixes, offsets, extensions) -> np.ndarray:
    """One partition's share of a level's counts."""
    bits = part_bits["error_bits" if which == "errors" else "bits"]
    if bits.shape[1] == 0:
        return np.zeros(len(extensions), dtype=np.int64)
    return bitset.count_extensions(bits, prefixes, offsets, extensions)


def _rule_mask(part_bits: dict, terms: np.ndarray) -> np.ndarray:
    """One partition's rows of a rule, as booleans."""
    bits = part_bits["bits"][terms[0]].copy()
    for t in terms[1:]:
        bits &= part_bits["bits"][t]
    return bitset.unpack(bits, part_bits["n"])[0] if part_bits["n"] else np.zeros(0, dtype=bool)


def _gather_column(part: pd.DataFrame, column: str) -> np.ndarray:
    return part[column].to_numpy()


@dataclass(frozen=True, repr=False)
class DaskMined:
    """What the Dask engine hands back to `find_slices`: the same pieces as in memory."""

    table: EvalTable
    items: ItemSet
    counts: Any
    client: Any
    part_bits: list
    n_partitions: int

    def rule_bitset(self, terms: np.ndarray) -> np.ndarray:
        """The packed rows of a rule over all rows (gathered from every partition)."""
        masks = self.client.gather(self.client.map(_rule_mask, self.part_bits,
                                                   [np.asarray(terms)] * len(self.part_bits),
                                                   pure=False))
        return bitset.pack(np.concatenate(masks))[0]


def _default_client():
    """The current distributed client, or a new local cluster of 2 worker processes."""
    from distributed import Client, LocalCluster, get_client

    try:
        return get_client()
    except ValueError:
        cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                               dashboard_address=None)
        return Client(cluster)


def _check_schema(profiles: list, columns: Sequence[str]) -> None:
    """Every partition has every column, with one dtype per column; else a clear error."""
    first = profiles[0]["schema"]
    for prof in profiles:
        for column in columns:
            if column not in prof["schema"]:
                msg = (f"partition {prof['index']} has no column {column!r} (partition 0 has it); "
                       "every partition must hold the same columns.")
                raise SlicefindValueError(msg)
            if prof["schema"][column] != first.get(column):
                msg = (f"column {column!r} is {prof['schema'][column]} in partition {prof['index']} "
                       f"but {first.get(column)} in partition 0; cast it to one type.")
                raise SlicefindValueError(msg)


def _merge_uniques(infos: list):
    """Global sorted distinct values (factorize order) and their summed counts."""
    pieces = [info["uniques"] for info in infos if len(info["uniques"])]
    if not pieces:
        return pd.Index([]), np.zeros(0, np.int64), np.zeros(0, np.int64)
    joined = pd.Series(np.concatenate([np.asarray(p, dtype=object) for p in pieces]), dtype=object)
    dtype = infos[0]["dtype"]
    try:
        joined = joined.astype(dtype)
    except (TypeError, ValueError):
        pass
    _, uniques = pd.factorize(joined, sort=True, use_na_sentinel=True)
    counts = np.zeros(len(uniques), np.int64)
    error_counts = np.zeros(len(uniques), np.int64)
    for info in infos:
        if "counts" in info and len(info["uniques"]):
            where = pd.Index(uniques).get_indexer(pd.Index(info["uniques"]))
            np.add.at(counts, where, info["counts"])
            np.add.at(error_counts, where, info["error_counts"])
    return uniques, counts, error_counts


def mine_dask(data, *, label=None, prediction=None, errors=None, loss=None, threshold=None,
              exclude: Sequence[str] = (), id_column: str | None = None, client=None,
              min_rows_for, min_errors_for, n_bins: int = 4, tree_depth: int = 2,
              max_terms: int = 3, random_state=0, sample_rows: int = SAMPLE_ROWS) -> DaskMined:
    """Run the item and rule passes on a dask DataFrame; see the module docstring.

    `min_rows_for(n)` and `min_errors_for(n, n_errors, min_rows)` give the thresholds
    once the table's size is known (the same defaults as in memory).
    """
    columns = list(data.columns)
    ways = [w for w, v in (("label/prediction", label), ("errors", errors), ("loss", loss)) if v is not None]
    if len(ways) != 1:
        raise SlicefindValueError("say which rows are errors in exactly one way: label= and prediction=, "
                                  f"or errors=, or loss= with threshold=; got {ways or 'none'}.")
    for name, value in (("label", label), ("prediction", prediction), ("errors", errors), ("loss", loss),
                        ("id_column", id_column)):
        if value is None:
            continue
        if not isinstance(value, str):
            raise SlicefindTypeError(f"with a Dask DataFrame, {name}= must be a column name; got "
                                     f"{type(value).__name__}.")
        if value not in columns:
            raise SlicefindValueError(f"{name}={value!r} is not a column of data.{_suggest(value, columns)}")
    for column in exclude:
        if column not in columns:
            raise SlicefindValueError(f"exclude names {column!r}, which is not a column of data."
                                      f"{_suggest(column, columns)}")
    if label is not None:
        if prediction is None:
            raise SlicefindValueError("prediction= is required when label= is given.")
        how = {"kind": "label", "label": label, "prediction": prediction}
        used = {"label": label, "prediction": prediction}
    elif errors is not None:
        how, used = {"kind": "errors", "errors": errors}, {"errors": errors}
    else:
        if threshold is None:
            raise SlicefindValueError("loss= needs threshold=: a row is an error when its loss is above it.")
        how, used = {"kind": "loss", "loss": loss, "threshold": float(threshold)}, {"loss": loss}
    client = client or _default_client()
    seed = int(np.random.default_rng(random_state).integers(2**31))
    not_mined = set(exclude) | set(used.values()) | ({id_column} if id_column else set())
    candidates = [c for c in columns if c not in not_mined]

    parts = client.compute(data.to_delayed())
    profiles = client.gather(client.map(_profile, parts, range(len(parts)), [how] * len(parts),
                                        [candidates] * len(parts), [seed] * len(parts),
                                        [sample_rows] * len(parts), pure=False))
    _check_schema(profiles, columns)     # before anything reads a partition's columns
    n = int(sum(p["n"] for p in profiles))
    k_total = int(sum(p["n_errors"] for p in profiles))
    if n == 0:
        raise SlicefindValueError("data is empty (0 rows); slicefind needs a dev set with rows.")
    if k_total == 0 or k_total == n:
        what = "no row is an error" if k_total == 0 else f"every one of the {n:,} rows analysed is an error"
        raise SlicefindValueError(f"{what}; check label=/prediction= or the error definition.")
    min_rows = min_rows_for(n)
    min_errors = min_errors_for(n, k_total, min_rows)
    sample = pd.concat([p["sample"] for p in profiles], ignore_index=True)
    sample = sample.sort_values("__key__", kind="stable").head(sample_rows).reset_index(drop=True)

    # column kinds and candidate items, as build_eval_table and build_items decide them
    kinds, skipped, merged = {}, {}, {}
    for column in columns:
        if column in not_mined:
            skipped[column] = ("excluded" if column in exclude else "id column" if column == id_column
                               else f"{next(r for r, c in used.items() if c == column)} column")
            continue
        infos = [p["columns"][column] for p in profiles]
        dtype = infos[0]["dtype"]
        has_missing = sum(i["missing"] for i in infos) > 0
        if any(i.get("many") for i in infos):
            kind, reason = NUMERIC, ""
        else:
            uniques, counts, error_counts = _merge_uniques(infos)
            merged[column] = (uniques, counts, error_counts)
            integral = True
            if pd.api.types.is_float_dtype(dtype) and len(uniques) <= MAX_INT_LEVELS:
                values = np.asarray(uniques, dtype=float)
                integral = bool(np.all(values == np.round(values)))
            kind, reason = column_kind(dtype, len(uniques), has_missing, integral)
        if kind is None:
            skipped[column] = reason
        else:
            kinds[column] = kind
    mined = tuple(kinds)
    sample_errors = sample["__error__"].to_numpy(dtype=bool)
    scale = len(sample) / n

    spec, cand_items, cand_cols = [], [], []
    selection_of = {}        # id(item) -> the one-item spec that selects its rows
    first_pass = [c for c in mined if kinds[c] != NUMERIC]
    for column in first_pass:                 # categories and dates first, as in memory
        if kinds[column] == CATEGORICAL:
            uniques, counts, _ = merged[column]
            listed = categorical_items(column, uniques, counts, min_rows)
            spec.append((column, CATEGORICAL, (uniques, [sel for _, sel in listed])))
            cand_items += [item for item, _ in listed]
            selection_of.update({id(item): (column, CATEGORICAL, (uniques, [sel]))
                                 for item, sel in listed})
        else:
            listed = [item for item, _ in datetime_masks(column, pd.Series(pd.to_datetime([]), dtype="datetime64[ns]"))]
            spec.append((column, DATETIME, None))
            cand_items += listed
        cand_cols += [mined.index(column)] * (len(cand_items) - len(cand_cols))
    packed = client.map(_item_bits, parts, [how] * len(parts), [spec] * len(parts), pure=False)
    summaries = client.gather(client.map(_item_summary, packed, pure=False))
    builder = _Builder(np.zeros(0, dtype=bool), min_rows, min_errors)
    _add_counted(builder, cand_items, cand_cols, summaries, n, offset=0)

    # numeric cut points from the sample, also inside the worst categorical items' rows
    within = []
    if tree_depth > 0 and builder.items:
        rows = np.asarray(builder.n_rows)
        errs = np.asarray(builder.n_errors)
        excess = errs - rows * k_total / n
        p = np.atleast_1d(fisher_greater(errs, rows, k_total, n))
        ranked = [i for i in np.argsort(-excess, kind="stable") if p[i] < 1e-3 and excess[i] > 0]
        for i in ranked[:CONDITIONAL_ITEMS]:
            one = selection_of.get(id(builder.items[i]))
            if one is not None:              # (the in-memory engine ranks dates too; see below)
                within.append(_candidates_masks(sample, [one])[0])
            else:
                within.append(_candidates_masks(sample, [(builder.items[i].column, DATETIME, None)])[
                    _datetime_position(builder.items[i])])
    numeric_spec = []
    numeric_items, numeric_cols = [], []
    sample_min_rows = max(1, int(round(min_rows * scale)))
    for column in (c for c in mined if kinds[c] == NUMERIC):
        x = numeric_values(sample[column])
        cuts = numeric_cuts(x, sample_errors, min_rows=sample_min_rows, n_bins=n_bins,
                            depth=tree_depth, within=within)
        numeric_spec.append((column, NUMERIC, cuts))
        listed = [item for item, _ in numeric_masks(column, np.zeros(0), cuts)]
        numeric_items += listed
        numeric_cols += [mined.index(column)] * len(listed)
    if numeric_spec:
        packed_num = client.map(_item_bits, parts, [how] * len(parts), [numeric_spec] * len(parts),
                                pure=False)
        sums_num = client.gather(client.map(_item_summary, packed_num, pure=False))
        _add_counted(builder, numeric_items, numeric_cols, sums_num, n, offset=len(cand_items))
        packed = client.map(_stack_packed, packed, packed_num, pure=False)
    order = np.argsort(np.asarray(builder.cols, dtype=np.int64), kind="stable")
    builder.reorder(order)
    keep = np.array([payload for _, payload in builder.bits], dtype=np.int64)
    part_bits = client.map(_select_bits, packed, [keep] * len(parts), pure=False)

    items = ItemSet(items=tuple(builder.items), column_of=np.asarray(builder.cols, dtype=np.int64),
                    columns=mined, bits=None, error_bits=None,
                    n_rows=np.asarray(builder.n_rows, dtype=np.int64),
                    n_errors=np.asarray(builder.n_errors, dtype=np.int64))

    def counter(which):
        def count(prefixes, offsets, extensions):
            futures = [client.submit(_count, bits, which, prefixes, offsets, extensions, pure=False)
                       for bits in part_bits]
            return np.sum(client.gather(futures), axis=0).astype(np.int64)
        return count

    counts = search_levels(items.n_rows, items.n_errors, items.column_of, max_terms=max_terms,
                           min_rows=min_rows, min_errors=min_errors, count_errors=counter("errors"),
                           count_rows=counter("rows"))
    error_flags = np.concatenate(client.gather(client.map(lambda b: b["errors"], part_bits, pure=False)))
    gathered = {}
    for role, column in (("label", label), ("prediction", prediction), ("id", id_column)):
        if column is not None:
            gathered[role] = np.concatenate(client.gather(client.map(
                _gather_column, parts, [column] * len(parts), pure=False)))
    frame = pd.DataFrame({id_column: gathered["id"]}) if id_column else pd.DataFrame(index=range(n))
    definition = {"label": "label != prediction", "errors": f"{errors} is true",
                  "loss": f"{loss} > {threshold!r}"}[how["kind"]]
    table = EvalTable(data=frame, errors=error_flags, positions=np.arange(n, dtype=np.intp),
                      n_input_rows=n, kinds=kinds, skipped=skipped, label=gathered.get("label"),
                      prediction=gathered.get("prediction"), embeddings=None, id_column=id_column,
                      error_definition=definition, columns_used=used)
    return DaskMined(table=table, items=items, counts=counts, client=client, part_bits=part_bits,
                     n_partitions=len(parts))


def _stack_packed(first: dict, second: dict) -> dict:
    """Candidates of both passes of one partition, in candidate order."""
    return {"bits": np.concatenate([first["bits"], second["bits"]]),
            "error_bits": np.concatenate([first["error_bits"], second["error_bits"]]),
            "n": first["n"], "errors": first["errors"]}


def _datetime_position(item: Item) -> int:
    """Index of a date item among `datetime_masks`' candidates (24 hours, 7 days, missing)."""
    if item.op == "hour":
        return int(item.value)
    if item.op == "weekday":
        return 24 + int(item.value)
    return 31


def _add_counted(builder: _Builder, items: list, cols: list, summaries: list, n: int, offset: int):
    """Offer every candidate to the builder with counts and hashes summed over partitions."""
    n_rows = np.sum([s["n_rows"] for s in summaries], axis=0) if summaries else np.zeros(len(items))
    n_errors = np.sum([s["n_errors"] for s in summaries], axis=0) if summaries else np.zeros(len(items))
    for i, (item, col) in enumerate(zip(items, cols)):
        signature = tuple(s["hash"][i] for s in summaries)
        builder.add_counted(item, col, int(n_rows[i]), int(n_errors[i]), n, signature, offset + i)
