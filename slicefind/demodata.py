"""The demo dev set: a parcel depot that reads handwritten digits on parcel labels.

Built offline and deterministically from scikit-learn's bundled handwritten digits
(1,797 images of 8 x 8 pixels). A small classifier is trained on clean images of one
part of the originals; the dev set is grown from the other part by augmentation (small
random shifts, rotations, scales and pixel noise, so no two images are identical) and
degraded in ways of our own choosing:

* **faded thermal print** -- thermal label stock at the harbour depot (a warm shed)
  loses contrast; recorded by the columns ``label_stock`` and ``depot``;
* **ink smear at high belt speed** -- scanner ``S3`` smears the ink along the belt
  when the belt runs at 2.2 m/s or more; recorded by ``scanner`` and ``belt_speed``;
* **packing tape over the label** -- the taping machine runs a strip of glossy tape
  across the middle of some labels, which reads as a bright band; recorded in no column, only the embeddings can show it.

The embeddings are the classifier's hidden layer, as a user would take them from their
own model.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Mapping

import numpy as np
import pandas as pd

from slicefind.discovery.find import find_slices

__all__ = ["Depot", "Planted", "make_depot", "make_stamped", "simulated_reviews", "example_scan",
           "SCANNERS", "LABEL_STOCKS", "DEPOTS"]

SCANNERS = ("S1", "S2", "S3", "S4", "S5", "S6")
LABEL_STOCKS = ("matte", "glossy", "thermal")
DEPOTS = ("north", "harbour", "airport")
#: ink intensity of the bundled digits runs from 0 (paper) to 16 (full ink)
INK_MAX = 16.0
#: originals kept for training the classifier; the rest grow the dev set
N_TRAIN_ORIGINALS = 1000
_CHUNK = 50_000


@dataclass(frozen=True, repr=False)
class Planted:
    """One planted degradation: its rows and whether a column records it."""

    name: str
    rows: np.ndarray              # sorted positions in `Depot.frame`
    columns: tuple[str, ...]      # the columns that record it; () when none does
    description: str

    @property
    def recorded(self) -> bool:
        """True when some column of the frame records the degradation."""
        return bool(self.columns)

    def __repr__(self):
        where = ", ".join(self.columns) if self.columns else "no column"
        return f"Planted({self.name!r}, n_rows={self.rows.size}, recorded in {where})"


@dataclass(frozen=True, repr=False)
class Depot:
    """The demo dev set of `make_depot`.

    Attributes
    ----------
    frame : DataFrame
        One row per scanned parcel: ``parcel_id, scanner, belt_speed, label_stock,
        shift, depot, scanned_at, label, pred``.
    images : (n, 8, 8) float array
        The label image each row was read from (0 = paper, 16 = full ink).
    embeddings : (n, d) float32 array
        The classifier's hidden layer for each image.
    planted : dict
        Degradation name -> `Planted` (rows, recording columns, description).
    """

    frame: pd.DataFrame
    images: np.ndarray
    embeddings: np.ndarray
    planted: Mapping[str, Planted] = field(default_factory=dict)

    @property
    def error_rate(self) -> float:
        """Share of rows the classifier reads wrong."""
        return float((self.frame["label"] != self.frame["pred"]).mean())

    def __repr__(self):
        return (f"Depot(n_rows={len(self.frame)}, n_planted={len(self.planted)}, "
                f"embedding_dim={self.embeddings.shape[1]})")


def _augment(originals: np.ndarray, source: np.ndarray, rng, *, max_shift=0.6, max_angle=8.0,
             max_scale=0.08, rotation=None) -> np.ndarray:
    """Random affine copies (bilinear) of ``originals[source]``; ``rotation`` (degrees,
    per row) is added to the random angle. Assumes (m, 8, 8) originals."""
    from scipy import ndimage

    n = source.size
    angle = rng.uniform(-max_angle, max_angle, n)
    if rotation is not None:
        angle = angle + rotation
    theta = np.deg2rad(angle)
    scale = 1.0 + rng.uniform(-max_scale, max_scale, n)
    shift = rng.uniform(-max_shift, max_shift, (n, 2))
    cos, sin = np.cos(theta) / scale, np.sin(theta) / scale
    grid = np.arange(8) - 3.5
    rr, cc = np.meshgrid(grid, grid, indexing="ij")
    out = np.empty((n, 8, 8), dtype=np.float64)
    for lo in range(0, n, _CHUNK):
        sl = slice(lo, min(n, lo + _CHUNK))
        c, s = cos[sl, None, None], sin[sl, None, None]
        # output pixel (r, c) samples the original at R(theta)/scale @ (r, c) + shift
        src_r = c * rr - s * cc + 3.5 + shift[sl, 0, None, None]
        src_c = s * rr + c * cc + 3.5 + shift[sl, 1, None, None]
        idx = np.broadcast_to(source[sl, None, None], src_r.shape).astype(np.float64)
        out[sl] = ndimage.map_coordinates(originals, [idx, src_r, src_c], order=1,
                                          mode="constant", cval=0.0)
    return out


def _noise(images: np.ndarray, rng, sigma: float = 0.6) -> np.ndarray:
    """Add pixel noise and clip to the ink range."""
    return np.clip(images + rng.normal(0.0, sigma, images.shape), 0.0, INK_MAX)


def _fade(images: np.ndarray, rng) -> np.ndarray:
    """Faded thermal print: ink keeps 20-35% of its contrast."""
    keep = rng.uniform(0.20, 0.35, (images.shape[0], 1, 1))
    return images * keep


def _smear(images: np.ndarray) -> np.ndarray:
    """Ink dragged along the belt (left to right): each pixel trails into the next four."""
    weights = (0.3, 0.25, 0.2, 0.15, 0.1)
    out = np.zeros_like(images)
    for lag, w in enumerate(weights):
        out[:, :, lag:] += w * images[:, :, :8 - lag]
    return out * 1.5


def _tape(images: np.ndarray, rng) -> np.ndarray:
    """Packing tape across the middle of the label (the taping machine runs it over rows
    3-4 of the image): a bright two-pixel band."""
    out = images.copy()
    shine = rng.uniform(10.0, 14.0, (images.shape[0], 1, 1))
    out[:, 3:5, :] = np.maximum(out[:, 3:5, :], shine)
    return out


def _classifier(images: np.ndarray, targets: np.ndarray, rng):
    """A small MLP trained on clean augmented copies of the training originals."""
    import warnings

    from sklearn.exceptions import ConvergenceWarning
    from sklearn.neural_network import MLPClassifier

    copies = np.repeat(np.arange(images.shape[0]), 6)
    train = _noise(_augment(images, copies, rng), rng)
    model = MLPClassifier(hidden_layer_sizes=(64,), alpha=1e-3, max_iter=200,
                          random_state=int(rng.integers(2**31)))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        model.fit(train.reshape(len(train), -1) / INK_MAX, targets[copies])
    return model


def _hidden(model, flat: np.ndarray) -> np.ndarray:
    """The MLP's hidden layer (ReLU) for flattened, scaled images."""
    hidden = flat @ model.coefs_[0] + model.intercepts_[0]
    return np.maximum(hidden, 0.0).astype(np.float32)


