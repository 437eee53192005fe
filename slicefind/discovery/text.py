"""Text columns: embeddings computed offline, surface features to mine, marked terms.

A dev set of messages, documents or generated answers often has a text column and no
embeddings. `embed_texts` computes them from the text itself:

* by default with latent semantic analysis: scikit-learn's TF-IDF (sublinear term
  frequency, terms in at least two texts) followed by a seeded randomized truncated SVD
  and unit-length rows. It needs no download and no torch, and is the same on every
  run with the same seed;
* with ``model="PATH"``, a sentence-transformers model already on disk (the optional
  extra ``slicefind[text]``); nothing is downloaded at run time;
* with any callable ``texts -> (n, d) array``.

`text_features` turns each text into a few numbers a rule can use (its length in
tokens, its share of digits, upper-case and non-ASCII characters, whether it holds a
URL or an e-mail address, its number of lines), so that "long messages with a URL" can
come out of the metadata rules. `mark_terms` cuts a text into plain and marked pieces
for the review page and the report, which escape every piece.
"""
from __future__ import annotations

import os
import re
import time
from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from slicefind.exceptions import SlicefindTypeError, SlicefindValueError, did_you_mean

__all__ = ["embed_texts", "embed_column", "text_features", "surface_features", "check_texts", "mark_terms",
           "TermCounts", "class_tfidf", "TextEmbedding", "TEXT_FEATURES", "TOKEN_PATTERN",
           "DEFAULT_COMPONENTS", "lsa_settings"]

#: how words are cut, for the TF-IDF and the distinctive terms alike (scikit-learn's default)
TOKEN_PATTERN = r"(?u)\b\w\w+\b"
#: a distinctive term is used at least this many times as often (per word) in the slice as outside it
MIN_TERM_LIFT = 2.0
#: dimensions of the default embedding
DEFAULT_COMPONENTS = 64
#: the surface features `text_features` adds, as ``"<column>.<feature>"``
TEXT_FEATURES = ("tokens", "lines", "digit_share", "upper_share", "non_ascii_share", "has_url",
                 "has_email")
_TOKEN = re.compile(TOKEN_PATTERN)
_URL = r"(?i)\b(?:https?://|www\.)\S"
_EMAIL = r"[\w.+-]+@[\w-]+(?:\.[\w-]+)+"
_HOW_TO_GET_A_MODEL = (
    "Save a sentence-transformers model to a folder once, on a machine with network access, "
    "e.g. python -c \"from sentence_transformers import SentenceTransformer; "
    "SentenceTransformer('sentence-transformers/all-MiniLM-L6-v2').save('models/minilm')\", "
    "then pass that folder (text_model='models/minilm', --text-model models/minilm).")


@dataclass(frozen=True)
class TextEmbedding:
    """How a text column was turned into vectors (kept in ``found.extras["text"]``)."""

    column: str
    method: str              # "lsa", "sentence-transformers" or "callable"
    model: str | None        # the model folder or the callable's name
    dim: int
    seconds: float
    vocabulary: int | None = None     # TF-IDF terms kept (lsa only)


def lsa_settings(n_components: int = DEFAULT_COMPONENTS, random_state=0) -> dict:
    """The scikit-learn settings of the default embedding, for a user who wants to refit it.

    ``TfidfVectorizer(**s["tfidf"])`` then ``TruncatedSVD(**s["svd"])`` then rows scaled
    to unit length (``sklearn.preprocessing.normalize``).
    """
    return {"tfidf": {"token_pattern": TOKEN_PATTERN, "lowercase": True, "sublinear_tf": True,
                      "min_df": 2, "dtype": np.float32},
            "svd": {"n_components": n_components, "algorithm": "randomized", "n_iter": 5,
                    "random_state": random_state}}


def check_texts(data, column, *, argument: str = "text") -> np.ndarray:
    """The text column of `data` as an object array of str; missing values become "".

    Raises a `SlicefindValueError` naming `argument` for a column that is not there, a
    value that is neither a string nor missing, or a column with no text at all.
    """
    if not isinstance(column, str):
        raise SlicefindTypeError(f"{argument}= must be a column name (a string); got {type(column).__name__}.")
    if not hasattr(data, "columns") or column not in data.columns:
        columns = list(getattr(data, "columns", []))
        raise SlicefindValueError(f"{argument}={column!r} is not a column of data.{did_you_mean(column, columns)}")
    values = data[column].to_numpy(dtype=object)
    return _as_texts(values, f"{argument}={column!r}")


