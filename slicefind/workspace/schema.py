"""The workspace database's schema: its tables, version and migrations."""
from __future__ import annotations

import sqlite3
from typing import Callable

__all__ = ["DB_NAME", "BUSY_TIMEOUT", "BUSY_RETRIES", "SCHEMA_VERSION", "MIGRATIONS", "SCHEMA", "statements"]

#: the database file inside a workspace folder
DB_NAME = "slicefind.sqlite"
#: seconds a write waits for another process's lock (SQLite's busy timeout), per attempt
BUSY_TIMEOUT = 30.0
#: pauses between further attempts when the busy timeout ran out; then WorkspaceBusyError
BUSY_RETRIES = (0.5, 1.0, 2.0)
#: the schema this code writes; older files are migrated by MIGRATIONS, newer ones refused
SCHEMA_VERSION = 1
#: from-version -> function(connection) upgrading a schema by one version, inside a transaction
MIGRATIONS: dict[int, Callable[[sqlite3.Connection], None]] = {}

SCHEMA = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE scans (
    scan_id INTEGER PRIMARY KEY AUTOINCREMENT,
    created_at TEXT NOT NULL,
    library_version TEXT NOT NULL,
    fingerprint TEXT NOT NULL,
    params TEXT NOT NULL,
    n_input_rows INTEGER NOT NULL,
    n_rows INTEGER NOT NULL,
    n_errors INTEGER NOT NULL,
    id_column TEXT,
    error_definition TEXT NOT NULL,
    show TEXT NOT NULL,
    skipped TEXT NOT NULL,
    slice_table BLOB NOT NULL,
    tested_table BLOB NOT NULL
);
CREATE TABLE scan_arrays (
    scan_id INTEGER NOT NULL REFERENCES scans(scan_id),
    name TEXT NOT NULL,
    data BLOB NOT NULL,
    PRIMARY KEY (scan_id, name)
);
CREATE TABLE slice_rows (
    scan_id INTEGER NOT NULL REFERENCES scans(scan_id),
    slice_id TEXT NOT NULL,
    rows BLOB NOT NULL,
    PRIMARY KEY (scan_id, slice_id)
);
CREATE TABLE queues (
    queue_id INTEGER PRIMARY KEY AUTOINCREMENT,
    scan_id INTEGER NOT NULL REFERENCES scans(scan_id),
    created_at TEXT NOT NULL,
    params TEXT NOT NULL,
    batches TEXT NOT NULL,
    n_rows INTEGER NOT NULL,
    n_errors INTEGER NOT NULL,
    strata BLOB NOT NULL,
    rowdata BLOB NOT NULL,
    queue_table BLOB NOT NULL
);
CREATE TABLE queue_order (
    queue_id INTEGER NOT NULL REFERENCES queues(queue_id),
    stratum TEXT NOT NULL,
    rows BLOB NOT NULL,
    PRIMARY KEY (queue_id, stratum)
);
CREATE TABLE reviews (
    event_id INTEGER PRIMARY KEY AUTOINCREMENT,
    scan_id INTEGER NOT NULL REFERENCES scans(scan_id),
    row INTEGER NOT NULL,
    reviewed INTEGER NOT NULL CHECK (reviewed IN (0, 1)),
    tags TEXT NOT NULL,
    note TEXT NOT NULL,
    source TEXT NOT NULL,
    created_at TEXT NOT NULL
);
CREATE INDEX reviews_by_row ON reviews (scan_id, row, event_id);
CREATE TABLE names (
    event_id INTEGER PRIMARY KEY AUTOINCREMENT,
    scan_id INTEGER NOT NULL REFERENCES scans(scan_id),
    slice_id TEXT NOT NULL,
    name TEXT NOT NULL,
    source TEXT NOT NULL,
    created_at TEXT NOT NULL
);
CREATE INDEX names_by_slice ON names (scan_id, slice_id, event_id);
CREATE TABLE artifacts (
    scan_id INTEGER NOT NULL REFERENCES scans(scan_id),
    name TEXT NOT NULL,
    created_at TEXT NOT NULL,
    data BLOB NOT NULL,
    PRIMARY KEY (scan_id, name)
);
CREATE TRIGGER reviews_no_update BEFORE UPDATE ON reviews
    BEGIN SELECT RAISE(ABORT, 'reviews are append-only'); END;
CREATE TRIGGER reviews_no_delete BEFORE DELETE ON reviews
    BEGIN SELECT RAISE(ABORT, 'reviews are append-only'); END;
CREATE TRIGGER names_no_update BEFORE UPDATE ON names
    BEGIN SELECT RAISE(ABORT, 'names are append-only'); END;
CREATE TRIGGER names_no_delete BEFORE DELETE ON names
    BEGIN SELECT RAISE(ABORT, 'names are append-only'); END;
"""


def statements(script: str) -> list[str]:
    """Split a SQL script into complete statements (triggers keep their inner ';')."""
    out, current = [], ""
    for line in script.splitlines(keepends=True):
        current += line
        if sqlite3.complete_statement(current):
            out.append(current.strip())
            current = ""
    return [s for s in out if s]
