"""Values as people read them and as JSON stores them: one home for both conversions."""
from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["value_text", "json_scalar"]


def value_text(value) -> str:
    """Readable text of a value: an integer-valued float as an integer (``6.0`` -> ``6``,
    as a label column stored as floats holds its classes), else ``str``.

    Examples
    --------
    >>> value_text(6.0), value_text("S3"), value_text(2.5)
    ('6', 'S3', '2.5')
    """
    if isinstance(value, (float, np.floating)) and float(value).is_integer():
        return str(int(value))
    return str(value)


def json_scalar(value, *, keep_infinite: bool = False):
    """A JSON-ready Python value: numpy scalars unwrapped, NaN/NaT/None as None, lists and
    tuples element by element, any other object as its text. Infinite floats become None
    unless `keep_infinite` (Python's json writes them as ``Infinity``).

    Examples
    --------
    >>> json_scalar(np.int64(3)), json_scalar(float("nan")), json_scalar(float("inf"), keep_infinite=True)
    (3, None, inf)
    """
    if value is None:
        return None
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        if np.isnan(value):
            return None
        return value if keep_infinite or np.isfinite(value) else None
    if isinstance(value, (str, bool, int)):
        return value
    if isinstance(value, (list, tuple)):
        return [json_scalar(v, keep_infinite=keep_infinite) for v in value]
    try:
        if pd.isna(value):
            return None
    except (TypeError, ValueError):
        pass
    return str(value)
