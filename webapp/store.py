"""The web app's store: one SQLite database and the files it names.

Conventions
-----------
* One SQLite database (stdlib :mod:`sqlite3`, WAL journal) in the instance folder holds the
  tables ``recordings``, ``designs``, ``conversions``, ``blind_trials`` and ``renditions``.
  JSON columns hold plain figures (``*_json``); times are Unix seconds (``created`` ...).
* Files live under the instance folder with generated names only: ``uploads/``, ``outputs/``,
  ``renditions/``. User strings are kept as text, never used to build a path.
* Ids come from :func:`secrets.token_urlsafe`, so they are unguessable and safe as file names.
* Every thread opens its own connection (:meth:`Store.open`); the web layer keeps one per request.
* A conversion runs on a small thread pool (:class:`webapp.workers.ConversionPool`); its
  progress is written to the database a few times a second, so polling, Server-Sent Events and
  a restarted server all read the same row. A conversion found ``queued`` or ``running`` at start-up was interrupted:
  :meth:`Store.recover_interrupted` marks it failed and removes its partial output.
"""

import json
import logging
import math
import os
import secrets
import sqlite3
import time

from . import partials

__all__ = ["STATUSES", "ACTIVE_STATUSES", "FINAL_STATUSES", "Store", "Db",
           "new_id", "default_instance_path", "clear_old", "INTERRUPTED_MESSAGE"]

log = logging.getLogger(__name__)

