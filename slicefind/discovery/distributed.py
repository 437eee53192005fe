"""Mining a Dask DataFrame: the counting runs on the workers, everything else on the driver.

Passes over the partitions, each the same code the in-memory engine runs. The partitions
are read spread evenly over the workers' threads, and every later task of a partition
runs where the partition is:

0. *rows* (only with ``error_kind=`` or ``true_class=``): the label values of each
   partition, from which the driver infers and checks ``positive`` as in memory; a task
   per partition then keeps the rows that kind of error is possible on (the negatives
   for false positives, the positives for false negatives, the rows of ``true_class``),
   and every later task reads those kept rows;
1. *profile*: per partition, the error flags, each column's dtype and distinct values
   with their row and error counts; the error flags and each column's codes (over the
   partition's own values: a categorical column's codes as they are, other columns
   factorized once) stay on the worker for pass 2;
2. *items*: the driver turns the summed counts into the same candidate items as
   `items.build_items` (categorical codes over the global sorted values, leaving out
   those whose counts already rule them out; hour and weekday items); each partition
   packs the candidates' masks into bitsets that stay in the workers' memory and
   returns their counts. The driver keeps and de-duplicates items exactly as the
   in-memory builder does; only candidates of one column with equal counts need their
   rows compared, by a hash computed on the workers. When a numeric column is mined,
   a *sample* pass first gathers a simple random sample of rows to fit the cut points
   on (every row gets a random key seeded by ``random_state`` and its partition's
   number; the ``sample_rows`` smallest keys of the whole table win, every row when it
   has no more), holding only the numeric columns and the columns of the worst
   categorical items;
3. *search*: each worker's partitions form one block; each level's candidate counts
   come from `bitset.count_extensions` run on every block and summed; joining, pruning
   and scoring stay on the driver (`rules.search_levels`), so both engines give the
   same rules and counts.

Dask retries the tasks of a worker that dies, and every task here is a pure function
of its partition (or of the results of earlier tasks on that partition), so a lost
worker does not change the result. The seconds each phase took are logged at DEBUG
level on the ``slicefind.discovery.distributed`` logger (and kept in `DaskMined.seconds`).
"""
from __future__ import annotations

import hashlib
import logging
import os
import sys
import time
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np
import pandas as pd

from slicefind.discovery import bitset
from slicefind.compiled import numba_kernels
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError, did_you_mean
from slicefind.discovery.hierarchy import subtree_sums
from slicefind.discovery.items import (CONDITIONAL_ITEMS, Item, ItemBuilder, ItemSet,
                                       categorical_items, code_mask, datetime_masks, numeric_cuts,
                                       numeric_masks, numeric_values)
from slicefind.discovery.placing import Placed, row_hashes
from slicefind.discovery.rules import search_levels
from slicefind.stats import fisher_greater
from slicefind.discovery.table import (CATEGORICAL, DATETIME, ERROR_KINDS, EvalTable,
                                       MAX_INT_LEVELS, NUMERIC, check_hashable, column_kind,
                                       embedding_columns, labels_equal, mined_roles,
                                       nonfinite_message, nonfinite_rows, positive_class,
                                       vectors_of)

__all__ = ["is_dask_frame", "DaskMined", "DaskRows", "mine_dask", "SAMPLE_ROWS"]

#: rows gathered to the driver to fit numeric cut points (all rows when the table is smaller)
SAMPLE_ROWS = 200_000
#: distinct values a partition reports for a float column before it counts as "many"
_FLOAT_DISTINCT_CAP = 1_000

_log = logging.getLogger(__name__)


def is_dask_frame(data) -> bool:
    """True for a dask DataFrame (checked without importing dask)."""
    return type(data).__module__.split(".")[0] in ("dask", "dask_expr")


# ---------------------------------------------------------------------------------------
# partition tasks (pure functions of a partition and of earlier results on it)

def _check_complete(part: pd.DataFrame, how: dict, index: int) -> None:
    """Labels and predictions of partition `index` have no missing values (as in memory)."""
    for column in (how["label"], how["prediction"]):
        missing = part[column].isna().to_numpy()
        if missing.any():
            msg = (f"column {column!r} has {int(missing.sum())} missing values (NaN/None) in "
                   f"partition {index}, first at its row {int(np.flatnonzero(missing)[0])}; drop "
                   "those rows or fill them before calling.")
            raise SlicefindValueError(msg)


def _errors_of(part: pd.DataFrame, how: dict, index: int) -> np.ndarray:
    """The error flags of partition `index`, as `table.build_eval_table` derives them."""
    if how["kind"] == "label":
        _check_complete(part, how, index)
        return ~labels_equal(part[how["label"]].to_numpy(), part[how["prediction"]].to_numpy())
    if how["kind"] == "errors":
        flags = part[how["errors"]]
        if flags.dtype == bool:
            return flags.to_numpy(dtype=bool)
        bad = ~flags.isin([True, False, 0, 1])
        if bad.any():
            value = flags[bad].iloc[0]
            raise SlicefindValueError(f"errors column {how['errors']!r} must hold booleans or 0/1; "
                                      f"a partition holds {value!r}.")
        return flags.to_numpy().astype(bool)
    try:
        loss = pd.to_numeric(part[how["loss"]]).to_numpy(dtype=float)
    except (TypeError, ValueError):
        raise SlicefindTypeError(f"loss column {how['loss']!r} must be numeric; a partition holds "
                                 f"values such as {part[how['loss']].iloc[0]!r}.") from None
    if not np.all(np.isfinite(loss)):
        value = loss[~np.isfinite(loss)][0]
        raise SlicefindValueError(f"loss column {how['loss']!r} has a non-finite value {value!r} in a "
                                  "partition; losses must be finite numbers.")
    return loss > how["threshold"]


def _has_columns(part: pd.DataFrame, columns: Sequence[str], how: dict) -> bool:
    """Whether the partition holds every column read (the schema check names what is not)."""
    used = [v for k, v in how.items() if k in ("label", "prediction", "errors", "loss")]
    return all(c in part.columns for c in list(columns) + used)


def _label_classes(part: pd.DataFrame, index: int, how: dict, columns: Sequence[str]) -> dict:
    """Pass 0 on one partition: schema, the label values present, the rows of true_class."""
    out: dict[str, Any] = {"index": index, "n": len(part),
                           "schema": {c: str(part[c].dtype) for c in part.columns}}
    if not _has_columns(part, columns, how):
        out["incomplete"] = True
        return out
    _check_complete(part, how, index)      # over every row, before any is left out
    label = part[how["label"]].to_numpy()
    out["classes"] = pd.unique(pd.Series(label, dtype=object))
    if how["true_class"] is not None:
        out["n_true_class"] = int(labels_equal(label, np.full(len(label), how["true_class"], dtype=object)).sum())
    return out


