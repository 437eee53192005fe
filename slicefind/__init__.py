"""slicefind: find where a model errs, test it against chance, and tally a human review.

The public API is re-exported here; heavy libraries (umap, hdbscan, numba, mlxtend,
scikit-learn, dask) are imported only by the functions that need them.
"""
from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("slicefind")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0+unknown"

from slicefind.compare import Comparison, compare
from slicefind.decision import decision_paragraphs
from slicefind.discovery.describe import SliceDescription, describe_slice
from slicefind.exceptions import (SlicefindError, SlicefindTypeError, SlicefindValueError,
                                  WorkspaceBusyError)
from slicefind.review.queue import Queue, build_queue
from slicefind.discovery.find import FoundSlices, find_slices
from slicefind.review.tally import Tally, read_reviews, tally
from slicefind.discovery.text import embed_texts, text_features
from slicefind.workspace import Workspace, data_fingerprint

__all__ = [
    "find_slices",
    "FoundSlices",
    "build_queue",
    "Queue",
    "tally",
    "Tally",
    "read_reviews",
    "decision_paragraphs",
    "compare",
    "Comparison",
    "describe_slice",
    "embed_texts",
    "text_features",
    "SliceDescription",
    "Workspace",
    "data_fingerprint",
    "SlicefindError",
    "WorkspaceBusyError",
    "SlicefindValueError",
    "SlicefindTypeError",
    "__version__",
]
