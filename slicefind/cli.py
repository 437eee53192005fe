"""The ``slicefind`` command line: scan, queue, tally, report, demo.

Every command works on a *workspace*: a folder holding ``slicefind.sqlite`` (scans,
queue, reviews, names) and the files written for people (``slices.csv``,
``queue.csv``, ``tally.csv``, ``report.html``). Errors print one line,
``slicefind: error: <message>``, and exit 1 (``--debug`` shows the traceback); usage
errors exit 2.
"""
from __future__ import annotations

import argparse
import csv
import dataclasses
import gzip
import os
import sys
import time
from typing import TYPE_CHECKING, Sequence

import numpy as np
import pandas as pd

if TYPE_CHECKING:
    from slicefind.compare import Comparison

__all__ = ["main", "build_parser"]

EXAMPLES = {
    "scan": """examples:
  slicefind scan dev.csv --label label --prediction pred --out ws
  slicefind scan dev.parquet --errors is_wrong --exclude example_id --out ws
  slicefind scan dev.csv --label y --prediction p --embeddings emb.npy --id-column parcel_id --out ws
  slicefind scan scores.csv --loss loss --threshold 0.7 --out ws
  slicefind scan dev.csv --label digit --prediction read_as --scores p0 p1 p2 p3 p4 p5 p6 p7 p8 p9 --out ws
  slicefind scan tickets.csv --label team --prediction routed --text-column message --embed-text --out ws
  slicefind scan tickets.csv --label team --prediction routed --text-column message --embed-text \
      --text-model models/minilm --out ws
  slicefind scan 'logs/*.parquet' --errors wrong --engine dask --out ws
  slicefind scan logs/ --label y --prediction p --engine dask --embeddings emb --out ws
  slicefind scan logs/ --errors wrong --engine dask --scheduler tcp://10.0.0.5:8786 --out ws""",
    "queue": """examples:
  slicefind queue ws                      # 100 errors, 20 of them from no slice
  slicefind queue ws --budget 200 --rest 40
  slicefind queue ws --extend 50          # 50 more, continuing the same order
  slicefind queue ws --extend 50 --adaptive   # 50 more where the reviews so far settle most""",
    "tally": """examples:
  slicefind tally ws ws/queue.csv
  slicefind tally ws reviewed.csv --name R1="smeared ink" --name C2="tape over label\"""",
    "compare": """examples:
  slicefind compare ws --after new_predictions.csv
  slicefind compare ws --after new.parquet --data dev.csv     # also scan the new errors
  slicefind compare ws --after new.csv --id-column parcel_id --prediction-column read_v2""",
    "review": """examples:
  slicefind review ws                     # prints http://127.0.0.1:PORT/TOKEN/
  slicefind review ws --open
  slicefind review ws --images crops.npy --port 8765""",
    "report": """examples:
  slicefind report ws
  slicefind report ws --out /tmp/report.html""",
    "demo": """examples:
  slicefind demo                          # writes ./slicefind-demo
  slicefind demo --out /tmp/depot
  slicefind demo --text                   # the help-desk text demo, ./slicefind-demo-text""",
}


class _Step:
    """Prints '[k/n] what ... 1.2 s' around a step of a long command."""

    def __init__(self, total: int, quiet: bool = False):
        self.total, self.k, self.quiet = total, 0, quiet

    def __call__(self, what: str):
        self.k += 1
        step = self

        class _Ctx:
            def __enter__(self_inner):
                self_inner.start = time.perf_counter()
                if not step.quiet:
                    print(f"[{step.k}/{step.total}] {what} ...", end="", flush=True)
                return self_inner

            def __exit__(self_inner, kind, value, tb):
                if not step.quiet:
                    end = " failed\n" if kind else f" {time.perf_counter() - self_inner.start:.1f} s\n"
                    print(end, end="", flush=True)
        return _Ctx()


def _int_at_least(low: int):
    """An argparse type: an integer >= low (refused before any work is done)."""
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be an integer >= {low}; got {text!r}") from None
        if value < low:
            raise argparse.ArgumentTypeError(f"must be an integer >= {low}; got {text!r}")
        return value
    return parse


def _fraction(*, closed_high: bool = False):
    """An argparse type: a number in (0, 1), or (0, 1] with ``closed_high``."""
    span = "(0, 1]" if closed_high else "(0, 1)"

    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"must be a number in {span}; got {text!r}") from None
        if not (0 < value < 1 or (closed_high and value == 1)):
            raise argparse.ArgumentTypeError(f"must be a number in {span}; got {text!r}")
        return value
    return parse