def make_depot(n_rows: int = 6000, *, tape_share: float = 0.05, random_state=0) -> Depot:
    """Build the parcel-depot demo dev set.

    Parameters
    ----------
    n_rows : int, default=6000
        Rows (scanned parcels) in the dev set, at least 100.
    tape_share : float, default=0.05
        Share of parcels with packing tape across the label (the degradation no column
        records), in [0, 0.5]; smaller is harder to find.
    random_state : int, Generator or None, default=0
        Seeds everything; the same seed gives the same frame, images and embeddings.

    Returns
    -------
    Depot
        ``frame``, ``images``, ``embeddings`` and ``planted`` (three degradations, one
        recorded in no column).

    Examples
    --------
    >>> depot = make_depot(2000, random_state=0)
    >>> depot
    Depot(n_rows=2000, n_planted=3, embedding_dim=64)
    >>> sorted(name for name, p in depot.planted.items() if not p.recorded)
    ['packing tape']
    """
    if isinstance(n_rows, bool) or not isinstance(n_rows, (int, np.integer)) or n_rows < 100:
        raise ValueError(f"n_rows must be an integer >= 100; got {n_rows!r}.")
    if isinstance(tape_share, bool) or not isinstance(tape_share, (int, float)) or not 0 <= tape_share <= 0.5:
        raise ValueError(f"tape_share must be a number in [0, 0.5]; got {tape_share!r}.")
    from sklearn.datasets import load_digits

    rng = np.random.default_rng(random_state)
    digits = load_digits()
    originals = digits.images.astype(np.float64)
    targets = digits.target.astype(np.int64)
    order = rng.permutation(len(targets))
    train, held_out = order[:N_TRAIN_ORIGINALS], order[N_TRAIN_ORIGINALS:]
    model = _classifier(originals[train], targets[train], rng)

    n = int(n_rows)
    source = held_out[rng.integers(0, held_out.size, n)]
    scanner = rng.choice(np.array(SCANNERS, dtype=object), n, p=[0.2, 0.2, 0.16, 0.16, 0.14, 0.14])
    belt_speed = np.round(rng.uniform(0.8, 2.6, n), 2)
    label_stock = rng.choice(np.array(LABEL_STOCKS, dtype=object), n, p=[0.5, 0.3, 0.2])
    depot = rng.choice(np.array(DEPOTS, dtype=object), n, p=[0.35, 0.33, 0.32])
    start = np.datetime64("2024-03-04T00:00")
    minutes = np.sort(rng.integers(0, 14 * 24 * 60, n))
    scanned_at = pd.to_datetime(start + minutes.astype("timedelta64[m]"))
    hour = scanned_at.hour.to_numpy()
    shift = np.where((hour >= 6) & (hour < 14), "early", np.where((hour >= 14) & (hour < 22), "late", "night"))

    faded = (label_stock == "thermal") & (depot == "harbour")
    smeared = (scanner == "S3") & (belt_speed >= 2.2)
    taped = rng.random(n) < tape_share

    images = _augment(originals, source, rng)
    if faded.any():
        images[faded] = _fade(images[faded], rng)
    if smeared.any():
        images[smeared] = _smear(images[smeared])
    if taped.any():
        images[taped] = _tape(images[taped], rng)
    images = _noise(images, rng)

    flat = images.reshape(n, -1) / INK_MAX
    pred = np.empty(n, dtype=np.int64)
    embeddings = np.empty((n, model.coefs_[0].shape[1]), dtype=np.float32)
    for lo in range(0, n, _CHUNK):
        sl = slice(lo, min(n, lo + _CHUNK))
        pred[sl] = model.predict(flat[sl])
        embeddings[sl] = _hidden(model, flat[sl])

    frame = pd.DataFrame({
        "parcel_id": [f"P{1_000_000 + i:07d}" for i in range(n)],
        "scanner": pd.Categorical(scanner, categories=SCANNERS),
        "belt_speed": belt_speed,
        "label_stock": pd.Categorical(label_stock, categories=LABEL_STOCKS),
        "shift": pd.Categorical(shift, categories=("early", "late", "night")),
        "depot": pd.Categorical(depot, categories=DEPOTS),
        "scanned_at": scanned_at,
        "label": targets[source],
        "pred": pred,
    })
    planted = {
        "faded thermal print": Planted("faded thermal print", np.flatnonzero(faded).astype(np.intp),
                                       ("label_stock", "depot"),
                                       "thermal labels at the harbour depot keep 20-35% of their contrast"),
        "ink smear": Planted("ink smear", np.flatnonzero(smeared).astype(np.intp),
                             ("scanner", "belt_speed"),
                             "scanner S3 at belt_speed >= 2.2 m/s drags the ink along the belt"),
        "packing tape": Planted("packing tape", np.flatnonzero(taped).astype(np.intp), (),
                                "a strip of packing tape across the digit (no column records it)"),
    }
    return Depot(frame=frame, images=images, embeddings=embeddings, planted=planted)


