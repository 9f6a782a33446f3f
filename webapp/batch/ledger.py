"""The batch ledger: one SQLite file in the output folder, written by the batch's client only.

Per output name it records the source (path, sha256), the hash of the options that made it
(:func:`options_hash`), the state, the figures, the output's sha256 (and its size and mtime, to
notice a file changed behind the ledger's back without hashing it again) and the attempts.
Workers never open it, so it works the same when the output folder is on a network share.

States: ``running`` (submitted; found at start it means the last run was interrupted and the
file is done again), ``done``, ``failed``.
"""

import hashlib
import json
import os
import sqlite3
import time

from .. import __version__

__all__ = ["Ledger", "LEDGER_NAME", "options_hash"]

LEDGER_NAME = "rateferry-batch.sqlite"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS files (
    output_name TEXT PRIMARY KEY,
    source_path TEXT NOT NULL,
    source_sha256 TEXT,
    options_hash TEXT NOT NULL,
    state TEXT NOT NULL,
    message TEXT,
    figures_json TEXT,
    output_sha256 TEXT,
    output_size INTEGER,
    output_mtime_ns INTEGER,
    attempts INTEGER NOT NULL DEFAULT 0,
    updated REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    started REAL NOT NULL,
    finished REAL,
    summary_json TEXT
);
"""


def options_hash(job):
    """What makes the output's bytes, apart from the source: spec, rate, delivery, block size,
    output format and the software version (it is written into the file's comment tag)."""
    data = dict(spec=job.spec.to_dict(), fs_out=job.fs_out, delivery=job.delivery.to_dict(),
                block_frames=job.block_frames, format=job.output.format,
                subtype=job.output.subtype, version=__version__)
    text = json.dumps(data, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


class Ledger:
    """The ledger of the output folder ``folder`` (created on first use)."""

    def __init__(self, folder):
        self.path = os.path.join(folder, LEDGER_NAME)
        self.conn = sqlite3.connect(self.path, timeout=30.0)
        self.conn.row_factory = sqlite3.Row
        self.conn.execute("PRAGMA journal_mode=WAL")
        self.conn.execute("PRAGMA synchronous=NORMAL")
        self.conn.executescript(_SCHEMA)
        self.conn.commit()

    def close(self):
        self.conn.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def get(self, output_name):
        row = self.conn.execute("SELECT * FROM files WHERE output_name=?",
                                (output_name,)).fetchone()
        if row is None:
            return None
        out = dict(row)
        out["figures"] = json.loads(row["figures_json"]) if row["figures_json"] else None
        return out

    def rows(self):
        return [self.get(r["output_name"]) for r in
                self.conn.execute("SELECT output_name FROM files ORDER BY output_name")]

    def mark_running(self, output_name, *, source_path, options_hash):
        self.conn.execute(
            "INSERT INTO files (output_name, source_path, options_hash, state, attempts, updated)"
            " VALUES (?, ?, ?, 'running', 1, ?) ON CONFLICT(output_name) DO UPDATE SET "
            "source_path=excluded.source_path, options_hash=excluded.options_hash, "
            "state='running', message=NULL, attempts=attempts+1, updated=excluded.updated",
            (output_name, source_path, options_hash, time.time()))
        self.conn.commit()

    def mark_done(self, output_name, *, source_path, options_hash, figures, output_path):
        st = os.stat(output_path)
        self.conn.execute(
            "INSERT INTO files (output_name, source_path, source_sha256, options_hash, state, "
            "figures_json, output_sha256, output_size, output_mtime_ns, attempts, updated) "
            "VALUES (?, ?, ?, ?, 'done', ?, ?, ?, ?, 1, ?) ON CONFLICT(output_name) DO UPDATE "
            "SET source_path=excluded.source_path, source_sha256=excluded.source_sha256, "
            "options_hash=excluded.options_hash, state='done', message=NULL, "
            "figures_json=excluded.figures_json, output_sha256=excluded.output_sha256, "
            "output_size=excluded.output_size, output_mtime_ns=excluded.output_mtime_ns, "
            "updated=excluded.updated",
            (output_name, source_path, figures["source_sha256"], options_hash,
             json.dumps(figures, allow_nan=False), figures["output_sha256"], st.st_size,
             st.st_mtime_ns, time.time()))
        self.conn.commit()

    def mark_failed(self, output_name, *, source_path, options_hash, message):
        self.conn.execute(
            "INSERT INTO files (output_name, source_path, options_hash, state, message, "
            "attempts, updated) VALUES (?, ?, ?, 'failed', ?, 1, ?) "
            "ON CONFLICT(output_name) DO UPDATE SET source_path=excluded.source_path, "
            "options_hash=excluded.options_hash, state='failed', message=excluded.message, "
            "updated=excluded.updated",
            (output_name, source_path, options_hash or "", message, time.time()))
        self.conn.commit()

    def output_unchanged(self, row, output_path):
        """True when the file at ``output_path`` is the one the ledger recorded (size and
        mtime as recorded, else its sha256 as recorded)."""
        try:
            st = os.stat(output_path)
        except OSError:
            return False
        if (st.st_size, st.st_mtime_ns) == (row["output_size"], row["output_mtime_ns"]):
            return True
        from ..media import sha256_file
        return sha256_file(output_path) == row["output_sha256"]

    def start_run(self):
        cur = self.conn.execute("INSERT INTO runs (started) VALUES (?)", (time.time(),))
        self.conn.commit()
        return cur.lastrowid

    def finish_run(self, run_id, summary):
        self.conn.execute("UPDATE runs SET finished=?, summary_json=? WHERE id=?",
                          (time.time(), json.dumps(summary, allow_nan=False), run_id))
        self.conn.commit()