def _keep_mask(part: pd.DataFrame, how: dict) -> np.ndarray:
    """The rows of one partition that error_kind=/true_class= analyse (as build_eval_table keeps them)."""
    label = part[how["label"]].to_numpy()
    keep = np.ones(len(part), dtype=bool)
    if how["error_kind"] != "all":
        is_pos = labels_equal(label, np.full(len(label), how["positive"], dtype=object))
        keep &= ~is_pos if how["error_kind"] == "false_positive" else is_pos
    if how["true_class"] is not None:
        keep &= labels_equal(label, np.full(len(label), how["true_class"], dtype=object))
    return keep


def _kept(part: pd.DataFrame, how: dict) -> dict:
    """The kept rows of one partition, packed, and its number of rows."""
    return {"n": len(part), "keep": bitset.pack(_keep_mask(part, how))[0]}


def _analysed(part: pd.DataFrame, kept: dict) -> pd.DataFrame:
    """The kept rows of one partition (every later task reads these)."""
    return part.iloc[np.flatnonzero(bitset.unpack(kept["keep"], kept["n"])[0])]


class _Buffers:
    """Two reusable boolean row buffers of one partition.

    A Dask nanny starts its workers with ``MALLOC_TRIM_THRESHOLD_=65536``, which makes
    every large temporary a fresh mapping of zeroed pages. With it, packing the item
    masks of a 1M-row partition (146 candidates) took 0.13-0.55 s when each mask was a
    new array and 0.06 s written into these two buffers.
    """

    def __init__(self, n: int):
        self.n = n
        self._held: dict[str, np.ndarray] = {}

    def _buffer(self, slot: str, n: int) -> np.ndarray:
        if n != self.n:                    # (error rows: small, allocated as needed)
            return np.empty(n, dtype=bool)
        if slot not in self._held:
            self._held[slot] = np.empty(n, dtype=bool)
        return self._held[slot]

    def mask(self, n: int) -> np.ndarray:
        return self._buffer("mask", n)

    def other(self, n: int) -> np.ndarray:
        return self._buffer("other", n)


#: columns with at most this many values are counted and masked value by value (no temporaries)
_FEW_VALUES = 32


def _code_counts(codes: np.ndarray, n_values: int, buffers: _Buffers) -> np.ndarray:
    """Rows per code, missing (-1) first: ``counts[0]`` missing, ``counts[k + 1]`` code k."""
    if n_values > _FEW_VALUES:
        return np.bincount(codes.astype(np.intp) + 1, minlength=n_values + 1)
    out = np.empty(n_values + 1, dtype=np.int64)
    buf = buffers.mask(codes.size)
    for k in range(-1, n_values):
        out[k + 1] = np.count_nonzero(np.equal(codes, k, out=buf))
    return out


def _select_into(codes: np.ndarray, selected: tuple[int, ...], buffers: _Buffers) -> np.ndarray:
    """The rows whose code is in `selected`, written into a reused buffer (valid until the next call)."""
    out = buffers.mask(codes.size)
    if not selected:
        out[:] = False
    elif len(selected) > _FEW_VALUES:
        out[:] = np.isin(codes, selected)
    else:
        np.equal(codes, selected[0], out=out)
        other = buffers.other(codes.size)
        for k in selected[1:]:
            np.bitwise_or(out, np.equal(codes, k, out=other), out=out)
    return out


def _pack_into(row: np.ndarray, mask: np.ndarray) -> int:
    """Pack `mask` into the zeroed uint64 bitset `row` (the layout of `bitset.pack`);
    returns its number of rows."""
    if sys.byteorder == "little":
        packed = np.packbits(mask, bitorder="little")
        row.view(np.uint8)[:packed.size] = packed
    else:
        row[:] = bitset.pack(mask)[0]
    return int(np.count_nonzero(mask))


def _small_codes(codes: np.ndarray, n_values: int) -> np.ndarray:
    """Codes (-1 for missing) in the narrowest signed integer type that holds them."""
    for dtype in (np.int8, np.int16, np.int32):
        if n_values < np.iinfo(dtype).max:
            return codes.astype(dtype, copy=False)
    return codes


def _profile(part: pd.DataFrame, index: int, how: dict, columns: Sequence[str]) -> dict:
    """Pass 1 on one partition: schema, errors, per-column distinct values and counts.

    ``summary`` goes to the driver; ``errors`` and ``codes`` (column -> codes and the
    values they index) stay on the worker for the item pass.
    """
    schema = {c: str(part[c].dtype) for c in part.columns}
    if not _has_columns(part, columns, how):
        return {"summary": {"index": index, "n": len(part), "schema": schema, "incomplete": True}}
    errors = _errors_of(part, how, index)
    infos: dict[str, Any] = {}
    codes_of: dict[str, tuple] = {}
    buffers = _Buffers(len(part))
    for column in columns:
        series = part[column]
        dtype = series.dtype
        info: dict[str, Any] = {"dtype": dtype}
        if isinstance(dtype, pd.CategoricalDtype):
            # codes over the partition's categories, as they are: no re-encoding
            codes = np.asarray(series.cat.codes)
            n_cat = len(dtype.categories)
            counts = _code_counts(codes, n_cat, buffers)
            error_counts = _code_counts(codes[errors], n_cat, buffers)
            info.update(categories=dtype.categories, counts=counts[1:], error_counts=error_counts[1:],
                        missing=int(counts[0]), missing_errors=int(error_counts[0]))
            codes_of[column] = (codes, dtype.categories)
        else:
            check_hashable(part, column, where=f" of partition {index}")
            missing = series.isna().to_numpy()
            info.update(missing=int(missing.sum()), missing_errors=int((missing & errors).sum()))
            if pd.api.types.is_float_dtype(dtype) and series.nunique() > _FLOAT_DISTINCT_CAP:
                info["many"] = True
            elif not pd.api.types.is_datetime64_any_dtype(dtype):
                codes, uniques = pd.factorize(series, sort=True, use_na_sentinel=True)
                info["uniques"] = uniques
                info["counts"] = np.bincount(codes[codes >= 0], minlength=len(uniques))
                info["error_counts"] = np.bincount(codes[(codes >= 0) & errors], minlength=len(uniques))
                codes_of[column] = (_small_codes(codes, len(uniques)), uniques)
            else:               # whether there are 0, 1 or more values is all that is read
                info["uniques"] = pd.Index(series.dropna().unique()[:2])
        infos[column] = info
    summary = {"index": index, "n": len(part), "schema": schema, "n_errors": int(errors.sum()),
               "columns": infos}
    return {"summary": summary, "errors": errors, "codes": codes_of}


def _summary(profiled: dict) -> dict:
    """What the driver gathers of a profile."""
    return profiled["summary"]


def _smallest(keys: np.ndarray, k: int) -> np.ndarray:
    """Positions of the `k` smallest keys in key order, ties by position: the first `k` of a
    stable argsort, found by partitioning instead of sorting every key."""
    if k >= keys.size:
        return np.argsort(keys, kind="stable")
    kth = np.partition(keys, k - 1)[k - 1]
    below = np.flatnonzero(keys < kth)
    take = np.concatenate([below, np.flatnonzero(keys == kth)[:k - below.size]])
    return take[np.lexsort((take, keys[take]))]