def _stamp(images: np.ndarray, rng) -> np.ndarray:
    """A customs stamp inked over the lower-left corner of the label: a 3 x 3 block of
    near-full ink at rows 5-7, columns 0-2 of the image."""
    out = images.copy()
    ink = rng.uniform(13.0, INK_MAX, (images.shape[0], 1, 1))
    out[:, 5:8, 0:3] = np.maximum(out[:, 5:8, 0:3], ink)
    return out


def make_stamped(n_rows: int = 1797, *, stamp_share: float = 0.12, n_components: int = 10,
                 random_state=0) -> Depot:
    """A dev set whose one degradation cuts across every class and no column records.

    A border depot scans parcels whose labels the reader knows well: its classifier
    (`make_depot`'s small MLP) was trained on clean, augmented copies of all 1,797 label
    designs (scikit-learn's bundled digits), and the dev set shows each design once
    (with replacement beyond 1,797 rows), with light pixel noise. A customs stamp is
    inked over the lower-left corner of a random `stamp_share` of the labels; the
    metadata (``scanner``, ``shift``) says nothing about it. The embeddings are what a
    user without a model layer at hand would compute: a PCA of the raw pixels to
    `n_components` dimensions (scikit-learn's PCA).

    Every class is a tight group here and the stamped labels a parallel copy of each, so
    the stamp's errors fall on many digits at once and a flat HDBSCAN cut tends to split
    them into one small cluster per digit; the stamp is one node higher up the tree.

    Parameters
    ----------
    n_rows : int, default=1797
        Rows of the dev set, at least 100.
    stamp_share : float, default=0.12
        Share of stamped labels, in (0, 0.5].
    n_components : int, default=10
        Dimensions of the pixel PCA.
    random_state : int, Generator or None, default=0

    Returns
    -------
    Depot
        ``frame`` (``parcel_id, scanner, shift, true_digit, read_as``), ``images``,
        ``embeddings`` and ``planted`` with one entry, "customs stamp", recorded in no column.

    Examples
    --------
    >>> data = make_stamped(random_state=0)
    >>> data
    Depot(n_rows=1797, n_planted=1, embedding_dim=10)
    >>> data.planted["customs stamp"].recorded
    False
    """
    if isinstance(n_rows, bool) or not isinstance(n_rows, (int, np.integer)) or n_rows < 100:
        raise ValueError(f"n_rows must be an integer >= 100; got {n_rows!r}.")
    if isinstance(stamp_share, bool) or not isinstance(stamp_share, (int, float)) or not 0 < stamp_share <= 0.5:
        raise ValueError(f"stamp_share must be a number in (0, 0.5]; got {stamp_share!r}.")
    from sklearn.datasets import load_digits
    from sklearn.decomposition import PCA

    rng = np.random.default_rng(random_state)
    digits = load_digits()
    originals = digits.images.astype(np.float64)
    targets = digits.target.astype(np.int64)
    model = _classifier(originals, targets, rng)
    n = int(n_rows)
    source = (rng.permutation(len(targets))[:n] if n <= len(targets)
              else rng.integers(0, len(targets), n))
    stamped = rng.random(n) < stamp_share
    images = originals[source].copy()
    if stamped.any():
        images[stamped] = _stamp(images[stamped], rng)
    images = _noise(images, rng, sigma=0.2)
    flat = images.reshape(n, -1) / INK_MAX
    pred = model.predict(flat).astype(np.int64)
    embeddings = PCA(n_components=n_components, random_state=0).fit_transform(flat).astype(np.float32)
    frame = pd.DataFrame({
        "parcel_id": [f"B{2_000_000 + i:07d}" for i in range(n)],
        "scanner": pd.Categorical(rng.choice(np.array(SCANNERS[:4], dtype=object), n), categories=SCANNERS[:4]),
        "shift": pd.Categorical(rng.choice(np.array(["early", "late", "night"], dtype=object), n),
                                categories=("early", "late", "night")),
        "true_digit": targets[source],
        "read_as": pred,
    })
    planted = {"customs stamp": Planted("customs stamp", np.flatnonzero(stamped).astype(np.intp), (),
                                        "a customs stamp inked over the lower-left corner (no column records it)")}
    return Depot(frame=frame, images=images, embeddings=embeddings, planted=planted)