def _as_texts(values, what: str) -> np.ndarray:
    values = np.asarray(values, dtype=object)
    if values.ndim != 1:
        raise SlicefindValueError(f"{what} must be one text per row; got an array of shape {values.shape}.")
    missing = pd.isna(values)
    strings = np.fromiter((isinstance(v, str) for v in values), dtype=bool, count=values.size)
    bad = np.flatnonzero(~missing & ~strings)
    if bad.size:
        first = values[bad[0]]
        msg = (f"{what} holds {bad.size:,} values that are not text, e.g. at position {bad[0]}: "
               f"{first!r} ({type(first).__name__}); convert the column with .astype(str) if "
               "they are meant as text, or pass the column of text.")
        raise SlicefindValueError(msg)
    out = values.copy()
    out[missing] = ""
    if values.size and not any(_TOKEN.search(t) for t in out):
        raise SlicefindValueError(f"{what} holds no word in any of its {values.size:,} rows "
                                  "(all empty, missing or single characters).")
    return out


def text_features(texts, *, prefix: str = "text") -> pd.DataFrame:
    """Surface features of each text, one column per name in `TEXT_FEATURES`.

    ``tokens`` counts words as the TF-IDF cuts them, ``lines`` the lines (0 for an
    empty text); ``digit_share`` and ``non_ascii_share`` are shares of the text's
    non-space characters, ``upper_share`` of its letters (each 0 when there are none),
    rounded to 3 decimals; ``has_url`` and ``has_email`` are booleans. Columns are
    named ``"<prefix>.<feature>"``.

    Examples
    --------
    >>> text_features(["Order 42 LOST", "see https://example.org"], prefix="m")["m.tokens"].tolist()
    [3, 4]
    """
    return surface_features(_as_texts(texts, "texts"), prefix=prefix)


def surface_features(values: np.ndarray, *, prefix: str) -> pd.DataFrame:
    """`text_features` of texts already checked (`check_texts`: an object array of str)."""
    series = pd.Series(values, dtype=object)
    counts = _char_counts(values.tolist())
    solid, digits, letters, upper, foreign, breaks = (counts[:, j] for j in range(6))

    def share(count: np.ndarray, of: np.ndarray) -> np.ndarray:
        return np.round(np.divide(count, of, out=np.zeros(count.size), where=of > 0), 3)

    has_at = counts[:, 6] > 0
    has_email = np.zeros(values.size, dtype=bool)
    if has_at.any():
        has_email[has_at] = series[has_at].str.contains(_EMAIL, regex=True).to_numpy(bool)
    return pd.DataFrame({
        f"{prefix}.tokens": series.str.count(TOKEN_PATTERN).to_numpy(np.int64),
        f"{prefix}.lines": np.where(solid > 0, breaks + 1, 0).astype(np.int64),
        f"{prefix}.digit_share": share(digits, solid),
        f"{prefix}.upper_share": share(upper, letters),
        f"{prefix}.non_ascii_share": share(foreign, solid),
        f"{prefix}.has_url": series.str.contains(_URL, regex=True).to_numpy(bool),
        f"{prefix}.has_email": has_email,
    })


_SOLID, _DIGIT, _LETTER, _UPPER, _FOREIGN, _BREAK, _AT = (1 << j for j in range(7))
_CHAR_FLAGS: np.ndarray | None = None
_CHUNK_TEXTS = 50_000


def _char_flags() -> np.ndarray:
    """Per code point of the Basic Multilingual Plane: a bit per character class."""
    global _CHAR_FLAGS
    if _CHAR_FLAGS is None:
        flags = np.zeros(0x10000, dtype=np.uint8)
        for cp in range(0x10000):
            c = chr(cp)
            bits = 0 if c.isspace() else _SOLID | (_FOREIGN if cp > 127 else 0)
            bits |= (_DIGIT if c.isdecimal() else 0) | (_LETTER if c.isalpha() else 0)
            bits |= (_UPPER if c.isupper() else 0)
            flags[cp] = bits
        flags[ord("\n")] |= _BREAK
        flags[ord("@")] |= _AT
        _CHAR_FLAGS = flags
    return _CHAR_FLAGS