def _sample(part: pd.DataFrame, profiled: dict, index: int, columns: Sequence[str], seed: int,
            sample_rows: int) -> pd.DataFrame:
    """Sample pass on one partition: the rows with the `sample_rows` smallest seeded keys
    (all rows when fewer), only `columns`, with their error flag and key."""
    keys = np.random.default_rng([seed, index]).random(len(part))
    take = _smallest(keys, sample_rows)
    sample = part[list(columns)].iloc[take].reset_index(drop=True)
    sample["__error__"] = profiled["errors"][take]
    sample["__key__"] = keys[take]
    return sample


def _value_masks(frame: pd.DataFrame, spec: list) -> list[np.ndarray]:
    """The masks of every candidate item of `spec`, in order, computed from a frame's values."""
    masks = []
    for column, kind, payload in spec:
        series = frame[column]
        if kind == CATEGORICAL:
            uniques, selections = payload
            codes = np.asarray(pd.Categorical(series, categories=uniques).codes) if len(uniques) else \
                np.full(len(series), -1)
            masks += [code_mask(codes, sel) for sel in selections]
        elif kind == NUMERIC:
            masks += [mask for _, mask in numeric_masks(column, numeric_values(series), payload)]
        else:
            masks += [mask for _, mask in datetime_masks(column, series)]
    return masks


def _local_selection(lut: np.ndarray, selected: tuple[int, ...]) -> tuple[int, ...]:
    """The partition's codes of the global codes `selected` (`lut`: local code -> global)."""
    if selected == (-1,):
        return selected
    return tuple(np.flatnonzero(np.isin(lut, selected)).tolist())


def _item_bits(part: pd.DataFrame, profiled: dict, spec: list) -> dict:
    """Pass 2 on one partition: candidates packed over all rows and over error rows."""
    errors = profiled["errors"]
    n, n_err = len(part), int(errors.sum())
    n_candidates = sum(len(payload[1]) if kind == CATEGORICAL else
                       (3 * len(payload) if kind == NUMERIC else 32) for _, kind, payload in spec)
    bits = np.zeros((n_candidates, bitset.n_words(n)), dtype=np.uint64)
    error_bits = np.zeros((n_candidates, bitset.n_words(n_err)), dtype=np.uint64)
    n_rows = np.zeros(n_candidates, dtype=np.int64)
    n_errors = np.zeros(n_candidates, dtype=np.int64)
    buffers = _Buffers(n)
    i = 0
    for column, kind, payload in spec:
        if kind == CATEGORICAL:
            uniques, selections = payload
            codes, local = profiled["codes"][column]
            lut = pd.Index(uniques).get_indexer(local)
            error_codes = codes[errors]
            for sel in selections:
                here = _local_selection(lut, sel)
                n_rows[i] = _pack_into(bits[i], _select_into(codes, here, buffers))
                n_errors[i] = _pack_into(error_bits[i], _select_into(error_codes, here, buffers))
                i += 1
            continue
        if kind == NUMERIC:
            x = numeric_values(part[column])
            both = zip(numeric_masks(column, x, payload), numeric_masks(column, x[errors], payload))
        else:
            series = part[column]
            both = zip(datetime_masks(column, series), datetime_masks(column, series[errors]))
        for (_, mask), (_, error_mask) in both:
            n_rows[i] = _pack_into(bits[i], mask)
            n_errors[i] = _pack_into(error_bits[i], error_mask)
            i += 1
    return {"bits": bits[:i], "error_bits": error_bits[:i], "n": n, "errors": errors,
            "n_rows": n_rows[:i], "n_errors": n_errors[:i]}


def _item_summary(packed: dict) -> dict:
    """What the driver gathers of an item pass: each candidate's rows and errors."""
    return {"n_rows": packed["n_rows"], "n_errors": packed["n_errors"]}


def _item_hashes(packed: dict, candidates: Sequence[int]) -> list[str]:
    """A hash of the rows of each of these candidates (equal hashes everywhere = equal rows)."""
    return [hashlib.blake2b(packed["bits"][c].tobytes(), digest_size=8).hexdigest()
            for c in candidates]


def _stack_kept(first: dict, second: dict, keep: np.ndarray) -> dict:
    """The kept candidates of both item passes of one partition, in one array each."""
    def stack(which):
        a, b = first[which], second[which]
        out = np.empty((keep.size, a.shape[1]), dtype=np.uint64)
        for j, c in enumerate(keep.tolist()):
            out[j] = a[c] if c < len(a) else b[c - len(a)]
        return out

    return {"bits": stack("bits"), "error_bits": stack("error_bits"), "n": first["n"],
            "errors": first["errors"]}


def _block(rows: np.ndarray, *packed: dict) -> dict:
    """Several partitions' candidate bitsets, for one task to count (no copy is made).

    Item ``i`` of the search is row ``rows[i]`` of every partition's bitsets.
    """
    return {"rows": rows, "bits": [p["bits"] for p in packed],
            "error_bits": [p["error_bits"] for p in packed],
            "errors": [bitset.pack(p["errors"])[0] for p in packed]}


def _kernel_threads() -> None:
    """Let numba's parallel kernel use the threads Dask gives a task, not every core.

    A Dask nanny starts its worker with ``OMP_NUM_THREADS=1`` (one core per task thread);
    the kernel's own threads on top of that oversubscribed the cores: on 2 worker
    processes x 1 thread on 2 cores, a level of 62k candidates took 0.20 s per 1M-row
    partition with numba's 2 threads and 0.13 s with 1 thread.
    """
    import numba

    limit = os.environ.get("OMP_NUM_THREADS", "")
    if limit.isdigit() and int(limit) >= 1:
        numba.set_num_threads(min(int(limit), numba.config.NUMBA_NUM_THREADS))


def _count(block: dict, which: str, prefixes, offsets, extensions, engine: str) -> np.ndarray:
    """One block's share of a level's counts (`engine` chosen for the whole table)."""
    rows = block["rows"]
    prefixes, extensions = rows[prefixes], rows[extensions]
    total = np.zeros(len(extensions), dtype=np.int64)
    if engine == "numba":
        numba_kernels()
        _kernel_threads()
    for bits in block["error_bits" if which == "errors" else "bits"]:
        if bits.shape[1]:
            total += bitset.count_extensions(bits, prefixes, offsets, extensions, engine=engine)
    return total


def _rule_bits(block: dict, terms: np.ndarray) -> list[np.ndarray]:
    """The rows of a rule in each partition of a block, packed."""
    rows = block["rows"][terms]
    out = []
    for bits in block["bits"]:
        got = bits[rows[0]].copy()
        for r in rows[1:]:
            got &= bits[r]
        out.append(got)
    return out


def _block_errors(block: dict) -> list[np.ndarray]:
    """The error flags of each partition of a block, packed."""
    return block["errors"]


def _identity(value):
    return value


def _gather_column(part: pd.DataFrame, column: str) -> np.ndarray:
    return part[column].to_numpy()


# ---------------------------------------------------------------------------------------
# embedding clusters: fitted on a sample gathered to the driver, rows placed per partition

