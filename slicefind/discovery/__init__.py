"""Finding slices: the eval table, metadata items and rules, embedding clusters, the label
check, text columns, the Dask engine, and `find_slices`, which ranks them all.

Imports run one way: `table` -> `items`, `bitset`, `rules`, `records`, `placing`, `text`
-> the sources (`clusters`, `labelcheck`, `distributed`) -> `describe` -> `find`.
"""
from slicefind.discovery.describe import SliceDescription, describe_slice
from slicefind.discovery.find import FoundSlices, find_slices
from slicefind.discovery.records import Slice, default_min_rows, jaccard
from slicefind.discovery.table import EvalTable, build_eval_table
from slicefind.discovery.text import embed_texts, text_features

__all__ = ["find_slices", "FoundSlices", "EvalTable", "build_eval_table", "Slice", "jaccard",
           "default_min_rows", "describe_slice", "SliceDescription", "embed_texts", "text_features"]
