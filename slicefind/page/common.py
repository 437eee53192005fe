"""What the review page's modules share: limits, the HTTP error, row records, tags, images."""
from __future__ import annotations

import os
import struct
import zlib
from typing import Mapping

import numpy as np
import pandas as pd

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.values import json_scalar

#: longest category name, candidate name or note accepted (characters)
MAX_TAG_LENGTH = 200


MAX_NOTE_LENGTH = 4000


#: file types served as thumbnails (SVG is left out: it can carry script)
IMAGE_TYPES = {".png": "image/png", ".jpg": "image/jpeg", ".jpeg": "image/jpeg",
               ".gif": "image/gif", ".webp": "image/webp", ".bmp": "image/bmp"}


#: the workspace artifact holding the page's category list, in the order it was built
CATEGORIES_ARTIFACT = "review_categories"


#: the ``source`` recorded with every event the page writes
SOURCE = "review-page"


MAX_IMAGE_FILE_BYTES = 20 * 1024 * 1024


N_EXEMPLARS = 6


#: distinctive terms marked in a candidate's texts
N_TERMS = 8


#: characters of a row's text the page shows (the rest is cut, with "…")
MAX_TEXT_SHOWN = 4000


class HTTPError(Exception):
    """An answer other than 200: status code and a message for the page."""

    def __init__(self, status: int, message: str, headers: Mapping[str, str] | None = None):
        super().__init__(message)
        self.status = status
        self.message = message
        self.headers = dict(headers or {})


def records(frame: pd.DataFrame) -> list[dict]:
    """Rows of a frame as JSON-ready dicts."""
    columns = [str(c) for c in frame.columns]
    return [{c: json_scalar(v) for c, v in zip(columns, values)}
            for values in frame.itertuples(index=False, name=None)]


def tags_list(text: str) -> list[str]:
    """'a;b' -> ['a', 'b'] (empty text, no tags)."""
    return [t for t in str(text).split(";") if t]


def png_bytes(pixels: np.ndarray, low: float, high: float) -> bytes:
    """A PNG of one pixel array: 2-D as grey ink (high values dark), (h, w, 3|4) as colour.

    Values are scaled from [low, high] to 0..255 unless the array is already uint8.
    """
    a = np.asarray(pixels)
    if a.dtype != np.uint8:
        a = np.nan_to_num(a.astype(np.float64), nan=low)
        span = high - low
        a = np.clip((a - low) / span, 0.0, 1.0) if span > 0 else np.zeros_like(a)
        a = np.round(a * 255).astype(np.uint8)
        if a.ndim == 2:
            a = 255 - a                                   # ink on paper, as in the report
    if a.ndim == 2:
        colour_type, channels = 0, 1
    else:
        channels = a.shape[2]
        colour_type = 2 if channels == 3 else 6
    h, w = a.shape[:2]
    a = np.ascontiguousarray(a.reshape(h, w * channels))
    raw = b"".join(b"\x00" + a[i].tobytes() for i in range(h))

    def chunk(kind: bytes, data: bytes) -> bytes:
        return (struct.pack(">I", len(data)) + kind + data
                + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))

    return (b"\x89PNG\r\n\x1a\n"
            + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, colour_type, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(raw, 6)) + chunk(b"IEND", b""))


def within(path: str, root: str) -> bool:
    """Whether real path `path` lies inside real folder `root`."""
    try:
        return os.path.commonpath([path, root]) == root
    except ValueError:                                     # different drives
        return False


def check_images(images, n_input_rows: int):
    """Pixel arrays from a path to .npy or an array: (n, h, w) or (n, h, w, 3|4), n >= rows."""
    if images is None:
        return None
    if isinstance(images, (str, os.PathLike)):
        path = os.fspath(images)
        if not os.path.isfile(path):
            raise SlicefindValueError(f"images={path!r} is not a file; pass a .npy of pixel arrays.")
        try:
            images = np.load(path, mmap_mode="r", allow_pickle=False)
        except (ValueError, OSError) as exc:
            raise SlicefindValueError(f"images={path!r} is not a readable .npy file ({exc}).") from None
    if not isinstance(images, np.ndarray):
        raise SlicefindTypeError(f"images must be a path to a .npy file or a numpy array; got "
                                 f"{type(images).__name__}.")
    shape = images.shape
    colour = images.ndim == 4 and shape[3] in (3, 4)
    if not (images.ndim == 3 or colour) or images.dtype.kind not in "biuf":
        msg = (f"images must hold numeric pixel arrays shaped (n, height, width) or (n, height, "
               f"width, 3); got shape {shape} and dtype {images.dtype}.")
        raise SlicefindValueError(msg)
    if colour and images.dtype != np.uint8:
        raise SlicefindValueError(f"colour images must be uint8; got {images.dtype}.")
    if shape[0] < n_input_rows:
        msg = (f"images holds {shape[0]} arrays but the scan's data has {n_input_rows} rows; "
               "pass one array per row of the data, in the data's order.")
        raise SlicefindValueError(msg)
    return images


def ink_range(images: np.ndarray) -> tuple[float, float]:
    """Low and high pixel values over (a sample of up to 4,000 of) the arrays."""
    if images.dtype == np.uint8:
        return 0.0, 255.0
    step = max(1, images.shape[0] // 4000)
    sample = np.asarray(images[::step], dtype=np.float64)
    finite = sample[np.isfinite(sample)]
    if finite.size == 0:
        return 0.0, 1.0
    return float(finite.min()), float(finite.max())