def _part_vectors(part: pd.DataFrame, chunk, names: tuple, kept: dict | None) -> dict:
    """One partition's embeddings, checked over all its rows as in memory, then cut to
    the analysed rows (the rows `kept` keeps). Returns the vectors and a summary."""
    x = vectors_of(part, names, " of its partition") if names else np.asarray(chunk)
    if x.ndim != 2 and len(x):
        raise SlicefindValueError(f"embeddings must be two-dimensional (n_rows, d); a partition's "
                                  f"piece has shape {x.shape}.")
    if x.dtype.kind != "f":
        if x.dtype.kind not in "iub":
            raise SlicefindTypeError(f"embeddings must be numeric; a partition holds {x.dtype} values.")
        x = x.astype(np.float64)
    bad_rows, first = nonfinite_rows(x) if x.ndim == 2 else (0, None)
    if kept is not None:
        x = x[bitset.unpack(kept["keep"], kept["n"])[0]]
    return {"x": np.ascontiguousarray(x), "n_input": len(part) if names else len(chunk),
            "d": int(x.shape[1]) if x.ndim == 2 else 0, "bad_rows": bad_rows, "first_bad": first}


def _vector_summary(vectors: dict) -> dict:
    return {k: v for k, v in vectors.items() if k != "x"}


def _vector_hashes(vectors: dict) -> np.ndarray:
    x = vectors["x"]
    return row_hashes(x) if len(x) else np.zeros(0, dtype=np.uint64)


def _take_vectors(vectors: dict, rows: np.ndarray) -> np.ndarray:
    return vectors["x"][rows]


def _place_part(vectors: dict, hashes: np.ndarray, fitted, fit_hashes: np.ndarray,
                fit_order: np.ndarray) -> Placed:
    """Labels and coordinates of one partition's rows.

    A row equal to a fitted row takes that row's results (in memory every copy of a
    distinct row shares its results); the others are placed by `Fitted.place`, the code
    the in-memory engine places its unsampled rows with."""
    x = vectors["x"]
    where = np.minimum(np.searchsorted(fit_hashes, hashes), fit_hashes.size - 1)
    j = fit_order[where]
    copy = fit_hashes[where] == hashes
    copy[copy] = np.all(x[copy] == fitted.vectors[j[copy]], axis=1)
    out = Placed.empty(fitted.own(), x.shape[0])
    out.put(copy, fitted.own().take(j[copy]))
    others = np.flatnonzero(~copy)
    if others.size:
        out.put(others, fitted.place(x[others]))
    return out


def _block_inside(block: dict, n_nodes: Mapping[str, int], *placed: dict) -> dict:
    """Per item and deepest tree node, the rows of the item whose deepest node it is, over
    a block's partitions (`describe.enriched_items` needs the per-node counts, summed
    over subtrees on the driver; the item bitsets live here)."""
    rows = block["rows"]
    out = {k: np.zeros((rows.size, m), dtype=np.int64) for k, m in n_nodes.items()}
    for bits, got in zip(block["bits"], placed):
        n = got.coords.shape[0]
        for i, r in enumerate(rows):
            mask = bitset.unpack(bits[r:r + 1], n)[0]
            for k, m in n_nodes.items():
                out[k][i] += np.bincount(got.labels[k][mask], minlength=m)
    return out


class DaskRows:
    """The embedding rows of a Dask table, for `clusters.cluster_slices` (`MemoryRows` is
    the in-memory one): vectors stay on the workers, partition by partition.

    Distinct rows come from 64-bit row hashes gathered to the driver (8 bytes a row),
    where the in-memory engine also compares the vectors of equal hashes: two different
    vectors with equal hashes (odds about n**2 / 2**65, 3 in a million at 10M rows) would
    count as one distinct row here. The fit sample's vectors are gathered to the driver;
    every partition then places its own rows, in parallel, by the same code as in memory
    (a row's result depends on that row alone), so both engines give the same clusters.
    """

    def __init__(self, client, vectors: list, part_rows: Sequence[int], blocks: list,
                 block_parts: Sequence[Sequence[int]], block_workers: Sequence):
        self.client = client
        self.parts = vectors
        self.offsets = np.concatenate([[0], np.cumsum(part_rows)]).astype(np.int64)
        self.blocks, self.block_parts, self.block_workers = blocks, block_parts, block_workers
        self.hashes = client.map(_vector_hashes, vectors, pure=False)
        self._inside = None

    def distinct(self, errors: np.ndarray):
        self.all_hashes = np.concatenate(self.client.gather(self.hashes))
        codes, _ = pd.factorize(self.all_hashes, sort=False)
        n_distinct = int(codes.max()) + 1 if codes.size else 0
        first = np.full(n_distinct, codes.size, dtype=np.int64)
        np.minimum.at(first, codes, np.arange(codes.size))
        self.first = first.astype(np.intp)
        return self.first, np.bincount(codes, weights=errors, minlength=n_distinct) > 0

    def vectors(self, rows: np.ndarray) -> np.ndarray:
        """The vectors of sorted analysed rows, gathered from their partitions."""
        part = np.searchsorted(self.offsets, rows, side="right") - 1
        futures = [self.client.submit(_take_vectors, self.parts[p], rows[part == p] - self.offsets[p],
                                      pure=False) for p in np.unique(part)]
        return np.concatenate(self.client.gather(futures))

    def place(self, fitted, fit: np.ndarray, progress: bool):
        fit_hashes = self.all_hashes[self.first[fit]]
        order = np.argsort(fit_hashes, kind="stable")
        self.all_hashes = None
        # a task that returns the fit, not scattered data: if a worker holding it dies, the
        # scheduler recomputes it (a broadcast scatter to a dying worker can hang)
        shared = self.client.submit(_identity, fitted, pure=False)
        k = len(self.parts)
        placed = self.client.map(_place_part, self.parts, self.hashes, [shared] * k,
                                 [fit_hashes[order]] * k, [order] * k, pure=False)
        n_nodes = {key: tree.n_nodes for key, tree in fitted.trees.items()}
        inside = [self.client.submit(_block_inside, block, n_nodes, *[placed[i] for i in parts],
                                     pure=False, allow_other_workers=True,
                                     workers=None if worker is None else [worker])
                  for block, parts, worker in zip(self.blocks, self.block_parts, self.block_workers)]
        done = self.client.gather(placed)
        self._inside = {key: np.sum([got[key] for got in self.client.gather(inside)], axis=0)
                        for key in n_nodes} if inside else None
        return Placed.concat(done)

    def inside(self, trees):
        """Per tree node (subtree), the rows of each item inside it."""
        if self._inside is None:
            return None
        return {key: subtree_sums(trees[key], counts) for key, counts in self._inside.items()}