def simulated_reviews(queue, planted: Mapping[str, Planted]) -> pd.DataFrame:
    """The demos' SIMULATED reviewer: a filled review sheet from the planted ground truth.

    Each queued error is tagged with the planted modes whose rows hold it (ground truth
    that real data never gives); the others stay untagged. Columns ``row, reviewed,
    tags, note``, as `slicefind.review.tally.read_reviews` reads them.

    Examples
    --------
    >>> import slicefind as sf
    >>> depot = make_depot(1500, random_state=0)
    >>> found = sf.find_slices(depot.frame, label="label", prediction="pred")
    >>> sheet = simulated_reviews(sf.build_queue(found, budget=20, rest=5), depot.planted)
    >>> sheet.columns.tolist(), len(sheet)
    (['row', 'reviewed', 'tags', 'note'], 20)
    """
    membership: dict[int, list[str]] = {}
    for name, p in planted.items():
        for row in p.rows.tolist():
            membership.setdefault(int(row), []).append(name)
    rows = queue.table["row"].astype(int).tolist()
    return pd.DataFrame({"row": rows, "reviewed": 1,
                         "tags": [";".join(sorted(membership.get(r, []))) for r in rows],
                         "note": "simulated reviewer"})


def example_scan():
    """A small seeded scan for the docstring examples: parcel labels read at a depot.

    2,000 rows; scanner S3 on the night shift and recycled label stock err more often.
    """
    rng = np.random.default_rng(7)
    n = 2000
    frame = pd.DataFrame({"parcel": [f"P{i:04d}" for i in range(n)],
                          "scanner": rng.choice(["S1", "S2", "S3"], n),
                          "shift": rng.choice(["day", "night"], n),
                          "label_stock": rng.choice(["matte", "gloss", "recycled"], n)})
    rate = np.where((frame["scanner"] == "S3") & (frame["shift"] == "night"), 0.45, 0.08)
    rate = np.where(frame["label_stock"] == "recycled", rate + 0.2, rate)
    wrong = rng.random(n) < rate
    return find_slices(frame, errors=wrong, id_column="parcel")
