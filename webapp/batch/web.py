"""Batches in the web app: a named group of conversions in the web app's store.

The page's batch runs on the server's own conversion pool (:class:`webapp.workers.ConversionPool`),
not on a Dask cluster: the server is one local process whose pool is already sized to the
machine, and each file of a page batch is an ordinary conversion (its own progress, cancel,
downloads, design sheet and recipe, and its line in the history). Starting a LocalCluster inside
the server would add worker processes that compete for the same cores and a second way to
report progress and cancel. The command line (``rateferry batch``) is the way to many hours of
audio or a cluster.

Tables (created on first use, beside the store's own): ``batches`` and ``batch_members``
(batch id, conversion id, position). A batch's state is derived from its members.
"""

import json
import time

__all__ = ["add_batch", "get_batch", "list_batches", "batch_state"]

_SCHEMA = """
CREATE TABLE IF NOT EXISTS batches (
    id TEXT PRIMARY KEY,
    fs_out INTEGER NOT NULL,
    format TEXT NOT NULL,
    spec_json TEXT NOT NULL,
    delivery_json TEXT NOT NULL,
    created REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS batch_members (
    batch_id TEXT NOT NULL,
    conversion_id TEXT NOT NULL,
    position INTEGER NOT NULL,
    PRIMARY KEY (batch_id, position)
);
CREATE INDEX IF NOT EXISTS batch_members_conversion ON batch_members(conversion_id);
"""


def _ensure(conn):
    conn.executescript(_SCHEMA)


def add_batch(db, *, batch_id, conversion_ids, fs_out, format, spec, delivery):
    """Record a batch of already added conversions (``db`` is a :class:`webapp.store.Db`)."""
    conn = db.conn
    _ensure(conn)
    conn.execute("INSERT INTO batches (id, fs_out, format, spec_json, delivery_json, created) "
                 "VALUES (?, ?, ?, ?, ?, ?)", (batch_id, int(fs_out), format, json.dumps(spec),
                                               json.dumps(delivery), time.time()))
    conn.executemany("INSERT INTO batch_members (batch_id, conversion_id, position) VALUES "
                     "(?, ?, ?)", [(batch_id, cid, i) for i, cid in enumerate(conversion_ids)])
    conn.commit()
    return get_batch(db, batch_id)


def get_batch(db, batch_id):
    """The batch with its member conversions (store rows, in order), or None."""
    conn = db.conn
    _ensure(conn)
    row = conn.execute("SELECT * FROM batches WHERE id=?", (batch_id,)).fetchone()
    if row is None:
        return None
    ids = [r["conversion_id"] for r in conn.execute(
        "SELECT conversion_id FROM batch_members WHERE batch_id=? ORDER BY position",
        (batch_id,))]
    members = [c for c in (db.get_conversion(cid) for cid in ids) if c is not None]
    return dict(id=row["id"], fs_out=row["fs_out"], format=row["format"],
                spec=json.loads(row["spec_json"]), delivery=json.loads(row["delivery_json"]),
                created=row["created"], members=members, **batch_state(members))


def list_batches(db, *, limit=50):
    """Batches newest first."""
    conn = db.conn
    _ensure(conn)
    ids = [r["id"] for r in conn.execute("SELECT id FROM batches ORDER BY created DESC LIMIT ?",
                                         (int(limit),))]
    return [get_batch(db, i) for i in ids]


def batch_state(members):
    """``status`` (running while any member is queued or running, else done when every
    member is done, else finished), ``counts`` by status and the ``progress`` over all frames."""
    counts = {}
    for c in members:
        counts[c["status"]] = counts.get(c["status"], 0) + 1
    active = counts.get("queued", 0) + counts.get("running", 0)
    if active:
        status = "running"
    elif counts.get("done", 0) == len(members):
        status = "done"
    else:
        status = "finished"
    done = total = 0
    for c in members:
        p = c.get("progress") or {}
        t = int(p.get("frames_total") or 0)
        total += t
        done += t if c["status"] == "done" else int(p.get("frames_done") or 0)
    percent = round(100.0 * done / total, 2) if total else 0.0
    return dict(status=status, counts=counts,
                progress=dict(percent=percent, frames_done=done, frames_total=total,
                              files_done=counts.get("done", 0), files_total=len(members)))