def _finite(text: str) -> float:
    """An argparse type: a finite number."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number; got {text!r}") from None
    if not np.isfinite(value):
        raise argparse.ArgumentTypeError(f"must be a finite number; got {text!r}")
    return value


def _port(text: str) -> int:
    value = _int_at_least(0)(text)
    if value > 65535:
        raise argparse.ArgumentTypeError(f"must be a port number 0-65535 (0: a free one); got {text!r}")
    return value


def _write_csv(frame: pd.DataFrame, path: str) -> None:
    """A table for people as CSV, its text cells safe to open in a spreadsheet."""
    from slicefind.discovery.table import neutralize_formulas

    neutralize_formulas(frame).to_csv(path, index=False)


def _write_tally_files(result, folder: str) -> None:
    """tally.csv (categories), verdicts.csv (candidates) and relabel.csv (rows tagged as a
    wrong label; only the header when none is) of a Tally, in the workspace folder."""
    _write_csv(result.categories, os.path.join(folder, "tally.csv"))
    _write_csv(result.slices, os.path.join(folder, "verdicts.csv"))
    _write_csv(result.relabel, os.path.join(folder, "relabel.csv"))


_DELIMITERS = (",", ";", "\t", "|")
#: ISO 8601 dates and timestamps, as pandas and most loggers write them
_ISO_STAMP = r"\d{4}-\d{2}-\d{2}([ T]\d{2}:\d{2}(:\d{2}(\.\d+)?)?)?(Z|[+-]\d{2}:?\d{2})?"


def _sniff_delimiter(path: str, default: str) -> str:
    """The delimiter that splits the header line into the most cells (quotes respected)."""
    opener = gzip.open if path.lower().endswith(".gz") else open
    try:
        with opener(path, "rt", encoding="utf-8-sig", errors="replace", newline="") as handle:
            first = handle.readline()
    except OSError:
        return default
    counts = {d: len(next(csv.reader([first], delimiter=d), [])) for d in _DELIMITERS}
    best = max(_DELIMITERS, key=lambda d: (counts[d], d == default))
    return best if counts[best] > counts[default] else default


def _parse_timestamps(frame: pd.DataFrame) -> pd.DataFrame:
    """Text columns whose every value is an ISO date or timestamp, as datetimes."""
    for column in frame.columns:
        series = frame[column]
        if not (pd.api.types.is_object_dtype(series.dtype) or pd.api.types.is_string_dtype(series.dtype)):
            continue
        present = series.dropna()
        if present.empty or not all(isinstance(v, str) for v in present.head(1000)):
            continue
        if not present.astype(str).str.fullmatch(_ISO_STAMP).all():
            continue
        try:
            stamps = pd.to_datetime(series, format="ISO8601")
        except (ValueError, TypeError, OverflowError):
            continue                       # e.g. 2024-13-40 or mixed time zones: stays text
        frame[column] = stamps
    return frame


def _read_table(path, argument: str = "DATA") -> pd.DataFrame:
    """A CSV, TSV or Parquet file as a DataFrame, or a clear error naming the argument.

    CSV files may separate cells with ``,`` ``;`` tab or ``|`` (sniffed from the header
    line); text columns holding only ISO 8601 dates or timestamps are read as datetimes.
    """
    from slicefind.exceptions import SlicefindTypeError, SlicefindValueError

    if not isinstance(path, (str, os.PathLike)):
        raise SlicefindTypeError(f"{argument} must be a file path; got {type(path).__name__}.")
    path = os.fspath(path)
    if not os.path.isfile(path):
        raise SlicefindValueError(f"{argument} file {path!r} does not exist.")
    lower = path.lower()
    if lower.endswith((".parquet", ".pq")):
        return pd.read_parquet(path)
    if lower.endswith((".csv", ".csv.gz", ".tsv", ".txt")):
        sep = _sniff_delimiter(path, "\t" if lower.endswith(".tsv") else ",")
        try:
            frame = pd.read_csv(path, sep=sep)
        except (pd.errors.ParserError, UnicodeDecodeError) as exc:
            raise SlicefindValueError(f"{argument} file {path!r} is not readable CSV: {exc}") from None
        return _parse_timestamps(frame)
    raise SlicefindValueError(f"{argument} file {path!r} must be .csv, .tsv or .parquet.")


def _read_embeddings(path: str, id_column: str | None, frame: pd.DataFrame) -> np.ndarray:
    """Embeddings from .npy, or from a Parquet/CSV file of numeric vector columns."""
    from slicefind.exceptions import SlicefindValueError

    if not os.path.exists(path):
        raise SlicefindValueError(f"--embeddings file {path!r} does not exist.")
    if path.lower().endswith(".npy"):
        return np.load(path, allow_pickle=False)
    vectors = _read_table(path, "--embeddings")
    if id_column and id_column in vectors.columns and id_column in frame.columns:
        ids = vectors[id_column]
        repeated = ids[ids.duplicated(keep=False)]
        if len(repeated):
            first = repeated.iloc[0]
            lines = [int(i) + 2 for i in np.flatnonzero((ids == first).to_numpy())[:3]]
            raise SlicefindValueError(
                f"--embeddings file {path!r} has {int(ids.duplicated().sum())} repeated "
                f"{id_column} value(s), e.g. {first!r} on lines {lines}; each id needs one vector.")
        order = pd.Index(ids).get_indexer(frame[id_column])
        if (order < 0).any():
            missing = frame[id_column].iloc[int(np.flatnonzero(order < 0)[0])]
            raise SlicefindValueError(f"--embeddings file has no vector for {id_column} = {missing!r}.")
        vectors = vectors.iloc[order].drop(columns=[id_column])
    numeric = vectors.select_dtypes("number")
    if numeric.shape[1] == 0:
        raise SlicefindValueError(f"--embeddings file {path!r} has no numeric columns.")
    return numeric.to_numpy(dtype=np.float64)


def _coerce_like(value: str | None, column: pd.Series):
    """A command-line value converted to the type of a label column's values."""
    if value is None:
        return None
    if pd.api.types.is_bool_dtype(column.dtype):
        return value.strip().lower() in ("1", "true", "yes")
    if pd.api.types.is_integer_dtype(column.dtype):
        try:
            return int(value)
        except ValueError:
            return value
    if pd.api.types.is_float_dtype(column.dtype):
        try:
            return float(value)
        except ValueError:
            return value
    return value


def _print_slices(table: pd.DataFrame, n: int) -> None:
    """The top slices as a terminal table."""
    if len(table) == 0:
        print("No slice passes the false discovery rate.")
        return
    shown = table.head(n)
    width = min(70, max(len("description"), int(shown["description"].str.len().max())))
    print(f"{'id':<5} {'description':<{width}} {'rows':>8} {'errors':>7} {'rate [95% interval]':>22} "
          f"{'share':>6} {'q':>8}")
    for _, s in shown.iterrows():
        desc = str(s["description"])
        desc = desc if len(desc) <= width else desc[:width - 1] + "…"
        interval = f"{s['error_rate']:.1%} [{s['ci_low']:.1%}–{s['ci_high']:.1%}]"
        print(f"{s['slice_id']:<5} {desc:<{width}} {int(s['n_rows']):>8,} {int(s['n_errors']):>7,} "
              f"{interval:>22} {s['error_share']:>6.1%} {s['q_value']:>8.2g}")
    if len(table) > n:
        print(f"... {len(table) - n} more in slices.csv")