STATUSES = ("queued", "running", "done", "failed", "cancelled")
ACTIVE_STATUSES = ("queued", "running")
FINAL_STATUSES = ("done", "failed", "cancelled")
INTERRUPTED_MESSAGE = ("interrupted: the server stopped before this conversion finished; "
                       "its partial output was removed")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS recordings (
    id TEXT PRIMARY KEY,
    name TEXT NOT NULL,
    path TEXT NOT NULL,
    owned INTEGER NOT NULL,
    demo INTEGER NOT NULL DEFAULT 0,
    size_bytes INTEGER NOT NULL,
    mtime REAL NOT NULL,
    probe_json TEXT NOT NULL,
    meters_json TEXT NOT NULL,
    created REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS designs (
    id TEXT PRIMARY KEY,
    key TEXT NOT NULL UNIQUE,
    fs_in INTEGER NOT NULL,
    fs_out INTEGER NOT NULL,
    spec_json TEXT NOT NULL,
    figures_json TEXT NOT NULL,
    created REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS conversions (
    id TEXT PRIMARY KEY,
    recording_id TEXT NOT NULL,
    design_id TEXT,
    status TEXT NOT NULL,
    cancel_requested INTEGER NOT NULL DEFAULT 0,
    fs_in INTEGER NOT NULL,
    fs_out INTEGER NOT NULL,
    format TEXT NOT NULL,
    spec_json TEXT NOT NULL,
    delivery_json TEXT NOT NULL,
    progress_json TEXT NOT NULL,
    figures_json TEXT,
    error_json TEXT,
    output_path TEXT NOT NULL,
    download_name TEXT NOT NULL,
    recipe_path TEXT,
    created REAL NOT NULL,
    started REAL,
    finished REAL
);
CREATE TABLE IF NOT EXISTS blind_trials (
    id TEXT PRIMARY KEY,
    conversion_id TEXT NOT NULL,
    trials INTEGER NOT NULL,
    correct INTEGER NOT NULL,
    p_value REAL NOT NULL,
    answers_json TEXT NOT NULL,
    note TEXT NOT NULL DEFAULT '',
    created REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS renditions (
    id TEXT PRIMARY KEY,
    recording_id TEXT NOT NULL,
    conversion_id TEXT,
    figures_json TEXT NOT NULL,
    paths_json TEXT NOT NULL,
    created REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS conversions_status ON conversions(status);
CREATE INDEX IF NOT EXISTS blind_trials_conversion ON blind_trials(conversion_id);
"""


def new_id():
    """An unguessable id (about 128 random bits), safe in URLs and file names."""
    return secrets.token_urlsafe(16)


def default_instance_path():
    """Where the web app keeps its data when no instance folder is given.

    ``$RATEFERRY_INSTANCE`` if set; else ``$XDG_DATA_HOME/rateferry`` (``~/.local/share/rateferry``
    under the user's ``HOME``), for a source tree and an installed wheel alike.
    """
    env = os.environ.get("RATEFERRY_INSTANCE")
    if env:
        return os.path.abspath(env)
    data_home = os.environ.get("XDG_DATA_HOME") or os.path.join(os.path.expanduser("~"),
                                                                 ".local", "share")
    return os.path.join(data_home, "rateferry")


def _dumps(value):
    return json.dumps(value, allow_nan=False, separators=(",", ":"))


def _loads(text):
    return None if text is None else json.loads(text)


def _iso(t):
    if t is None:
        return None
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))


class Store:
    """The instance folder: database path and file folders.

    Parameters
    ----------
    instance_path : str
        The folder; it and its sub-folders are created when missing.
    """

    def __init__(self, instance_path):
        self.instance_path = os.path.abspath(instance_path)
        self.db_path = os.path.join(self.instance_path, "rateferry.sqlite3")
        self.uploads = os.path.join(self.instance_path, "uploads")
        self.outputs = os.path.join(self.instance_path, "outputs")
        self.renditions = os.path.join(self.instance_path, "renditions")
        for folder in (self.instance_path, self.uploads, self.outputs, self.renditions):
            os.makedirs(folder, exist_ok=True)
        with self.open() as db:
            db.conn.executescript(_SCHEMA)

    def open(self):
        """A new :class:`Db` (one connection); close it, or use it in a ``with`` block."""
        conn = sqlite3.connect(self.db_path, timeout=30.0, isolation_level=None,
                               check_same_thread=False)
        conn.row_factory = sqlite3.Row
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA busy_timeout=30000")
        return Db(conn, self)

    def upload_path(self, ext):
        """A fresh generated path under ``uploads/`` with extension ``ext`` (".wav")."""
        return os.path.join(self.uploads, new_id() + ext)

    def output_path(self, conversion_id, ext):
        return os.path.join(self.outputs, conversion_id + ext)

    def rendition_folder(self):
        return self.renditions

    def sweep_partials(self):
        """Remove partial files whose writer is gone (a crash, kill -9) from the instance
        folders and from every folder the command line remembers; return their paths."""
        removed = []
        for folder in (self.uploads, self.outputs, self.renditions):
            removed += partials.sweep(folder)
        return removed + partials.sweep_remembered()

    def recover_interrupted(self):
        """Mark conversions left ``queued``/``running`` as failed; remove their partial files.

        Returns
        -------
        list of str
            The ids that were marked failed.
        """
        with self.open() as db:
            rows = db.conn.execute(
                "SELECT id, output_path FROM conversions WHERE status IN ('queued', 'running')"
            ).fetchall()
            error = _dumps({"message": INTERRUPTED_MESSAGE, "field": "conversion"})
            for row in rows:
                _remove_partials(row["output_path"])
                db.conn.execute(
                    "UPDATE conversions SET status='failed', error_json=?, finished=? "
                    "WHERE id=?", (error, time.time(), row["id"]))
        return [r["id"] for r in rows]


def _remove_partials(output_path):
    """Remove ``output_path`` and the partial files of dead writers beside it."""
    partials.sweep(os.path.dirname(output_path))
    _unlink(output_path)


class Db:
    """One connection to the store with the queries the web app needs."""

    def __init__(self, conn, store):
        self.conn = conn
        self.store = store

    def close(self):
        self.conn.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    # -- recordings ----------------------------------------------------------------------------
    def add_recording(self, *, name, path, owned, demo, probe, meters, recording_id=None):
        rid = recording_id or new_id()
        st = os.stat(path)
        self.conn.execute(
            "INSERT INTO recordings (id, name, path, owned, demo, size_bytes, mtime, probe_json, "
            "meters_json, created) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (rid, name, os.path.abspath(path), int(bool(owned)), int(bool(demo)), st.st_size,
             st.st_mtime, _dumps(probe), _dumps(meters), time.time()))
        return self.get_recording(rid)

    def get_recording(self, recording_id):
        row = self.conn.execute("SELECT * FROM recordings WHERE id=?",
                                (recording_id,)).fetchone()
        return _recording(row) if row else None

    def list_recordings(self):
        rows = self.conn.execute("SELECT * FROM recordings ORDER BY created DESC").fetchall()
        return [_recording(r) for r in rows]

    def find_demo(self, path):
        """The demo row for ``path`` when the file is unchanged since it was registered."""
        row = self.conn.execute("SELECT * FROM recordings WHERE demo=1 AND path=?",
                                (os.path.abspath(path),)).fetchone()
        if row is None:
            return None
        st = os.stat(path)
        if row["size_bytes"] != st.st_size or row["mtime"] != st.st_mtime:
            self.conn.execute("DELETE FROM recordings WHERE id=?", (row["id"],))
            return None
        return _recording(row)

    def update_meters(self, recording_id, meters):
        self.conn.execute("UPDATE recordings SET meters_json=? WHERE id=?",
                          (_dumps(meters), recording_id))

    def delete_recording(self, recording_id):
        rec = self.get_recording(recording_id)
        if rec is None:
            return None
        self.conn.execute("DELETE FROM recordings WHERE id=?", (recording_id,))
        if rec["owned"]:
            _unlink(rec["path"])
        return rec

    # -- designs -------------------------------------------------------------------------------
    def put_design(self, *, key, fs_in, fs_out, spec, figures):
        """Store a design once per key; returns its id (the existing one for a known key)."""
        row = self.conn.execute("SELECT id FROM designs WHERE key=?", (key,)).fetchone()
        if row:
            return row["id"]
        did = new_id()
        try:
            self.conn.execute(
                "INSERT INTO designs (id, key, fs_in, fs_out, spec_json, figures_json, created) "
                "VALUES (?, ?, ?, ?, ?, ?, ?)",
                (did, key, int(fs_in), int(fs_out), _dumps(spec), _dumps(figures), time.time()))
        except sqlite3.IntegrityError:  # another request stored the same key meanwhile
            return self.conn.execute("SELECT id FROM designs WHERE key=?", (key,)).fetchone()["id"]
        return did

    def get_design(self, design_id):
        row = self.conn.execute("SELECT * FROM designs WHERE id=?", (design_id,)).fetchone()
        if row is None:
            return None
        return dict(id=row["id"], key=row["key"], fs_in=row["fs_in"], fs_out=row["fs_out"],
                    spec=_loads(row["spec_json"]), figures=_loads(row["figures_json"]),
                    created=_iso(row["created"]))

    # -- conversions ---------------------------------------------------------------------------
    def add_conversion(self, *, conversion_id, recording_id, design_id, fs_in, fs_out, format,
                       spec, delivery, output_path, download_name, frames_total):
        progress = dict(percent=0.0, frames_done=0, frames_total=int(frames_total), eta_s=None,
                        elapsed_s=0.0)
        self.conn.execute(
            "INSERT INTO conversions (id, recording_id, design_id, status, fs_in, fs_out, format, "
            "spec_json, delivery_json, progress_json, output_path, download_name, created) "
            "VALUES (?, ?, ?, 'queued', ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (conversion_id, recording_id, design_id, int(fs_in), int(fs_out), format,
             _dumps(spec), _dumps(delivery), _dumps(progress), output_path, download_name,
             time.time()))
        return self.get_conversion(conversion_id)

    def get_conversion(self, conversion_id):
        row = self.conn.execute("SELECT * FROM conversions WHERE id=?",
                                (conversion_id,)).fetchone()
        return _conversion(row) if row else None

    def list_conversions(self, *, recording_id=None, limit=200):
        if recording_id:
            rows = self.conn.execute(
                "SELECT * FROM conversions WHERE recording_id=? ORDER BY created DESC LIMIT ?",
                (recording_id, limit)).fetchall()
        else:
            rows = self.conn.execute("SELECT * FROM conversions ORDER BY created DESC LIMIT ?",
                                     (limit,)).fetchall()
        return [_conversion(r) for r in rows]

    def start_conversion(self, conversion_id):
        """queued -> running; False when it was cancelled (or taken) meanwhile."""
        cur = self.conn.execute(
            "UPDATE conversions SET status='running', started=? WHERE id=? AND status='queued' "
            "AND cancel_requested=0", (time.time(), conversion_id))
        return cur.rowcount == 1

    def set_progress(self, conversion_id, progress):
        self.conn.execute("UPDATE conversions SET progress_json=? WHERE id=? AND status='running'",
                          (_dumps(progress), conversion_id))

    def finish_conversion(self, conversion_id, *, status, figures=None, error=None,
                          progress=None, recipe_path=None):
        if status not in FINAL_STATUSES:
            raise ValueError(f"status must be one of {FINAL_STATUSES}, got {status!r}")
        sets = ["status=?", "finished=?", "figures_json=?", "error_json=?"]
        args = [status, time.time(), None if figures is None else _dumps(figures),
                None if error is None else _dumps(error)]
        if progress is not None:
            sets.append("progress_json=?")
            args.append(_dumps(progress))
        if recipe_path is not None:
            sets.append("recipe_path=?")
            args.append(recipe_path)
        args.append(conversion_id)
        self.conn.execute(f"UPDATE conversions SET {', '.join(sets)} WHERE id=?", args)

    def request_cancel(self, conversion_id):
        """Flag a conversion for cancelling; a queued one is cancelled at once.

        Returns the status after the request.
        """
        self.conn.execute("UPDATE conversions SET cancel_requested=1 WHERE id=? AND status IN "
                          "('queued', 'running')", (conversion_id,))
        self.conn.execute(
            "UPDATE conversions SET status='cancelled', finished=?, error_json=? "
            "WHERE id=? AND status='queued'",
            (time.time(), _dumps({"message": "cancelled before it started", "field": "conversion"}),
             conversion_id))
        row = self.conn.execute("SELECT status FROM conversions WHERE id=?",
                                (conversion_id,)).fetchone()
        return row["status"] if row else None

    # -- blind trials ---------------------------------------------------------------------------
    def add_blind_trial(self, *, conversion_id, trials, correct, p_value, answers, note=""):
        tid = new_id()
        self.conn.execute(
            "INSERT INTO blind_trials (id, conversion_id, trials, correct, p_value, answers_json, "
            "note, created) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            (tid, conversion_id, int(trials), int(correct), float(p_value), _dumps(answers),
             note or "", time.time()))
        return self.list_blind_trials(conversion_id, trial_id=tid)[0]

    def list_blind_trials(self, conversion_id, *, trial_id=None):
        sql = "SELECT * FROM blind_trials WHERE conversion_id=?"
        args = [conversion_id]
        if trial_id:
            sql += " AND id=?"
            args.append(trial_id)
        rows = self.conn.execute(sql + " ORDER BY created", args).fetchall()
        return [dict(id=r["id"], conversion_id=r["conversion_id"], trials=r["trials"],
                     correct=r["correct"], p_value=r["p_value"],
                     answers=_loads(r["answers_json"]), note=r["note"],
                     created=_iso(r["created"])) for r in rows]

    # -- renditions -----------------------------------------------------------------------------
    def add_rendition(self, *, rendition_id, recording_id, conversion_id, figures, paths):
        self.conn.execute(
            "INSERT INTO renditions (id, recording_id, conversion_id, figures_json, paths_json, "
            "created) VALUES (?, ?, ?, ?, ?, ?)",
            (rendition_id, recording_id, conversion_id, _dumps(figures), _dumps(paths),
             time.time()))

    def get_rendition(self, rendition_id):
        row = self.conn.execute("SELECT * FROM renditions WHERE id=?",
                                (rendition_id,)).fetchone()
        if row is None:
            return None
        return dict(id=row["id"], recording_id=row["recording_id"],
                    conversion_id=row["conversion_id"], figures=_loads(row["figures_json"]),
                    paths=_loads(row["paths_json"]), created=_iso(row["created"]))


def _recording(row):
    probe = _loads(row["probe_json"])
    meters = _loads(row["meters_json"])
    out = dict(id=row["id"], name=row["name"], path=row["path"], owned=bool(row["owned"]),
               demo=bool(row["demo"]), created=_iso(row["created"]))
    out.update(probe)
    out.update(meters)
    return out


def _conversion(row):
    return dict(
        id=row["id"], recording_id=row["recording_id"], design_id=row["design_id"],
        status=row["status"], cancel_requested=bool(row["cancel_requested"]),
        fs_in=row["fs_in"], fs_out=row["fs_out"], format=row["format"],
        spec=_loads(row["spec_json"]), delivery=_loads(row["delivery_json"]),
        progress=_loads(row["progress_json"]), figures=_loads(row["figures_json"]),
        error=_loads(row["error_json"]), output_path=row["output_path"],
        download_name=row["download_name"], recipe_path=row["recipe_path"],
        created=_iso(row["created"]), started=_iso(row["started"]),
        finished=_iso(row["finished"]),
    )


def _unlink(path):
    try:
        os.unlink(path)
        return True
    except (FileNotFoundError, IsADirectoryError):
        return False


# ---------------------------------------------------------------------------------------------
# clearing

def clear_old(instance_path=None, *, older_than_days=7.0):
    """Remove uploads, outputs and renditions older than ``older_than_days``, with their rows.

    Conversions still queued or running, the recordings they use and demo recordings (which
    live outside the instance folder) are kept.

    Parameters
    ----------
    instance_path : str, optional
        Default is :func:`default_instance_path`.
    older_than_days : float >= 0

    Returns
    -------
    int
        The number of files removed.
    """
    from .dsp.errors import ParameterError
    if isinstance(older_than_days, bool) or not isinstance(older_than_days, (int, float)) \
            or not math.isfinite(older_than_days) or older_than_days < 0:
        raise ParameterError(f"older_than_days must be a number of days >= 0, got "
                             f"{older_than_days!r}", "older_than_days")
    store = Store(instance_path or default_instance_path())
    cutoff = time.time() - older_than_days * 86400.0
    removed = 0
    with store.open() as db:
        c = db.conn
        active = {r["recording_id"] for r in c.execute(
            "SELECT recording_id FROM conversions WHERE status IN ('queued', 'running')")}
        for row in c.execute("SELECT id, output_path, recipe_path FROM conversions WHERE "
                             "status NOT IN ('queued', 'running') AND created < ?",
                             (cutoff,)).fetchall():
            for path in (row["output_path"], row["recipe_path"]):
                if path and _unlink(path):
                    removed += 1
            c.execute("DELETE FROM blind_trials WHERE conversion_id=?", (row["id"],))
            c.execute("DELETE FROM conversions WHERE id=?", (row["id"],))
        for row in c.execute("SELECT id, paths_json FROM renditions WHERE created < ?",
                             (cutoff,)).fetchall():
            for path in (_loads(row["paths_json"]) or {}).values():
                if _unlink(path):
                    removed += 1
            c.execute("DELETE FROM renditions WHERE id=?", (row["id"],))
        for row in c.execute("SELECT id, path FROM recordings WHERE owned=1 AND created < ?",
                             (cutoff,)).fetchall():
            if row["id"] in active:
                continue
            if _unlink(row["path"]):
                removed += 1
            c.execute("DELETE FROM recordings WHERE id=?", (row["id"],))
        # stray files (an upload cut off mid-way, a file whose row is gone)
        known = set()
        for r in c.execute("SELECT path FROM recordings"):
            known.add(os.path.abspath(r["path"]))
        for r in c.execute("SELECT output_path, recipe_path FROM conversions"):
            known.update(os.path.abspath(p) for p in (r["output_path"], r["recipe_path"]) if p)
        for r in c.execute("SELECT paths_json FROM renditions"):
            known.update(os.path.abspath(p) for p in (_loads(r["paths_json"]) or {}).values())
        active_outputs = [r["output_path"] for r in c.execute(
            "SELECT output_path FROM conversions WHERE status IN ('queued', 'running')")]
        active_stems = {os.path.splitext(os.path.basename(p))[0] for p in active_outputs}
        for folder in (store.uploads, store.outputs, store.renditions):
            for entry in os.scandir(folder):
                if not entry.is_file() or os.path.abspath(entry.path) in known:
                    continue
                if any(entry.name.startswith(f".{stem}.") for stem in active_stems):
                    continue
                if entry.stat().st_mtime < cutoff and _unlink(entry.path):
                    removed += 1
    return removed