def _char_counts(texts: list[str]) -> np.ndarray:
    """(n, 7) counts per text of the `_char_flags` classes, in chunks of texts.

    A code point above the Basic Multilingual Plane (an emoji, say) counts as a
    non-space, non-ASCII character that is no letter or digit. Line breaks are counted
    inside the text with its ends stripped.
    """
    flags = _char_flags()
    out = np.zeros((len(texts), 7), dtype=np.int64)
    for lo in range(0, len(texts), _CHUNK_TEXTS):
        chunk = texts[lo:lo + _CHUNK_TEXTS]
        stripped = [t.strip() for t in chunk]
        points = np.frombuffer("".join(stripped).encode("utf-32-le"), dtype=np.uint32)
        bits = np.where(points < 0x10000, flags[np.minimum(points, 0xFFFF)], _SOLID | _FOREIGN)
        ends = np.cumsum([len(t) for t in stripped])
        starts = ends - np.array([len(t) for t in stripped], dtype=np.int64)
        for j in range(7):
            running = np.concatenate([[0], np.cumsum((bits & (1 << j)) > 0, dtype=np.int64)])
            out[lo:lo + len(chunk), j] = running[ends] - running[starts]
    return out


def embed_texts(texts, model=None, *, n_components: int = DEFAULT_COMPONENTS, random_state=0,
                batch_size: int = 64) -> np.ndarray:
    """Vectors for texts, computed here: latent semantic analysis, a local sentence model or a callable.

    Parameters
    ----------
    texts : sequence of str
        One text per row; missing values (None, NaN) count as empty texts.
    model : None, str, os.PathLike or callable, default=None
        None: TF-IDF + truncated SVD fitted on `texts` (`lsa_settings`), rows of unit
        length. A folder: a sentence-transformers model saved there (needs
        ``pip install "slicefind[text]"``; nothing is downloaded). A callable: called
        once with the list of texts, it must return an ``(n, d)`` array of finite numbers.
    n_components : int, default=64
        Dimensions of the default embedding (fewer when the vocabulary is smaller).
    random_state : int, default=0
        Seeds the SVD.
    batch_size : int, default=64
        Texts per batch for a sentence model.

    Returns
    -------
    (n, d) float32 array

    Examples
    --------
    >>> vectors = embed_texts(["parcel lost in transit", "parcel lost again", "refund my card",
    ...                        "card refund please"], n_components=2)
    >>> vectors.shape
    (4, 2)
    """
    return _embed(_as_texts(texts, "texts"), model, n_components=n_components,
                  random_state=random_state, batch_size=batch_size)[0]


def _embed(texts: np.ndarray, model, *, n_components: int, random_state, batch_size: int = 64,
           counts: TermCounts | None = None):
    """(vectors, method, model name, vocabulary size); texts already checked."""
    if isinstance(n_components, bool) or not isinstance(n_components, (int, np.integer)) or n_components < 1:
        raise SlicefindValueError(f"n_components must be an integer >= 1; got {n_components!r}.")
    if model is None:
        vectors, vocabulary = _lsa(texts, int(n_components), random_state, counts)
        return vectors, "lsa", None, vocabulary
    if isinstance(model, (str, os.PathLike)):
        return _sentence_model(texts, os.fspath(model), batch_size), "sentence-transformers", os.fspath(model), None
    if callable(model):
        name = getattr(model, "__qualname__", type(model).__name__)
        out = model(list(texts))
        return _check_vectors(out, texts.size, f"text_model {name!r}"), "callable", name, None
    msg = (f"text_model must be None (TF-IDF + SVD), a folder holding a sentence-transformers "
           f"model, or a callable texts -> (n, d) array; got {type(model).__name__}.")
    raise SlicefindTypeError(msg)


def _lsa(texts: np.ndarray, n_components: int, random_state, counts: "TermCounts | None" = None):
    """(vectors, vocabulary size): TF-IDF of the terms in >= 2 texts, truncated SVD, unit rows.

    The same as ``TfidfVectorizer(**s["tfidf"])`` (`lsa_settings`), computed from the
    word counts of `TermCounts`, which the descriptions then reuse.
    """
    from sklearn.decomposition import TruncatedSVD
    from sklearn.preprocessing import normalize

    counts = counts if counts is not None else TermCounts(texts)
    settings = lsa_settings(n_components, random_state)
    weights = counts.tfidf(min_df=settings["tfidf"]["min_df"])
    vocabulary = weights.shape[1]
    k = min(n_components, vocabulary - 1, texts.size - 1)
    if k < 1:
        raise SlicefindValueError(f"the texts hold {vocabulary} distinct word(s) in {texts.size} rows; "
                                  "an embedding needs at least two words and two rows.")
    svd = TruncatedSVD(**{**settings["svd"], "n_components": k})
    vectors = normalize(svd.fit_transform(weights), copy=False)
    return np.ascontiguousarray(vectors, dtype=np.float32), int(vocabulary)