def _embedding_pieces(client, embeddings, names: tuple, raw_parts: list, kept, input_rows):
    """Futures of every partition's checked embeddings (`_part_vectors`), from columns of
    the data, a numpy array (sent piece by piece) or a dask array (cut to the partitions)."""
    k = len(raw_parts)
    n_input = int(sum(input_rows))
    kept = kept if kept is not None else [None] * k
    if names:
        chunks = [None] * k
    else:
        if type(embeddings).__module__.split(".")[0] == "dask":
            if any(np.isnan(c) for c in embeddings.chunks[0]):
                raise SlicefindValueError("embeddings is a dask array of unknown chunk sizes; call "
                                          "its compute_chunk_sizes() first.")
            array = embeddings
        else:
            try:
                array = embeddings if isinstance(embeddings, np.ndarray) else np.asarray(embeddings)
            except (TypeError, ValueError):
                array = None
            if array is None or array.dtype == object:
                msg = ("with a Dask DataFrame, embeddings= must name columns of data or be a numpy "
                       f"or dask array; got {type(embeddings).__name__}.")
                raise SlicefindTypeError(msg)
        if array.ndim != 2:
            raise SlicefindValueError(f"embeddings must be two-dimensional (n_rows, d); got shape {array.shape}.")
        if array.shape[0] != n_input:
            raise SlicefindValueError(f"embeddings has {array.shape[0]} rows but data has {n_input}; "
                                      "they must match row for row.")
        if array.shape[1] == 0:
            raise SlicefindValueError("embeddings has 0 columns; it needs at least one dimension.")
        sizes = (tuple(int(r) for r in input_rows), array.shape[1])
        if isinstance(array, np.ndarray):       # pieces in the graph: a lost worker's is recomputed
            import dask.array as da

            cut = da.from_array(array, chunks=sizes)
        else:
            cut = array.rechunk(sizes)
        chunks = client.compute(list(cut.to_delayed().ravel()))
    vectors = client.map(_part_vectors, raw_parts, chunks, [names] * k, kept, pure=False)
    summaries = client.gather(client.map(_vector_summary, vectors, pure=False))
    dims = [s["d"] for s in summaries if s["n_input"]]
    if dims and any(d != dims[0] for d in dims):
        where = next(i for i, s in enumerate(summaries) if s["n_input"] and s["d"] != dims[0])
        raise SlicefindValueError(f"embeddings have {dims[0]} dimensions in partition 0 but "
                                  f"{summaries[where]['d']} in partition {where}; every row needs one "
                                  "vector of the same length.")
    if dims and dims[0] == 0:
        raise SlicefindValueError("embeddings has 0 columns; it needs at least one dimension.")
    starts = np.concatenate([[0], np.cumsum([s["n_input"] for s in summaries])])
    bad = [(i, s) for i, s in enumerate(summaries) if s["first_bad"] is not None]
    if bad:
        i, s = bad[0]
        row, col, value = s["first_bad"]
        raise SlicefindValueError(nonfinite_message(sum(t["bad_rows"] for _, t in bad),
                                                    int(starts[i]) + row, col, value))
    return vectors


# ---------------------------------------------------------------------------------------
# the driver

def _join_packed(pieces: Sequence[np.ndarray], sizes: Sequence[int]) -> np.ndarray:
    """One bitset over all rows from per-partition bitsets of `sizes` rows each."""
    if all(s % bitset.WORD_BITS == 0 for s in sizes[:-1]):      # word-aligned: join the words
        return np.concatenate([p for p, s in zip(pieces, sizes) if s] or [np.zeros(0, np.uint64)])
    masks = [bitset.unpack(p, s)[0] for p, s in zip(pieces, sizes) if s]
    return bitset.pack(np.concatenate(masks) if masks else np.zeros(0, dtype=bool))[0]


@dataclass(frozen=True, repr=False)
class DaskMined:
    """What the Dask engine hands back to `find_slices`: the same pieces as in memory."""

    table: EvalTable
    items: ItemSet
    counts: Any
    client: Any
    blocks: list                            # futures of `_block`s
    block_parts: tuple                      # the partitions of each block, in order
    block_workers: tuple                    # the worker each block was put on
    part_rows: tuple = ()                   # analysed rows per partition
    seconds: Mapping[str, float] = field(default_factory=dict)   # per phase of mine_dask
    embedding_rows: Any = None              # a DaskRows when embeddings= was given

    def rule_bitset(self, terms: np.ndarray) -> np.ndarray:
        """The packed rows of a rule over all rows (gathered from every block)."""
        terms = np.asarray(terms)
        got = _on_blocks(self.client, self.blocks, self.block_workers, _rule_bits, terms)
        return _join_packed(_in_partition_order(got, self.block_parts), self.part_rows)


def _in_partition_order(per_block: list, block_parts: Sequence[Sequence[int]]) -> list:
    """Per-partition pieces from per-block lists, in partition order."""
    out: dict[int, Any] = {}
    for pieces, parts in zip(per_block, block_parts):
        out.update(zip(parts, pieces))
    return [out[i] for i in range(len(out))]


def _blocks(client, packed: list, rows: np.ndarray):
    """Group the partitions' bitsets into one block per worker thread (fewer, larger tasks).

    Partitions are grouped by the worker holding them, in partition order, and split
    into as many blocks as it has threads; where a partition lives only changes the
    grouping, never a count. Returns the block futures, the partitions of each block
    and the worker of each block.
    """
    from distributed import wait

    wait(packed)
    where = client.who_has(packed)
    threads = client.nthreads()
    by_worker: dict[Any, list[int]] = {}
    for i, future in enumerate(packed):
        holders = sorted(where.get(future.key, ()))
        by_worker.setdefault(holders[0] if holders else None, []).append(i)
    groups = []
    for worker, parts in by_worker.items():
        k = max(1, min(len(parts), int(threads.get(worker, 1))))
        groups += [(worker, chunk.tolist()) for chunk in np.array_split(np.array(parts), k)]
    blocks = [client.submit(_block, rows, *[packed[i] for i in group], pure=False,
                            workers=None if worker is None else [worker], allow_other_workers=True)
              for worker, group in groups]
    return blocks, tuple(tuple(group) for _, group in groups), tuple(worker for worker, _ in groups)


def _on_blocks(client, blocks: list, workers: Sequence, func, *args, meanwhile=None) -> list:
    """Run ``func(block, *args)`` on every block, each on the worker that holds it (where it
    still can: the restriction is loose), and gather the results in block order; the
    driver runs `meanwhile` (if given) while the tasks run."""
    futures = [client.submit(func, block, *args, pure=False, allow_other_workers=True,
                             workers=None if worker is None else [worker])
               for block, worker in zip(blocks, workers)]
    if meanwhile is not None:
        meanwhile()
    return client.gather(futures)


def _spread(client, delayed: list) -> list:
    """Futures of the partitions, placed evenly over the workers' threads up front.

    Partition ``i`` goes to thread slot ``i mod slots`` (loosely: a busy or lost worker's
    partitions still run elsewhere); each partition's later tasks follow it. Left to
    the scheduler, 10 equal partitions came out 6 and 4 on 2 workers, and every pass
    waited for the worker with 6.
    """
    threads = client.nthreads()
    slots = [addr for addr in sorted(threads) for _ in range(max(1, int(threads[addr])))]
    if not slots:
        return client.compute(delayed)
    futures: list = [None] * len(delayed)
    for addr in sorted(threads):
        mine = [i for i in range(len(delayed)) if slots[i % len(slots)] == addr]
        if mine:
            got = client.compute([delayed[i] for i in mine], workers=[addr], allow_other_workers=True)
            for i, future in zip(mine, got):
                futures[i] = future
    return futures


