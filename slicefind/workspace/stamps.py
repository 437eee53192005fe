"""What the workspace stamps on every record: the time, the library version, the data's fingerprint."""
from __future__ import annotations

import datetime as _dt
import hashlib
import json

import pandas as pd

from slicefind.exceptions import SlicefindTypeError

__all__ = ["now", "library_version", "data_fingerprint"]


def now() -> str:
    """UTC time as ISO 8601 with microseconds."""
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="microseconds")


def library_version() -> str:
    from slicefind import __version__
    return __version__


def data_fingerprint(frame: pd.DataFrame) -> str:
    """A SHA-256 of a frame's columns, dtypes, index and values: same data, same string.

    Examples
    --------
    >>> a = pd.DataFrame({"scanner": ["S1", "S2"], "speed": [1.5, 2.5]})
    >>> data_fingerprint(a) == data_fingerprint(a.copy()), data_fingerprint(a) == data_fingerprint(a.iloc[::-1])
    (True, False)
    """
    if not isinstance(frame, pd.DataFrame):
        raise SlicefindTypeError(f"frame must be a DataFrame; got {type(frame).__name__}.")
    digest = hashlib.sha256()
    digest.update(json.dumps([[str(c), str(t)] for c, t in frame.dtypes.items()]).encode())
    digest.update(str(frame.shape).encode())
    try:
        hashed = pd.util.hash_pandas_object(frame, index=True).to_numpy()
    except TypeError:                                   # unhashable cells: hash their text
        hashed = pd.util.hash_pandas_object(frame.astype(str), index=True).to_numpy()
    digest.update(hashed.tobytes())
    return "sha256:" + digest.hexdigest()