class TermCounts:
    """Word counts of every text (a sparse ``(n, terms)`` matrix), for distinctive terms.

    Words are cut as `TOKEN_PATTERN` cuts them, in lower case.
    """

    def __init__(self, texts):
        from sklearn.feature_extraction.text import CountVectorizer

        texts = np.asarray(texts, dtype=object)
        vectorizer = CountVectorizer(token_pattern=TOKEN_PATTERN, lowercase=True, dtype=np.int32)
        try:
            self.matrix = vectorizer.fit_transform(texts).tocsr()
            self.terms = vectorizer.get_feature_names_out()
        except ValueError:                    # no word at all
            import scipy.sparse as sp

            self.matrix = sp.csr_matrix((texts.size, 0), dtype=np.int32)
            self.terms = np.array([], dtype=object)
        self.total = np.asarray(self.matrix.sum(axis=0), dtype=np.float64).ravel()
        self.document_frequency = np.bincount(self.matrix.indices, minlength=self.terms.size)

    @property
    def n_rows(self) -> int:
        return int(self.matrix.shape[0])

    def tfidf(self, min_df: int = 2):
        """The float32 TF-IDF matrix (sublinear tf, smooth idf, unit rows) of the terms in at
        least `min_df` texts (all terms when fewer than two are): what
        ``TfidfVectorizer(sublinear_tf=True, min_df=min_df, dtype=np.float32)`` gives."""
        from sklearn.feature_extraction.text import TfidfTransformer

        matrix = self.matrix
        kept = np.flatnonzero(self.document_frequency >= min_df)
        if kept.size >= 2:
            matrix = matrix[:, kept]
        return TfidfTransformer(sublinear_tf=True).fit_transform(matrix.astype(np.float32))

    def take(self, rows: np.ndarray) -> "TermCounts":
        """The counts of `rows` only (same terms)."""
        out = object.__new__(TermCounts)
        out.matrix = self.matrix[np.asarray(rows, dtype=np.intp)]
        out.terms = self.terms
        out.total = np.asarray(out.matrix.sum(axis=0), dtype=np.float64).ravel()
        out.document_frequency = np.bincount(out.matrix.indices, minlength=self.terms.size)
        return out

    def distinctive(self, rows: np.ndarray, *, top: int = 10) -> pd.DataFrame:
        """`class_tfidf` of the texts at `rows` against all the others."""
        inside = np.asarray(self.matrix[np.asarray(rows, dtype=np.intp)].sum(axis=0), dtype=np.float64).ravel()
        return class_tfidf(inside, self.total - inside, self.terms, top=top)


def class_tfidf(inside: np.ndarray, rest: np.ndarray, terms: np.ndarray, *, top: int = 10) -> pd.DataFrame:
    """Terms of a slice against the rest, by class-based TF-IDF (Grootendorst 2022, section 3.3).

    `inside` and `rest` are word counts per term. A term's weight is ``tf * log(1 + A /
    f)``: ``tf`` its count in the slice over the slice's words, ``A`` the mean words per
    class, ``f`` its count in both. Terms seen fewer than twice in the slice, or used less
    than `MIN_TERM_LIFT` times as often in it as in the rest (per word), are left out: the
    weight alone ranks words common everywhere ("the", "at") near the top of any large
    slice (the lift floor is our choice, not part of the method). Columns ``term, weight,
    n_slice, n_rest``, largest weight first (ties by term).
    """
    columns = {"term": pd.Series(dtype=object), "weight": pd.Series(dtype=float),
               "n_slice": pd.Series(dtype=np.int64), "n_rest": pd.Series(dtype=np.int64)}
    words = np.array([inside.sum(), rest.sum()])
    if terms.size == 0 or words[0] == 0:
        return pd.DataFrame(columns)
    tf = inside / max(words[0], 1.0)
    freq = inside + rest
    weight = tf * np.log1p(words.mean() / np.maximum(freq, 1e-12))
    keep = (inside >= 2) & (inside / max(words[0], 1) >= MIN_TERM_LIFT * rest / max(words[1], 1))
    order = np.lexsort((terms, -weight))
    order = order[keep[order]][:top]
    return pd.DataFrame({"term": terms[order], "weight": weight[order],
                         "n_slice": inside[order].round().astype(np.int64),
                         "n_rest": rest[order].round().astype(np.int64)})