def _default_client():
    """The current distributed client, or a new local cluster of 2 worker processes (whose
    own logs are silenced: a bad partition's error reaches the caller as the exception,
    without the workers' copy of its traceback)."""
    from distributed import Client, LocalCluster, get_client

    try:
        return get_client()
    except ValueError:
        cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                               dashboard_address=None, silence_logs=logging.CRITICAL)
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


def _merge_categories(infos: list):
    """A categorical column's observed values in category order, with summed counts.

    Categories that later partitions add come after the first partition's, in the order
    they appear (the order `pandas.api.types.union_categoricals` gives).
    """
    index = pd.Index(infos[0]["categories"])
    for info in infos[1:]:
        if not index.equals(info["categories"]):
            other = pd.Index(info["categories"])
            index = index.append(other[~other.isin(index)])
    counts = np.zeros(len(index), np.int64)
    error_counts = np.zeros(len(index), np.int64)
    for info in infos:
        where = np.arange(len(index)) if index.equals(info["categories"]) else \
            index.get_indexer(info["categories"])
        np.add.at(counts, where, info["counts"])
        np.add.at(error_counts, where, info["error_counts"])
    seen = counts > 0
    return index[seen], counts[seen], error_counts[seen]


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


#: from this many rows on, the driver loads its compiled kernels while the workers count
_WARM_DRIVER_ROWS = 100_000


def _warm_driver() -> None:
    """Load the compiled Fisher-tail kernel that scoring thousands of rules will call.

    In memory, numba is already loaded by the counting kernel; here the counting runs on
    the workers, and loading numba on the driver afterwards (~0.8 s from the disk cache)
    came after all the workers' time. Called while the workers load their own kernel for
    the first count, it overlaps with it.
    """
    x = np.ones(1)
    numba_kernels().hypergeom_tails(x, x, x, x, x, x, x, np.empty(1))


class _Clock:
    """Seconds per phase, for the DEBUG log and `DaskMined.seconds`."""

    def __init__(self):
        self.last = time.perf_counter()
        self.seconds: dict[str, float] = {}

    def mark(self, phase: str) -> None:
        now = time.perf_counter()
        self.seconds[phase] = self.seconds.get(phase, 0.0) + now - self.last
        self.last = now


