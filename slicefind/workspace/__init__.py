"""The workspace: a folder whose ``slicefind.sqlite`` keeps scans, queues, reviews and names.

Everything later steps need is stored, so ``queue`` and ``tally`` work without the
original data file: each scan's parameters, a fingerprint of the data, the library
version, the slice table, every slice's rows, and the per-row arrays (positions, error
flags, labels, predictions, ids, pointer columns). Reviews and names are append-only
events with timestamps: the latest event of a row wins and the history is kept. Every
write is one transaction (SQLite in WAL mode, ``synchronous=FULL``), so a click is
written at once and a killed process loses nothing already committed.

The package: `schema` (tables, version, migrations), `blobs` (arrays, frames and records
stored without pickle) and `store` (the `Workspace` itself).
"""
from __future__ import annotations

from slicefind.workspace.schema import DB_NAME, MIGRATIONS, SCHEMA_VERSION
from slicefind.workspace.stamps import data_fingerprint
from slicefind.workspace.store import Workspace

__all__ = ["Workspace", "data_fingerprint", "DB_NAME", "SCHEMA_VERSION", "MIGRATIONS"]