def _print_confusions(found, n: int = 3) -> None:
    """The commonest confusions among all errors, one line."""
    from slicefind.values import value_text

    conf = found.confusions(top=n)
    if conf.empty:
        return
    names = f"{found.params.get('label_column', 'label')} -> {found.params.get('prediction_column', 'prediction')}"
    parts = [f"{value_text(r.label)} -> {value_text(r.prediction)}: {r.n_errors:,} errors ({r.error_share:.1%} of errors, "
             f"{r.class_rate:.1%} of {value_text(r.label)})" for r in conf.itertuples()]
    print(f"commonest confusions ({names}): " + "; ".join(parts))


def _report_inputs(ws, found, *, tally_result=None, simulated=False):
    """Gather what the report shows from the workspace's stored artifacts."""
    from slicefind.report import ReportInputs

    artifacts = ws.load_artifact("report", default={}) or {}
    descriptions = ws.load_artifact("descriptions", default={}) or {}
    images = None
    image_file = artifacts.get("images")
    if image_file and os.path.exists(image_file):
        images = np.load(image_file, allow_pickle=False, mmap_mode="r")
    texts = paths = None
    frame = found.eval_table.data
    n_input = found.eval_table.n_input_rows
    for kind in ("image_column", "text_column"):
        column = artifacts.get(kind)
        if column and column in frame.columns:
            values = [""] * n_input
            for pos, value in zip(found.eval_table.positions, frame[column].tolist()):
                values[int(pos)] = value
            if kind == "image_column":
                base = artifacts.get("data_folder") or ""
                paths = [v if os.path.isabs(str(v)) else os.path.join(base, str(v)) for v in values]
            else:
                texts = values
    map_xy = ws.load_artifact("map_xy", default=None)
    comparison = None
    stored = ws.load_artifact("compare", default=None)
    if stored:
        from slicefind.compare import Comparison

        comparison = Comparison.from_dict(stored)
        if comparison.params.get("scan_id") != found.extras.get("scan_id"):
            comparison = None                      # made against an earlier scan
    return ReportInputs(map_xy=map_xy, descriptions=descriptions, images=images, image_paths=paths,
                        texts=texts, tally=tally_result, simulated_review=simulated or bool(
                            artifacts.get("simulated_review")), notes=artifacts.get("notes", ()),
                        compare=comparison)


def _write_report(ws, found, out=None, *, tally_result=None, simulated=False) -> str:
    from slicefind.report import write_report

    if tally_result is None and len(ws.reviews()):
        tally_result = ws.tally()
    path = out or os.path.join(ws.path, "report.html")
    return write_report(path, found, _report_inputs(ws, found, tally_result=tally_result,
                                                    simulated=simulated))


def _describe_top(found, text_column=None, n=8):
    """SliceDescriptions of the top slices, for the report and the review page."""
    from slicefind.discovery.describe import describe_slice

    return {sid: describe_slice(found, sid, text_column=text_column)
            for sid in found.table["slice_id"].head(n)}


def _scan(found_kwargs, frame, ws_path, *, show=(), images=None, image_column=None,
          text_column=None, data_folder=None, notes=(), step=None, top=10, quiet=False):
    """Run find_slices, store the scan and what the report needs, write slices.csv."""
    import slicefind as sf
    from slicefind.workspace import Workspace, data_fingerprint

    step = step or _Step(3, quiet)
    clustered = found_kwargs.get("embeddings") is not None or found_kwargs.get("text") is not None
    with step("finding slices (rules" + (" and embedding clusters)" if clustered else ")")):
        found = sf.find_slices(frame, **found_kwargs)
    with step("saving the scan"):
        ws = Workspace(ws_path)
        pointer = tuple(dict.fromkeys([c for c in (*show, image_column, text_column) if c]))
        is_pandas = isinstance(frame, pd.DataFrame)
        ws.save_scan(found, data_fingerprint=data_fingerprint(frame) if is_pandas else None,
                     show=pointer)
        clusters = found.extras.get("clusters")
        map_xy = getattr(clusters, "map_xy", None)
        if map_xy is not None:
            ws.save_artifact("map_xy", np.asarray(map_xy, dtype=np.float32))
        descriptions = {}
        if found.extras.get("items") is not None and found.extras["items"].bits is not None:
            descriptions = _describe_top(found, text_column)
            ws.save_artifact("descriptions", descriptions)
        ws.save_artifact("report", {"images": images, "image_column": image_column,
                                    "text_column": text_column, "data_folder": data_folder,
                                    "notes": list(notes)})
        _write_csv(found.table, os.path.join(ws_path, "slices.csv"))
    if not quiet:
        print(f"{found.n_rows:,} rows, {found.n_errors:,} errors ({found.error_rate:.2%}); "
              f"{len(found.table)} slices pass FDR {found.params['fdr']} of {len(found.tested):,} tested.")
        _print_slices(found.table, top)
        _print_words(descriptions, text_column or found.params.get("text"))
        _print_confusions(found)
        if found.eval_table.skipped:
            skipped = ", ".join(f"{c} ({r})" for c, r in list(found.eval_table.skipped.items())[:6])
            print(f"not mined: {skipped}")
    return ws, found


def _print_words(descriptions, column, top: int = 6) -> None:
    """The distinctive words of each described slice's texts, one line per slice."""
    lines = [f"  {sid:5} {', '.join(d.terms['term'].head(top))}" for sid, d in descriptions.items()
             if getattr(d, "terms", None) is not None and len(d.terms)]
    if lines:
        print(f"distinctive words of {column} (against the other rows):")
        print("\n".join(lines))


def _read_dask(pattern: str, scheduler: str | None):
    """A dask DataFrame from Parquet files (a folder or a glob) and a client to count on."""
    from slicefind.exceptions import SlicefindValueError

    try:
        import dask.dataframe as dd
        from distributed import Client
    except ImportError:
        raise SlicefindValueError('--engine dask needs dask: pip install "slicefind[dask]"') from None
    import glob as _glob

    if not (os.path.isdir(pattern) or _glob.glob(pattern)):
        raise SlicefindValueError(f"DATA {pattern!r} matches no file or folder.")
    frame = dd.read_parquet(pattern)
    return frame, (Client(scheduler) if scheduler else None)