def mine_dask(data, *, label=None, prediction=None, errors=None, loss=None, threshold=None,
              exclude: Sequence[str] = (), id_column: str | None = None, client=None,
              error_kind: str = "all", positive=None, true_class=None, embeddings=None,
              min_rows_for, min_errors_for, n_bins: int = 4, tree_depth: int = 2,
              max_terms: int = 3, random_state=0, sample_rows: int = SAMPLE_ROWS,
              mine_label: bool = False) -> DaskMined:
    """Run the item and rule passes on a dask DataFrame; see the module docstring.

    The options mean what they mean for `find_slices` (label, prediction, errors and
    loss are column names). `min_rows_for(n)` and `min_errors_for(n, n_errors, min_rows)`
    give the thresholds once the number of analysed rows is known (the same defaults as
    in memory); `sample_rows` bounds the sample numeric cut points are fitted on.
    """
    clock = _Clock()
    columns = list(data.columns)
    how, used, definition = _error_definition(columns, label, prediction, errors, loss, threshold,
                                              exclude, id_column, error_kind)
    emb_names = embedding_columns(embeddings, columns)
    filtering = error_kind != "all" or true_class is not None
    if filtering and label is None:
        msg = "error_kind= and true_class= need label= and prediction= (not errors= or loss=)."
        raise SlicefindValueError(msg)
    client = client or _default_client()
    seed = int(np.random.default_rng(random_state).integers(2**31))
    not_mined = (set(exclude) | set(mined_roles(used, mine_label)) | ({id_column} if id_column else set())
                 | set(emb_names))
    candidates = [c for c in columns if c not in not_mined]

    parts = raw_parts = _spread(client, data.to_delayed())
    n_parts = len(parts)
    kept = None
    if filtering:
        how = dict(how, error_kind=error_kind, positive=None, true_class=true_class)
        pre = client.gather(client.map(_label_classes, parts, range(n_parts), [how] * n_parts,
                                       [candidates] * n_parts, pure=False))
        _check_schema(pre, columns)
        if sum(p["n"] for p in pre) == 0:
            raise SlicefindValueError("data is empty (0 rows); slicefind needs a dev set with rows.")
        classes = pd.unique(pd.Series(np.concatenate([np.asarray(p["classes"], dtype=object)
                                                      for p in pre]), dtype=object))
        if error_kind != "all":
            how = dict(how, positive=positive_class(error_kind, positive, classes))
            definition = f"{error_kind.replace('_', ' ')} (positive = {how['positive']!r})"
        if true_class is not None:
            if sum(p["n_true_class"] for p in pre) == 0:
                raise SlicefindValueError(f"true_class={true_class!r} never occurs in label.")
            definition += f", label = {true_class!r}"
        kept = client.map(_kept, parts, [how] * n_parts, pure=False)
        parts = client.map(_analysed, parts, kept, pure=False)
        clock.mark("rows pass")

    profiled = client.map(_profile, parts, range(n_parts), [how] * n_parts,
                          [candidates] * n_parts, pure=False)
    profiles = client.gather(client.map(_summary, profiled, pure=False))
    _check_schema(profiles, columns)     # before anything reads a partition's columns
    clock.mark("profile pass")
    part_rows = tuple(int(p["n"]) for p in profiles)
    n = int(sum(part_rows))
    k_total = int(sum(p["n_errors"] for p in profiles))
    if n == 0 and not filtering:
        raise SlicefindValueError("data is empty (0 rows); slicefind needs a dev set with rows.")
    if k_total == 0:
        msg = (f"no row is an error ({definition}) among the {n:,} rows analysed; "
               "there is nothing to explain. Check label=/prediction= or the error definition.")
        raise SlicefindValueError(msg)
    if k_total == n:
        msg = (f"every one of the {n:,} rows analysed is an error ({definition}); "
               "slices need correct rows to compare against. Check label=/prediction=.")
        raise SlicefindValueError(msg)
    vectors = None
    if embeddings is not None:            # checked before the raw partitions are let go
        input_rows = [p["n"] for p in pre] if filtering else part_rows
        vectors = _embedding_pieces(client, embeddings, emb_names, raw_parts, kept, input_rows)
        clock.mark("embeddings pass")
    del raw_parts
    min_rows = min_rows_for(n)
    min_errors = min_errors_for(n, k_total, min_rows)
    builder = ItemBuilder(np.zeros(0, dtype=bool), min_rows, min_errors)

    # column kinds and candidate items, as build_eval_table and build_items decide them
    kinds, skipped, merged = _column_kinds(columns, not_mined, profiles, exclude, id_column,
                                           emb_names, used)
    mined = tuple(kinds)

    spec, cand_items, cand_cols = [], [], []
    selection_of = {}        # id(item) -> the one-item spec that selects its rows
    for column in (c for c in mined if kinds[c] != NUMERIC):      # categories and dates first, as in memory
        if kinds[column] == CATEGORICAL:
            uniques, counts, error_counts, n_missing, e_missing = merged[column]
            listed = []
            for item, sel in categorical_items(column, uniques, counts, min_rows):
                # the counts are known already: offer only what the builder can keep
                rows, errs = ((n_missing, e_missing) if sel == (-1,) else
                              (int(counts[list(sel)].sum()), int(error_counts[list(sel)].sum())))
                if builder.wanted(rows, errs, n):
                    listed.append((item, sel))
            spec.append((column, CATEGORICAL, (uniques, [sel for _, sel in listed])))
            cand_items += [item for item, _ in listed]
            selection_of.update({id(item): (column, CATEGORICAL, (uniques, [sel]))
                                 for item, sel in listed})
        else:
            listed = [item for item, _ in datetime_masks(column, pd.Series([], dtype="datetime64[ns]"))]
            spec.append((column, DATETIME, None))
            cand_items += listed
        cand_cols += [mined.index(column)] * (len(cand_items) - len(cand_cols))
    packed = client.map(_item_bits, parts, profiled, [spec] * n_parts, pure=False)
    _add_counted(client, builder, cand_items, cand_cols, packed, n, offset=0)
    clock.mark("item pass")

    numeric = [c for c in mined if kinds[c] == NUMERIC]
    packed_num = None
    if numeric:
        packed_num = _numeric_pass(client, builder, parts, profiled, numeric, selection_of, mined,
                                   n=n, k_total=k_total, min_rows=min_rows, n_bins=n_bins,
                                   tree_depth=tree_depth, seed=seed, sample_rows=sample_rows,
                                   offset=len(cand_items), clock=clock)
    del profiled                          # the codes are no longer needed on the workers
    order = np.argsort(np.asarray(builder.cols, dtype=np.int64), kind="stable")
    builder.reorder(order)
    keep = np.array([payload for _, payload in builder.bits], dtype=np.int64)   # candidate of each item
    if numeric:                           # two arrays per partition: keep the items' rows in one
        packed = client.map(_stack_kept, packed, packed_num, [keep] * n_parts, pure=False)
        del packed_num
        keep = np.arange(keep.size, dtype=np.int64)
    blocks, block_parts, block_workers = _blocks(client, packed, keep)
    del packed

    items = ItemSet(items=tuple(builder.items), column_of=np.asarray(builder.cols, dtype=np.int64),
                    columns=mined, bits=None, error_bits=None,
                    n_rows=np.asarray(builder.n_rows, dtype=np.int64),
                    n_errors=np.asarray(builder.n_errors, dtype=np.int64))

    words = {"rows": sum(bitset.n_words(r) for r in part_rows),
             "errors": sum(bitset.n_words(int(p["n_errors"])) for p in profiles)}

    warm = [n >= _WARM_DRIVER_ROWS]       # the driver's kernels still to load (once)

    def counter(which):
        def count(prefixes, offsets, extensions):
            # the kernel the in-memory engine would pick for the whole table
            engine = "numba" if len(extensions) * words[which] >= bitset.NUMBA_MIN_WORDS else "numpy"
            meanwhile = None
            if engine == "numba" and warm[0]:        # the workers load theirs meanwhile
                meanwhile, warm[0] = _warm_driver, False
            got = _on_blocks(client, blocks, block_workers, _count, which, prefixes, offsets,
                             extensions, engine, meanwhile=meanwhile)
            return np.sum(got, axis=0).astype(np.int64)
        return count

    counts = search_levels(items.n_rows, items.n_errors, items.column_of, max_terms=max_terms,
                           min_rows=min_rows, min_errors=min_errors, count_errors=counter("errors"),
                           count_rows=counter("rows"))
    clock.mark("search")

    table = _gathered_table(client, parts, blocks, block_parts, block_workers, kept, part_rows,
                            n=n, label=label, prediction=prediction, id_column=id_column,
                            kinds=kinds, skipped=skipped, definition=definition, used=used)
    clock.mark("gathering")
    _log.debug("dask engine, %d partitions, %s rows: %s", n_parts, f"{n:,}",
               ", ".join(f"{k} {v:.2f} s" for k, v in clock.seconds.items()),
               extra={"seconds": dict(clock.seconds)})
    rows = (None if vectors is None else
            DaskRows(client, vectors, part_rows, blocks, block_parts, block_workers))
    return DaskMined(table=table, items=items, counts=counts, client=client, blocks=blocks,
                     block_parts=block_parts, block_workers=block_workers,
                     part_rows=part_rows, seconds=dict(clock.seconds), embedding_rows=rows)


def _error_definition(columns, label, prediction, errors, loss, threshold, exclude, id_column, error_kind):
    """Which rows are errors, checked against the columns: (how, the role columns, its text)."""
    if error_kind not in ERROR_KINDS:
        raise SlicefindValueError(f"error_kind must be one of {ERROR_KINDS}; got {error_kind!r}.")
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
            raise SlicefindValueError(f"{name}={value!r} is not a column of data.{did_you_mean(value, columns)}")
    for column in exclude:
        if column not in columns:
            raise SlicefindValueError(f"exclude names {column!r}, which is not a column of data."
                                      f"{did_you_mean(column, columns)}")
    if label is not None:
        if prediction is None:
            raise SlicefindValueError("prediction= is required when label= is given.")
        how = {"kind": "label", "label": label, "prediction": prediction}
        used = {"label": label, "prediction": prediction}
        definition = "label != prediction"
    elif errors is not None:
        how, used = {"kind": "errors", "errors": errors}, {"errors": errors}
        definition = f"{errors} is true"
    else:
        if threshold is None:
            raise SlicefindValueError("loss= needs threshold=: a row is an error when its loss is above it.")
        if isinstance(threshold, bool) or not isinstance(threshold, (int, float, np.number)) \
                or not np.isfinite(threshold):
            raise SlicefindValueError(f"threshold must be a finite number; got {threshold!r}.")
        how, used = {"kind": "loss", "loss": loss, "threshold": float(threshold)}, {"loss": loss}
        definition = f"{loss} > {threshold:g}"
    return how, used, definition


