"""Arrays, frames and slicefind's own records stored in SQLite blobs, without pickle."""
from __future__ import annotations

import dataclasses
import importlib
import io
import json
from typing import Any, Mapping

import numpy as np
import pandas as pd

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.values import json_scalar

__all__ = ["pack", "unpack", "pack_frame", "unpack_frame", "encode_tree", "decode_tree", "rows_blob",
           "blob_rows", "json_default", "LEGACY_MODULES"]

#: where slicefind's classes lived before the subpackages; artifacts keep naming them so,
#: so files written before and after the move read the same
LEGACY_MODULES = {
    "slicefind.discovery.describe": "slicefind.describe",
    "slicefind.discovery.find": "slicefind.slices",
    "slicefind.discovery.clusters": "slicefind.clusters",
    "slicefind.discovery.labelcheck": "slicefind.labelcheck",
    "slicefind.discovery.text": "slicefind.text",
    "slicefind.discovery.table": "slicefind.table",
    "slicefind.discovery.records": "slicefind.slices",
    "slicefind.review.queue": "slicefind.queue",
    "slicefind.review.tally": "slicefind.tally",
}
_CURRENT_MODULES = {old: new for new, old in LEGACY_MODULES.items() if new != "slicefind.discovery.records"}


def json_default(value):
    """JSON for numpy scalars and arrays; text for anything else."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    return str(value)


def pack(arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> bytes:
    """Arrays (numeric as .npy, anything else as JSON text) and a JSON header in one npz blob."""
    stored, kinds = {}, {}
    for name, values in arrays.items():
        values = np.asarray(values) if not isinstance(values, np.ndarray) else values
        if values.dtype.kind in "biufcmM":
            stored[name] = values
            kinds[name] = "npy"
        else:
            text = json.dumps([json_scalar(v, keep_infinite=True) for v in values.tolist()])
            stored[name] = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
            kinds[name] = "json"
    header = json.dumps({"meta": meta, "kinds": kinds}).encode("utf-8")
    stored["__header__"] = np.frombuffer(header, dtype=np.uint8)
    buffer = io.BytesIO()
    np.savez_compressed(buffer, **stored)
    return buffer.getvalue()


def unpack(blob: bytes) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """Inverse of `pack`: (arrays, meta); JSON arrays come back as object arrays."""
    with np.load(io.BytesIO(blob), allow_pickle=False) as npz:
        header = json.loads(npz["__header__"].tobytes().decode("utf-8"))
        arrays = {}
        for name, kind in header["kinds"].items():
            if kind == "npy":
                arrays[name] = npz[name]
            else:
                values = json.loads(npz[name].tobytes().decode("utf-8"))
                out = np.empty(len(values), dtype=object)
                out[:] = values
                arrays[name] = out
    return arrays, header["meta"]


def pack_frame(frame: pd.DataFrame) -> bytes:
    """A DataFrame (columns, dtypes and values; not the index) as a blob."""
    arrays = {f"c{i}": frame.iloc[:, i].to_numpy() for i in range(frame.shape[1])}
    meta = {"columns": [str(c) for c in frame.columns], "dtypes": [str(t) for t in frame.dtypes]}
    return pack(arrays, meta)


def unpack_frame(blob: bytes) -> pd.DataFrame:
    """Inverse of `pack_frame`, restoring each column's dtype where pandas can."""
    arrays, meta = unpack(blob)
    data = {}
    for i, (name, dtype) in enumerate(zip(meta["columns"], meta["dtypes"])):
        values = arrays[f"c{i}"]
        series = pd.Series(values)
        if values.dtype == object:
            try:
                series = series.astype(dtype)
            except (TypeError, ValueError):
                pass
        data[name] = series
    return pd.DataFrame(data, columns=meta["columns"])