def _sentence_model(texts: np.ndarray, path: str, batch_size: int) -> np.ndarray:
    if not os.path.isdir(path):
        state = "is a file, not a model folder" if os.path.exists(path) else "does not exist"
        raise SlicefindValueError(f"text_model={path!r} {state}. {_HOW_TO_GET_A_MODEL}")
    try:
        from sentence_transformers import SentenceTransformer
    except ImportError:
        msg = (f"text_model={path!r} needs sentence-transformers: pip install \"slicefind[text]\" "
               "(first the CPU-only torch wheel: pip install torch --index-url "
               "https://download.pytorch.org/whl/cpu).")
        raise SlicefindValueError(msg) from None
    saved = {k: os.environ.get(k) for k in ("HF_HUB_OFFLINE", "TRANSFORMERS_OFFLINE")}
    os.environ.update({k: "1" for k in saved})           # a folder on disk, never the network
    try:
        encoder = SentenceTransformer(path, device="cpu", local_files_only=True)
        out = encoder.encode(list(texts), batch_size=batch_size, show_progress_bar=False,
                             convert_to_numpy=True, normalize_embeddings=True)
    except Exception as exc:  # noqa: BLE001 - any loading failure is the folder's
        raise SlicefindValueError(f"text_model={path!r} could not be loaded as a sentence-transformers "
                                  f"model ({type(exc).__name__}: {exc}). {_HOW_TO_GET_A_MODEL}") from None
    finally:
        for key, value in saved.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value
    return _check_vectors(out, texts.size, f"text_model={path!r}")


def _check_vectors(out, n: int, what: str) -> np.ndarray:
    try:
        vectors = np.asarray(out, dtype=np.float32)
    except (TypeError, ValueError):
        raise SlicefindValueError(f"{what} returned {type(out).__name__}, not an array of numbers.") from None
    if vectors.ndim != 2 or vectors.shape[0] != n or vectors.shape[1] < 1:
        raise SlicefindValueError(f"{what} returned an array of shape {vectors.shape}; it must be ({n}, d).")
    if not np.isfinite(vectors).all():
        raise SlicefindValueError(f"{what} returned non-finite values (NaN or inf).")
    return np.ascontiguousarray(vectors)


def embed_column(texts: np.ndarray, column: str, model=None, *, counts: TermCounts | None = None,
                 n_components: int = DEFAULT_COMPONENTS, random_state=0) -> tuple[np.ndarray, TextEmbedding]:
    """`embed_texts` of a column's texts (from `check_texts`), with a record of how it was done.

    The default embedding reuses `counts` when given.
    """
    start = time.perf_counter()
    vectors, method, name, vocabulary = _embed(texts, model, n_components=n_components,
                                               random_state=random_state, counts=counts)
    record = TextEmbedding(column=column, method=method, model=name, dim=int(vectors.shape[1]),
                           seconds=round(time.perf_counter() - start, 3), vocabulary=vocabulary)
    return vectors, record


def mark_terms(text, terms: Sequence[str], *, limit: int = 4000) -> list[tuple[bool, str]]:
    """Cut `text` into ``(marked, piece)`` pairs, marking the words found in `terms`.

    Words are cut and compared as the TF-IDF does (`TOKEN_PATTERN`, lower case). The
    pieces join back to the text (cut to `limit` characters, with "…" when cut); they are
    plain text, to be escaped by whoever shows them.

    Examples
    --------
    >>> mark_terms("Fwd: parcel LOST", ["lost", "fwd"])
    [(True, 'Fwd'), (False, ': parcel '), (True, 'LOST')]
    """
    text = "" if text is None or (isinstance(text, float) and np.isnan(text)) else str(text)
    if len(text) > limit:
        text = text[:limit] + "…"
    wanted = {str(t).lower() for t in terms}
    pieces: list[tuple[bool, str]] = []
    at = 0
    for match in _TOKEN.finditer(text):
        if match.group().lower() in wanted:
            if match.start() > at:
                pieces.append((False, text[at:match.start()]))
            pieces.append((True, match.group()))
            at = match.end()
    if at < len(text):
        pieces.append((False, text[at:]))
    return pieces