def _column_kinds(columns, not_mined, profiles, exclude, id_column, emb_names, used):
    """Each column's kind from the merged partition profiles, as build_eval_table decides it:
    (kinds, why each other column is skipped, the merged value counts of the non-numeric ones)."""
    # column kinds and candidate items, as build_eval_table and build_items decide them
    kinds, skipped, merged = {}, {}, {}
    for column in columns:
        if column in not_mined:
            skipped[column] = ("excluded" if column in exclude else "id column" if column == id_column
                               else "embeddings column" if column in emb_names
                               else f"{next(r for r, c in used.items() if c == column)} column")
            continue
        infos = [p["columns"][column] for p in profiles]
        dtype = infos[0]["dtype"]
        has_missing = sum(i["missing"] for i in infos) > 0
        if any(i.get("many") for i in infos):
            kind, reason = NUMERIC, ""
        else:
            uniques, counts, error_counts = (_merge_categories(infos) if "categories" in infos[0]
                                             else _merge_uniques(infos))
            merged[column] = (uniques, counts, error_counts,
                              sum(i["missing"] for i in infos), sum(i["missing_errors"] for i in infos))
            integral = True
            if pd.api.types.is_float_dtype(dtype) and len(uniques) <= MAX_INT_LEVELS:
                values = np.asarray(uniques, dtype=float)
                integral = bool(np.all(values == np.round(values)))
            kind, reason = column_kind(dtype, len(uniques), has_missing, integral)
        if kind is None:
            skipped[column] = reason
        else:
            kinds[column] = kind
    return kinds, skipped, merged


def _numeric_pass(client, builder, parts, profiled, numeric, selection_of, mined, *, n, k_total, min_rows,
                  n_bins, tree_depth, seed, sample_rows, offset, clock):
    """Numeric cut points fitted on a sample (also inside the worst categorical items' rows),
    their items counted on the workers into `builder`; returns the packed item bits."""
    n_parts = len(parts)
    # numeric cut points from a sample, also inside the worst categorical items' rows
    worst = []
    if tree_depth > 0 and builder.items:
        rows = np.asarray(builder.n_rows)
        errs = np.asarray(builder.n_errors)
        excess = errs - rows * k_total / n
        p = np.atleast_1d(fisher_greater(errs, rows, k_total, n))
        ranked = [i for i in np.argsort(-excess, kind="stable") if p[i] < 1e-3 and excess[i] > 0]
        worst = [builder.items[i] for i in ranked[:CONDITIONAL_ITEMS]]
    read = numeric + [c for c in dict.fromkeys(item.column for item in worst) if c not in numeric]
    samples = client.gather(client.map(_sample, parts, profiled, range(n_parts), [read] * n_parts,
                                       [seed] * n_parts, [sample_rows] * n_parts, pure=False))
    sample = pd.concat(samples, ignore_index=True)
    sample = sample.sort_values("__key__", kind="stable").head(sample_rows).reset_index(drop=True)
    sample_errors = sample["__error__"].to_numpy(dtype=bool)
    within = []
    for item in worst:
        one = selection_of.get(id(item))
        if one is not None:              # (the in-memory engine ranks dates too; see below)
            within.append(_value_masks(sample, [one])[0])
        else:
            within.append(_value_masks(sample, [(item.column, DATETIME, None)])[
                _datetime_position(item)])
    clock.mark("sample pass")
    numeric_spec = []
    numeric_items, numeric_cols = [], []
    sample_min_rows = max(1, int(round(min_rows * len(sample) / n)))
    for column in numeric:
        x = numeric_values(sample[column])
        cuts = numeric_cuts(x, sample_errors, min_rows=sample_min_rows, n_bins=n_bins,
                            depth=tree_depth, within=within)
        numeric_spec.append((column, NUMERIC, cuts))
        listed = [item for item, _ in numeric_masks(column, np.zeros(0), cuts)]
        numeric_items += listed
        numeric_cols += [mined.index(column)] * len(listed)
    packed_num = client.map(_item_bits, parts, profiled, [numeric_spec] * n_parts, pure=False)
    _add_counted(client, builder, numeric_items, numeric_cols, packed_num, n, offset=offset)
    clock.mark("numeric item pass")
    return packed_num


def _gathered_table(client, parts, blocks, block_parts, block_workers, kept, part_rows, *, n, label,
                    prediction, id_column, kinds, skipped, definition, used) -> EvalTable:
    """The driver's EvalTable: error flags, positions, labels, predictions and ids gathered."""
    n_parts = len(parts)
    error_pieces = _in_partition_order(_on_blocks(client, blocks, block_workers, _block_errors),
                                       block_parts)
    error_flags = bitset.unpack(_join_packed(error_pieces, part_rows), n)[0]
    if kept is None:
        positions = np.arange(n, dtype=np.intp)
        n_input = n
    else:
        masks = client.gather(kept)
        starts = np.concatenate([[0], np.cumsum([m["n"] for m in masks])])
        positions = np.concatenate([np.flatnonzero(bitset.unpack(m["keep"], m["n"])[0]) + start
                                    for m, start in zip(masks, starts) if m["n"]]).astype(np.intp)
        n_input = int(starts[-1])
    gathered = {}
    for role, column in (("label", label), ("prediction", prediction), ("id", id_column)):
        if column is not None:
            gathered[role] = np.concatenate(client.gather(client.map(
                _gather_column, parts, [column] * n_parts, pure=False)))
    frame = pd.DataFrame({id_column: gathered["id"]}) if id_column else pd.DataFrame(index=range(n))
    table = EvalTable(data=frame, errors=error_flags, positions=positions,
                      n_input_rows=n_input, kinds=kinds, skipped=skipped, label=gathered.get("label"),
                      prediction=gathered.get("prediction"), embeddings=None, id_column=id_column,
                      error_definition=definition, columns_used=used)
    return table


def _datetime_position(item: Item) -> int:
    """Index of a date item among `datetime_masks`' candidates (24 hours, 7 days, missing)."""
    if item.op == "hour":
        return int(item.value)
    if item.op == "weekday":
        return 24 + int(item.value)
    return 31


def _add_counted(client, builder: ItemBuilder, items: list, cols: list, packed: list, n: int,
                 offset: int) -> None:
    """Offer every candidate to the builder with counts summed over partitions.

    The builder compares the rows of two candidates only when they share their column,
    rows and errors; only those candidates' bitsets are hashed, on the workers.
    """
    summaries = client.gather(client.map(_item_summary, packed, pure=False))
    n_rows = np.sum([s["n_rows"] for s in summaries], axis=0) if summaries else np.zeros(len(items))
    n_errors = np.sum([s["n_errors"] for s in summaries], axis=0) if summaries else np.zeros(len(items))
    by_key: dict[tuple, list[int]] = {}
    for i, col in enumerate(cols):
        if builder.wanted(int(n_rows[i]), int(n_errors[i]), n):
            by_key.setdefault((col, int(n_rows[i]), int(n_errors[i])), []).append(i)
    compare = sorted(i for group in by_key.values() if len(group) > 1 for i in group)
    signature: dict[int, tuple] = {}
    if compare:
        hashes = client.gather(client.map(_item_hashes, packed, [compare] * len(packed), pure=False))
        signature = {c: tuple(h[j] for h in hashes) for j, c in enumerate(compare)}
        _log.debug("hashed %d of %d candidates to compare their rows", len(compare), len(items))
    for i, (item, col) in enumerate(zip(items, cols)):
        builder.add_counted(item, col, int(n_rows[i]), int(n_errors[i]), n, signature.get(i),
                            offset + i)