def encode_tree(value, arrays: dict):
    """A JSON tree for `value`; arrays and frames go to `arrays` (no pickle anywhere).

    Handles None, bool, int, float, str, numpy scalars and arrays, DataFrames, Series,
    lists, tuples, dicts and dataclasses defined in slicefind itself.
    """
    if value is None or isinstance(value, (bool, str)):
        return value
    if isinstance(value, (int, float)):
        return value
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        if value.dtype.kind in "biufcmM":
            key = f"a{len(arrays)}"
            arrays[key] = value
            return {"__array__": key}
        return {"__objects__": [encode_tree(v, arrays) for v in value.tolist()]}
    if isinstance(value, pd.Series):
        return {"__series__": encode_tree(value.to_frame(name="values"), arrays),
                "name": encode_tree(value.name, arrays)}
    if isinstance(value, pd.DataFrame):
        key = f"a{len(arrays)}"
        arrays[key] = np.frombuffer(pack_frame(value), dtype=np.uint8)
        return {"__frame__": key, "index": encode_tree(value.index.to_numpy(), arrays),
                "index_name": encode_tree(value.index.name, arrays)}
    if isinstance(value, tuple):
        return {"__tuple__": [encode_tree(v, arrays) for v in value]}
    if isinstance(value, list):
        return [encode_tree(v, arrays) for v in value]
    if isinstance(value, Mapping):
        return {"__dict__": [[encode_tree(k, arrays), encode_tree(v, arrays)] for k, v in value.items()]}
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        cls = type(value)
        if not cls.__module__.startswith("slicefind."):
            raise SlicefindTypeError(f"artifacts hold slicefind's own dataclasses only; got {cls.__qualname__}.")
        fields = {f.name: encode_tree(getattr(value, f.name), arrays)
                  for f in dataclasses.fields(value) if f.init}
        module = LEGACY_MODULES.get(cls.__module__, cls.__module__)
        return {"__dataclass__": f"{module}:{cls.__qualname__}", "fields": fields}
    msg = (f"an artifact cannot hold a {type(value).__name__}; use numbers, strings, lists, dicts, "
           "numpy arrays or DataFrames.")
    raise SlicefindTypeError(msg)


def decode_tree(tree, arrays: Mapping[str, np.ndarray]):
    """Inverse of `encode_tree`."""
    if isinstance(tree, list):
        return [decode_tree(v, arrays) for v in tree]
    if not isinstance(tree, dict):
        return tree
    if "__array__" in tree:
        return arrays[tree["__array__"]]
    if "__objects__" in tree:
        out = np.empty(len(tree["__objects__"]), dtype=object)
        out[:] = [decode_tree(v, arrays) for v in tree["__objects__"]]
        return out
    if "__series__" in tree:
        series = decode_tree(tree["__series__"], arrays)["values"]
        series.name = decode_tree(tree["name"], arrays)
        return series
    if "__frame__" in tree:
        frame = unpack_frame(arrays[tree["__frame__"]].tobytes())
        frame.index = pd.Index(decode_tree(tree["index"], arrays), name=decode_tree(tree["index_name"], arrays))
        return frame
    if "__tuple__" in tree:
        return tuple(decode_tree(v, arrays) for v in tree["__tuple__"])
    if "__dict__" in tree:
        return {hashable(decode_tree(k, arrays)): decode_tree(v, arrays) for k, v in tree["__dict__"]}
    if "__dataclass__" in tree:
        module, _, name = tree["__dataclass__"].partition(":")
        if not module.startswith("slicefind."):
            raise SlicefindValueError(f"artifact names a class outside slicefind ({module}); refused.")
        cls = importlib.import_module(_CURRENT_MODULES.get(module, module))
        for part in name.split("."):
            cls = getattr(cls, part)
        return cls(**{k: decode_tree(v, arrays) for k, v in tree["fields"].items()})
    return tree


def hashable(key):
    """Dict keys come back as stored; lists (from tuples' JSON) become tuples."""
    return tuple(key) if isinstance(key, list) else key


def rows_blob(rows: np.ndarray) -> bytes:
    """A sorted int64 row array as raw bytes."""
    return np.asarray(rows, dtype="<i8").tobytes()


def blob_rows(blob: bytes) -> np.ndarray:
    return np.frombuffer(blob, dtype="<i8").astype(np.intp)