def _npy_rows(path: str, start: int, stop: int) -> np.ndarray:
    """Rows start:stop of a .npy file (read on a Dask worker)."""
    return np.array(np.load(path, mmap_mode="r", allow_pickle=False)[start:stop])


def _dask_embeddings(value: str, frame):
    """--embeddings with --engine dask: a .npy file (a dask array whose pieces the workers
    read from the file themselves, so it must be on a path they see) or the name of the
    data's vector column (or several comma-separated columns, one per dimension)."""
    from slicefind.exceptions import SlicefindValueError

    if os.path.exists(value):
        if not value.lower().endswith(".npy"):
            raise SlicefindValueError(f"--embeddings {value!r}: with --engine dask give a .npy file "
                                      "or name the data's vector column(s).")
        import dask
        import dask.array as da

        path = os.path.abspath(value)
        header = np.load(path, mmap_mode="r", allow_pickle=False)
        if header.ndim != 2:
            raise SlicefindValueError(f"--embeddings {value!r} holds an array of shape {header.shape}; "
                                      "it must be (n_rows, d).")
        step = max(1, 2**27 // max(1, header.shape[1] * header.dtype.itemsize))   # ~128 MB pieces
        pieces = [da.from_delayed(dask.delayed(_npy_rows)(path, a, min(a + step, header.shape[0])),
                                  shape=(min(a + step, header.shape[0]) - a, header.shape[1]),
                                  dtype=header.dtype)
                  for a in range(0, header.shape[0], step)]
        return da.concatenate(pieces) if pieces else da.zeros((0, header.shape[1]))
    names = [v.strip() for v in value.split(",") if v.strip()]
    missing = [v for v in names if v not in frame.columns]
    if missing or not names:
        from slicefind.exceptions import did_you_mean

        raise SlicefindValueError(f"--embeddings {value!r} is neither a file nor a column of DATA."
                                  f"{did_you_mean(missing[0], frame.columns) if missing else ''}")
    return names[0] if len(names) == 1 else names


def _text_options(args) -> dict:
    """find_slices' text= options from --embed-text, --text-model and --no-text-features."""
    from slicefind.exceptions import SlicefindValueError

    if not args.embed_text:
        given = [o for o, v in (("--text-model", args.text_model), ("--no-text-features", args.no_text_features)) if v]
        if given:
            raise SlicefindValueError(f"{given[0]} needs --embed-text (and --text-column COL).")
        return {}
    if not args.text_column:
        raise SlicefindValueError("--embed-text needs --text-column COL, the column of text to embed.")
    if args.engine == "dask":
        raise SlicefindValueError("--embed-text runs in memory; with --engine dask, compute the vectors "
                                  "first and pass --embeddings.")
    return {"text": args.text_column, "text_model": args.text_model,
            "text_features": not args.no_text_features}


def cmd_scan(args) -> int:
    text_kwargs = _text_options(args)          # checked before the data is read
    client = None
    if args.engine == "dask":
        frame, client = _read_dask(args.data, args.scheduler)
        emb = _dask_embeddings(args.embeddings, frame) if args.embeddings else None
        label_col = pd.Series(dtype=frame.dtypes[args.label]) if args.label in frame.columns else \
            pd.Series(dtype=object)
    else:
        frame = _read_table(args.data)
        emb = _read_embeddings(args.embeddings, args.id_column, frame) if args.embeddings else None
        label_col = frame[args.label] if args.label in frame.columns else pd.Series(dtype=object)
    kwargs = dict(label=args.label, prediction=args.prediction, errors=args.errors, loss=args.loss,
                  threshold=args.threshold, embeddings=emb, exclude=tuple(args.exclude),
                  max_terms=args.max_terms, min_rows=args.min_rows, fdr=args.fdr,
                  random_state=args.seed, error_kind=args.error_kind,
                  positive=_coerce_like(args.positive, label_col),
                  true_class=_coerce_like(args.true_class, label_col),
                  id_column=args.id_column, clusters=args.clusters, max_share=args.max_share,
                  mine_label=not args.no_label_items,
                  engine="bitset" if args.engine == "dask" else args.engine)
    if client is not None:
        kwargs["client"] = client
    kwargs.update(text_kwargs)
    if args.scores:                 # one column: the predicted class's probability
        kwargs["scores"] = args.scores[0] if len(args.scores) == 1 else list(args.scores)
    images = os.path.abspath(args.images) if args.images else None
    _scan(kwargs, frame, args.out, show=tuple(args.show), images=images,
          image_column=args.image_column, text_column=args.text_column,
          data_folder=os.path.dirname(os.path.abspath(args.data)), top=args.top)
    print(f"workspace: {args.out} (slices.csv); next: slicefind queue {args.out}")
    return 0


def cmd_queue(args) -> int:
    import slicefind as sf
    from slicefind.exceptions import SlicefindValueError
    from slicefind.workspace import Workspace

    if args.adaptive and not args.extend:
        raise SlicefindValueError("--adaptive needs --extend N: it chooses where N more reviews of "
                                  "the stored queue go.")
    if args.threshold is not None and not args.adaptive:
        raise SlicefindValueError("--threshold only applies with --extend N --adaptive (the verdicts "
                                  "it settles first).")
    ws = Workspace(args.workspace, create=False)
    found = ws.load_found()
    path = os.path.join(ws.path, "queue.csv")
    step = None
    if args.extend:
        current = None
        if args.adaptive:
            current = ws.tally(threshold=0.5 if args.threshold is None else args.threshold)
            if current.summary["n_reviewed"] == 0:
                raise SlicefindValueError(f"--adaptive needs reviews, and no row of the stored queue is "
                                          f"reviewed yet; import a filled sheet first (slicefind tally "
                                          f"{args.workspace} SHEET.csv), or extend without --adaptive.")
        queue = ws.load_queue().extend(args.extend, adaptive=current)
        ws.save_queue(queue, replace=True)
        if args.adaptive:
            step = queue.params["extensions"][-1]
    else:
        queue = sf.build_queue(found, budget=args.budget, rest=args.rest, top=args.top,
                               random_state=args.seed, show=ws.stored_columns())
        ws.save_queue(queue, replace=args.force)
    queue.to_csv(path, reviews=ws.reviews(), overwrite=True)
    print(f"queue: {len(queue)} errors in {len(queue.strata)} strata -> {path}")
    print(queue.strata[["stratum", "n_errors", "n_queued", "description"]].to_string(index=False))
    if step is not None:
        strata = list(queue.strata["stratum"])
        why = pd.DataFrame({
            "stratum": strata,
            "verdict": [step["verdicts"].get(s, "-") for s in strata],
            "more_needed": [str(step["more_needed"][s]) if s in step["more_needed"] else "-" for s in strata],
            "undecided": [step["undecided"].get(s, 0) for s in strata],
            "neyman": [step["neyman"].get(s, 0) for s in strata],
            "added": [step["allocated"].get(s, 0) for s in strata],
            "spread": [f"{step['spread'][s]:.3f}" for s in strata]})
        print(f"\nadaptive: {step['n']} more ({step['rule']}); 'undecided' settles a candidate's "
              "verdict, 'neyman' goes by errors x spread (S_h) of the tags so far")
        print(why.to_string(index=False))
    print(f"fill in 'reviewed' and 'tags' (several as a;b), then: slicefind tally {args.workspace} {path}")
    return 0


def _parse_names(pairs: Sequence[str]) -> dict[str, str]:
    from slicefind.exceptions import SlicefindValueError

    names = {}
    for pair in pairs:
        if "=" not in pair:
            raise SlicefindValueError(f"--name {pair!r} must look like R1=\"smeared ink\".")
        key, value = pair.split("=", 1)
        names[key.strip()] = value.strip().strip('"').strip("'")
    return names


def _parse_together(groups: Sequence[str]) -> list[list[str]]:
    """--together values ('A,B') as lists of category names."""
    from slicefind.exceptions import SlicefindValueError

    out = []
    for group in groups:
        names = [n.strip().strip('"').strip("'") for n in group.split(",")]
        if len(names) < 2 or not all(names):
            raise SlicefindValueError(f"--together {group!r} must name two or more categories "
                                      "separated by commas, e.g. --together \"faded ink,torn label\".")
        out.append(names)
    return out


def _range(low: float, high: float, digits: int = 1) -> str:
    return f"[{low:.{digits}%}–{high:.{digits}%}]"


def _print_tally(result, together: Sequence[Sequence[str]] = ()) -> None:
    import textwrap

    from slicefind.decision import decision_paragraphs
    from slicefind.review.tally import WRONG_LABEL

    cats = result.categories
    print(f"{'category':<28} {'tagged':>6} {'share of errors [95%]':>26} {'error rate if fixed':>20}")
    for _, c in cats.iterrows():
        share = f"{c['share']:.1%} {_range(c['share_low'], c['share_high'])}"
        print(f"{str(c['category'])[:28]:<28} {int(c['n_tagged']):>6} {share:>26} {c['headroom']:>20.2%}")
    summary = result.summary
    if summary.get("n_wrong_label"):
        print(f"{WRONG_LABEL}: error rate with the labels corrected "
              f"{summary['corrected_error_rate']:.2%} "
              f"{_range(summary['corrected_error_rate_low'], summary['corrected_error_rate_high'], 2)}, "
              f"against {summary['error_rate']:.2%} measured; rows in relabel.csv")
    if len(result.slices):
        print()
        print(f"{'slice':<6} {'name':<24} {'reviewed':>8} {'precision [95%]':>22} {'verdict':>10} {'more':>5}")
        for _, s in result.slices.iterrows():
            prec = ("" if pd.isna(s["precision"]) else
                    f"{s['precision']:.0%} {_range(s['precision_low'], s['precision_high'], 0)}")
            more = "" if pd.isna(s["more_needed"]) else str(int(s["more_needed"]))
            print(f"{s['slice_id']:<6} {str(s['name'])[:24]:<24} {int(s['n_reviewed']):>8} {prec:>22} "
                  f"{s['verdict']:>10} {more:>5}")
    groups = [result.combined(g) for g in together]
    pairs = result.pairs(top=4) if len(result.user_categories()) >= 2 else None
    if groups or (pairs is not None and len(pairs)):
        print()
        print(f"{'fixed together':<40} {'share of errors [95%]':>24} {'overlap':>8} {'error rate if fixed':>20}")
        lines = [(g.as_dict()) for g in groups]
        if pairs is not None:
            lines += [{**p, "categories": f"{p['category_a']} + {p['category_b']}"}
                      for p in pairs.to_dict("records")]
        for line in lines:
            share = f"{line['share']:.1%} {_range(line['share_low'], line['share_high'])}"
            fixed = f"{line['headroom']:.2%} {_range(line['headroom_low'], line['headroom_high'], 2)}"
            print(f"{str(line['categories'])[:40]:<40} {share:>24} {line['overlap']:>8.1%} {fixed:>20}")
    print()
    print("In plain words:")
    for paragraph in decision_paragraphs(result):
        print(textwrap.fill(paragraph, width=100, initial_indent="- ", subsequent_indent="  "))


def cmd_tally(args) -> int:
    from slicefind.workspace import Workspace

    ws = Workspace(args.workspace, create=False)
    names = {sid: ws.check_name(sid, name) for sid, name in _parse_names(args.name).items()}
    together = _parse_together(args.together)
    if together:                  # check the groups against the tally the import would give
        preview = ws.tally(threshold=args.threshold, names=names,
                           reviews=ws.preview_import(args.reviewed, trust_order=args.trust_order))
        for group in together:
            preview.check_categories(group, argument="--together")
    counts = ws.import_sheet(args.reviewed, trust_order=args.trust_order)   # checked first, one transaction
    for slice_id, name in names.items():
        ws.set_name(slice_id, name, source="cli")
    result = ws.tally(threshold=args.threshold)
    _write_tally_files(result, ws.path)
    report = _write_report(ws, ws.load_found(), tally_result=result)
    print(f"imported {counts['recorded']} new review events ({counts['unchanged']} unchanged, "
          f"{counts['blank']} blank lines; a blank line leaves its row as it was, "
          "reviewed = no withdraws a review)")
    _print_tally(result, together)
    print(f"tally.csv, verdicts.csv, relabel.csv and {report} written")
    return 0


def run_compare(workspace_path, after_path, *, data_path=None, id_column=None,
                prediction_column=None, out_csv=None) -> Comparison:
    """`compare` for the command line: new predictions from a file, matched to the scan by id.

    Reads the after file (CSV, TSV or Parquet), matches its rows to the workspace's latest
    scan by the scan's id column (or ``id_column``), compares with the stored predictions
    (and the workspace's review categories), and writes the table to ``compare.csv`` in the
    workspace (and the new slices to ``compare_new_slices.csv`` when ``data_path`` is given).
    Without an id column the file's rows are taken in order and must number exactly the
    scanned frame's rows.

    Parameters
    ----------
    workspace_path : str or os.PathLike
        A workspace folder holding a scan.
    after_path : str or os.PathLike
        The new predictions: an id column and one prediction column (error flags, when the
        scan has no labels).
    data_path : str or os.PathLike, optional
        The scanned data file; enables the after scan (new slices).
    id_column : str, optional
        The id column of the after file; default the scan's.
    prediction_column : str, optional
        The prediction column of the after file; default its one column besides the id.
    out_csv : str or os.PathLike, optional
        Where to write the table; default ``WORKSPACE/compare.csv``.

    Returns
    -------
    Comparison
        ``params`` add ``matched_by``, ``prediction_column``, ``after_path``, ``out_csv``.

    Raises
    ------
    SlicefindValueError
        When ids are missing from the file, duplicated in it, or not rows of the scan (each
        with examples), and for any bad input `compare` refuses.
    """
    from slicefind.compare import COMPARE_CSV, NEW_SLICES_CSV, check_data, compare, match_after
    from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
    from slicefind.workspace import DB_NAME, Workspace

    if not isinstance(workspace_path, (str, os.PathLike)):
        raise SlicefindTypeError(f"workspace_path must be a folder path; got {type(workspace_path).__name__}.")
    folder = os.fspath(workspace_path)
    if not os.path.isfile(os.path.join(folder, DB_NAME)):
        msg = f"{folder!r} is not a workspace (no {DB_NAME} in it); run slicefind scan first."
        raise SlicefindValueError(msg)
    for name, value in (("id_column", id_column), ("prediction_column", prediction_column)):
        if value is not None and not isinstance(value, str):
            raise SlicefindTypeError(f"{name} must be a column name; got {type(value).__name__}.")
    after = _read_table(after_path, "--after")
    data = _read_table(data_path, "--data") if data_path is not None else None
    with Workspace(folder) as ws:
        found = ws.load_found()
        if data is not None:
            check_data(data, found.eval_table)
        values, info = match_after(found, after, id_column=id_column,
                                    prediction_column=prediction_column, data=data)
        result = compare(ws, after=values, data=data)
    out = os.fspath(out_csv) if out_csv is not None else os.path.join(folder, COMPARE_CSV)
    _write_csv(result.table, out)
    written = [out]
    if data is not None:
        new_path = os.path.join(os.path.dirname(os.path.abspath(out)), NEW_SLICES_CSV)
        _write_csv(result.new_slices, new_path)
        written.append(new_path)
    params = {**result.params, **info, "after": f"file {os.fspath(after_path)!r}",
              "after_path": os.fspath(after_path), "out_csv": out, "written": written}
    return dataclasses.replace(result, params=params)


def cmd_compare(args) -> int:
    from slicefind.compare import format_comparison
    from slicefind.workspace import Workspace

    result = run_compare(args.workspace, args.after, data_path=args.data, id_column=args.id_column,
                         prediction_column=args.prediction_column)
    print(format_comparison(result, top=args.top))
    ws = Workspace(args.workspace, create=False)
    ws.save_artifact("compare", result.to_dict())
    report = _write_report(ws, ws.load_found())
    print(f"{', '.join(result.params['written'])} and {report} written")
    return 0


def cmd_review(args) -> int:
    from slicefind.page.server import serve

    serve(args.workspace, port=args.port, open_browser=args.open, images=args.images,
          image_column=args.image_column, text_column=args.text_column,
          image_folders=tuple(args.image_folder))
    return 0


def cmd_report(args) -> int:
    from slicefind.workspace import Workspace

    ws = Workspace(args.workspace, create=False)
    path = _write_report(ws, ws.load_found(), args.out)
    print(f"report: {path}")
    return 0


def cmd_demo(args) -> int:
    out = args.out or ("slicefind-demo-text" if args.text else "slicefind-demo")
    os.makedirs(out, exist_ok=True)
    start = time.perf_counter()
    step = _Step(7)
    ws_path = os.path.join(out, "workspace")
    for suffix in ("", "-wal", "-shm"):          # a fresh workspace every run
        if os.path.exists(os.path.join(ws_path, "slicefind.sqlite" + suffix)):
            os.remove(os.path.join(ws_path, "slicefind.sqlite" + suffix))
    if args.text:
        from slicefind.demotext import make_helpdesk

        with step(f"building the text demo ({args.rows:,} help-desk messages routed by a text classifier)"):
            demo = make_helpdesk(args.rows, random_state=args.seed)
            demo.frame.to_csv(os.path.join(out, "helpdesk.csv"), index=False)
        kwargs = dict(label="team", prediction="routed", text="message", id_column="ticket_id",
                      random_state=args.seed)
        scenario = ("Demo data: a home-internet help desk whose router sends customer messages to five "
                    "teams (invented messages from templates, a TF-IDF + logistic-regression router).")
        shown = dict(text_column="message")
    else:
        from slicefind.demodata import make_depot

        with step(f"building the demo dev set ({args.rows:,} parcels read by a digit classifier)"):
            demo = make_depot(args.rows, random_state=args.seed)
            demo.frame.to_csv(os.path.join(out, "depot.csv"), index=False)
            np.save(os.path.join(out, "embeddings.npy"), demo.embeddings)
            np.save(os.path.join(out, "images.npy"), demo.images.astype(np.float32))
        kwargs = dict(label="label", prediction="pred", embeddings=demo.embeddings,
                      id_column="parcel_id", random_state=args.seed)
        scenario = ("Demo data: a parcel depot reading handwritten digits (scikit-learn's bundled digits, "
                    "augmented and degraded on purpose).")
        shown = dict(images=os.path.abspath(os.path.join(out, "images.npy")))
    notes = (scenario + " Planted: " + "; ".join(
        f"{p.name} ({p.rows.size} rows, recorded in {', '.join(p.columns) if p.columns else 'no column'})"
        for p in demo.planted.values()),)
    ws, found = _scan(kwargs, demo.frame, ws_path, notes=notes, step=step, **shown)
    report, result = _simulated_loop(ws, found, demo, out, seed=args.seed, step=step)
    print()
    print("Tally from the SIMULATED reviewer (demo only):")
    _print_tally(result)
    print(f"\ndemo finished in {time.perf_counter() - start:.1f} s; report: {os.path.abspath(report)}")
    return 0


def _simulated_loop(ws, found, demo, out, *, seed, step):
    """The demo after its scan: queue, the simulated reviewer's tags and names, tally, report."""
    import slicefind as sf
    from slicefind.demodata import simulated_reviews
    from slicefind.review.tally import normalize_tag

    with step("drawing the review queue (100 errors)"):
        queue = sf.build_queue(found, budget=100, rest=20, random_state=seed)
        ws.save_queue(queue)
        queue.to_csv(os.path.join(ws.path, "queue.csv"), overwrite=True)
    with step("SIMULATED reviewer tags the queue from the planted ground truth"):
        sheet = simulated_reviews(queue, demo.planted)
        sheet_path = os.path.join(out, "reviewed_simulated.csv")
        _write_csv(sheet, sheet_path)
        ws.import_sheet(sheet_path, source="simulated reviewer")
        by_stratum = queue.table.set_index("row")["stratum"]
        for stratum, group in sheet.assign(stratum=sheet["row"].map(by_stratum)).groupby("stratum"):
            tags = [t for cell in group["tags"] for t in cell.split(";") if t]
            if stratum != "rest" and tags:
                ws.set_name(stratum, normalize_tag(pd.Series(tags).mode().iloc[0]), source="simulated reviewer")
    with step("tally and report"):
        result = ws.tally()
        _write_tally_files(result, ws.path)
        ws.save_artifact("report", {**ws.load_artifact("report", default={}), "simulated_review": True})
        report = _write_report(ws, found, tally_result=result, simulated=True)
    return report, result


def _add_scan_options(p):
    p.add_argument("data", help="the eval table (.csv or .parquet), one row per dev example")
    p.add_argument("--out", required=True, metavar="WORKSPACE", help="workspace folder to write")
    how = p.add_argument_group("which rows are errors (one of)")
    how.add_argument("--label", help="true label column")
    how.add_argument("--prediction", help="predicted label column (with --label)")
    how.add_argument("--errors", help="boolean/0-1 column, true for an error")
    how.add_argument("--loss", help="per-row loss column (with --threshold)")
    how.add_argument("--threshold", type=_finite, help="a row is an error when loss > threshold")
    p.add_argument("--error-kind", default="all", choices=("all", "false_positive", "false_negative"))
    p.add_argument("--positive", help="the positive class for --error-kind")
    p.add_argument("--true-class", help="explain only errors on rows of this true class")
    p.add_argument("--embeddings", metavar="FILE", help="(n, d) vectors: .npy, or .parquet/.csv of numeric "
                   "columns; with --engine dask a .npy file or the data's vector column(s), COL[,COL...]")
    p.add_argument("--exclude", nargs="*", default=[], metavar="COL", help="columns never mined")
    p.add_argument("--scores", nargs="+", default=None, metavar="COL",
                   help="model probabilities for the label check (suspected label mistakes, ids L1, "
                        "...): one column, the predicted class's probability, or one column per "
                        "class in the sorted order of the class values; never mined")
    p.add_argument("--id-column", metavar="COL", help="the column identifying examples")
    p.add_argument("--show", nargs="*", default=[], metavar="COL", help="columns to carry onto the review sheet")
    p.add_argument("--images", metavar="FILE.npy", help="pixel arrays (n, h, w) for thumbnails")
    p.add_argument("--image-column", metavar="COL", help="column of image file paths for thumbnails")
    p.add_argument("--text-column", metavar="COL", help="free-text column to show and describe")
    p.add_argument("--embed-text", action="store_true",
                   help="with --text-column: cluster vectors computed from the text (TF-IDF + SVD unless "
                        "--text-model) and mine its surface features (length, digits, URL, ...)")
    p.add_argument("--text-model", metavar="PATH",
                   help="with --embed-text: a sentence-transformers model folder on disk (pip install "
                        "\"slicefind[text]\"); nothing is downloaded")
    p.add_argument("--no-text-features", action="store_true",
                   help="with --embed-text: do not mine the text's surface features")
    p.add_argument("--max-terms", type=_int_at_least(1), default=3, help="most conditions per rule (default 3)")
    p.add_argument("--min-rows", type=_int_at_least(1), default=None, help="fewest rows per slice (default max(20, 0.5%%))")
    p.add_argument("--fdr", type=_fraction(), default=0.05, help="false discovery rate (default 0.05)")
    p.add_argument("--max-share", type=_fraction(closed_high=True), default=0.5,
                   help="largest share of the rows a listed slice may hold (default 0.5)")
    p.add_argument("--no-label-items", action="store_true",
                   help="do not mine the --label column (by default per-class slices compete too)")
    p.add_argument("--clusters", default="both", choices=("both", "regions", "error_modes", "none"))
    p.add_argument("--engine", default="bitset", choices=("bitset", "mlxtend", "dask"),
                   help="bitset (in memory, default), mlxtend (reference), dask (DATA: Parquet folder or glob)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="with --engine dask: a running Dask scheduler "
                   "(default: a local cluster of 2 worker processes)")
    p.add_argument("--seed", type=_int_at_least(0), default=0, help="random_state (default 0)")
    p.add_argument("--top", type=_int_at_least(1), default=10, help="slices to print (default 10)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="slicefind", description="Find where a model errs, test it against chance, and tally a review.")
    parser.add_argument("--debug", action="store_true", help="show tracebacks")
    from slicefind import __version__
    parser.add_argument("--version", action="version", version=f"slicefind {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    fmt = argparse.RawDescriptionHelpFormatter

    p = sub.add_parser("scan", help="find slices and write a workspace", epilog=EXAMPLES["scan"],
                       formatter_class=fmt)
    _add_scan_options(p)
    p.set_defaults(func=cmd_scan)

    p = sub.add_parser("queue", help="draw the review sample (WORKSPACE/queue.csv)",
                       epilog=EXAMPLES["queue"], formatter_class=fmt)
    p.add_argument("workspace")
    p.add_argument("--budget", type=_int_at_least(1), default=100, help="errors to queue (default 100)")
    p.add_argument("--rest", type=_int_at_least(0), default=20, help="of which from no slice (default 20)")
    p.add_argument("--top", type=_int_at_least(1), default=None, help="slices to queue as strata")
    p.add_argument("--seed", type=_int_at_least(0), default=0)
    p.add_argument("--extend", type=_int_at_least(0), default=0, metavar="N", help="add N more to the stored queue")
    p.add_argument("--adaptive", action="store_true",
                   help="with --extend: send the N where the stored reviews say they settle most "
                        "(undecided candidates first, then Neyman allocation)")
    p.add_argument("--threshold", type=_fraction(), default=None,
                   help="with --adaptive: precision the verdicts compare with (default 0.5, as tally)")
    p.add_argument("--force", action="store_true", help="replace a stored queue")
    p.set_defaults(func=cmd_queue)

    p = sub.add_parser("tally", help="import reviews; write tally.csv, verdicts.csv, report",
                       epilog=EXAMPLES["tally"], formatter_class=fmt)
    p.add_argument("workspace")
    p.add_argument("reviewed", help="the filled review sheet (CSV)")
    p.add_argument("--name", action="append", default=[], metavar='ID="NAME"',
                   help="name a slice's category, e.g. R1=\"smeared ink\" (repeatable)")
    p.add_argument("--threshold", type=_fraction(), default=0.5, help="precision a verdict compares with")
    p.add_argument("--together", action="append", default=[], metavar='"A,B"',
                   help="categories fixed together: the share of errors tagged with any of them "
                        "(repeatable)")
    p.add_argument("--trust-order", action="store_true",
                   help="import a sheet whose tags column looks sorted on its own (see read_reviews)")
    p.set_defaults(func=cmd_tally)

    p = sub.add_parser("review", help="review the queue in a local web page (127.0.0.1 only)",
                       epilog=EXAMPLES["review"], formatter_class=fmt)
    p.add_argument("workspace")
    p.add_argument("--port", type=_port, default=0, help="port on 127.0.0.1 (default: a free one)")
    p.add_argument("--open", action="store_true", help="open the page in the default browser")
    p.add_argument("--images", default=None, help=".npy of pixel arrays, one per data row (default: the scan's)")
    p.add_argument("--image-column", default=None, help="stored column of image paths (default: the scan's)")
    p.add_argument("--text-column", default=None, help="stored column of text to show (default: the scan's)")
    p.add_argument("--image-folder", action="append", default=[], metavar="DIR",
                   help="another folder image paths may point into (repeatable)")
    p.set_defaults(func=cmd_review)

    p = sub.add_parser("compare", help="before/after on the same rows: compare.csv and a report section",
                       epilog=EXAMPLES["compare"], formatter_class=fmt)
    p.add_argument("workspace")
    p.add_argument("--after", required=True, metavar="FILE",
                   help="new predictions (.csv/.parquet): the id column and one prediction column "
                        "(error flags when the scan had no labels)")
    p.add_argument("--data", metavar="DATA", help="the scanned data file; also scans the new errors for new slices")
    p.add_argument("--id-column", metavar="COL", help="id column of the --after file (default: the scan's)")
    p.add_argument("--prediction-column", metavar="COL",
                   help="prediction column of the --after file (default: its only other column)")
    p.add_argument("--top", type=_int_at_least(1), default=15, help="lines to print (default 15)")
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser("report", help="(re)write WORKSPACE/report.html", epilog=EXAMPLES["report"],
                       formatter_class=fmt)
    p.add_argument("workspace")
    p.add_argument("--out", default=None, help="write the report here instead")
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("demo", help="the whole loop on built-in data (parcel digits; --text: help-desk messages)", epilog=EXAMPLES["demo"],
                       formatter_class=fmt)
    p.add_argument("--out", default=None,
                   help="folder to write (default ./slicefind-demo, or ./slicefind-demo-text with --text)")
    p.add_argument("--text", action="store_true",
                   help="the help-desk text demo: messages routed to teams, embeddings from the text")
    p.add_argument("--rows", type=_int_at_least(100), default=6000, help="dev-set size (default 6000)")
    p.add_argument("--seed", type=_int_at_least(0), default=0)
    p.set_defaults(func=cmd_demo)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point: returns the exit code (0 ok, 1 failure, 2 usage)."""
    from slicefind.exceptions import SlicefindError

    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        print("slicefind: interrupted", file=sys.stderr)
        return 1
    except BrokenPipeError:
        # the reader went away (`slicefind tally ... | head`): everything was written before
        # printing; stop quietly, and keep Python from complaining when it flushes stdout
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1
    except (SlicefindError, ValueError, TypeError, OSError, KeyError) as error:
        if args.debug:
            raise
        message = str(error) if not isinstance(error, KeyError) else f"missing {error}"
        print(f"\nslicefind: error: {message}", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
