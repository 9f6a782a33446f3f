"""Where unfinished outputs live, and how the next start removes those a crash left behind.

An output is written to a partial file and moved onto its name only when it is complete
(:class:`webapp.media.AtomicWriter`, the recipe and sheet writers). Partial files live in a
hidden sub-folder of the output's folder, ``.rateferry-partial/`` - never beside the output
under a name a user could take for a finished file - and each has a lock file naming its
writer: the process id, the process's start time and the machine's boot time.

A process killed with SIGKILL can't clean up, so the next start does: :func:`sweep` removes the
partial files whose writer is gone (the pid is dead, was reused by a later process, or the
machine has booted since) and keeps those of running writers. The command line sweeps every
folder it has written partials into (they are remembered in a small list in the user's state
folder) and the server sweeps its instance folders, both at start-up.

Nothing here knows about audio: it hands out file descriptors and paths.
"""

from dataclasses import dataclass
import json
import os
import secrets
import time

__all__ = ["PARTIAL_FOLDER", "Partial", "create", "sweep", "sweep_remembered",
           "remembered_list_path", "writer_alive"]

PARTIAL_FOLDER = ".rateferry-partial"
_LOCK_EXT = ".lock"
_STEM_MAX = 80
# a partial whose lock is missing or unreadable is left alone this long: its writer may be
# between creating the two files
_GRACE_S = 120.0


@dataclass
class Partial:
    """One partial file: ``fd`` is open for writing at ``path``; ``lock_path`` names the writer."""

    target: str
    path: str
    lock_path: str
    fd: int

    def finish(self):
        """Move the partial onto its target (the caller closed ``fd``); drop the lock."""
        os.replace(self.path, self.target)
        self.path = None
        self._drop_lock()

    def discard(self):
        """Remove the partial and its lock (the target is left as it was)."""
        if self.fd is not None:
            try:
                os.close(self.fd)
            except OSError:
                pass
            self.fd = None
        if self.path:
            _unlink(self.path)
        self.path = None
        self._drop_lock()

    def _drop_lock(self):
        if self.lock_path:
            _unlink(self.lock_path)
            self.lock_path = None
            _rmdir_if_empty(os.path.dirname(self.target))


def _unlink(path):
    try:
        os.unlink(path)
        return True
    except FileNotFoundError:
        return False


def _rmdir_if_empty(folder):
    try:
        os.rmdir(os.path.join(folder, PARTIAL_FOLDER))
    except OSError:
        pass   # not empty (another writer) or already gone


# ---------------------------------------------------------------------------------------------
# who wrote it

def _boot_time():
    """Seconds since the epoch at boot (Linux /proc/stat), or None where unknown."""
    try:
        with open("/proc/stat", "rb") as f:
            for line in f:
                if line.startswith(b"btime "):
                    return int(line.split()[1])
    except OSError:
        pass
    return None


def _process_start(pid):
    """The start time of ``pid`` in clock ticks since boot (Linux), or None where unknown."""
    try:
        with open(f"/proc/{int(pid)}/stat", "rb") as f:
            text = f.read()
    except OSError:
        return None
    # the command name (field 2) may hold spaces and parentheses: split after its last ")"
    fields = text[text.rfind(b")") + 2:].split()
    try:
        return int(fields[19])   # field 22 of proc(5)
    except (IndexError, ValueError):
        return None


def _owner():
    pid = os.getpid()
    return dict(pid=pid, started=_process_start(pid), boot=_boot_time(), host=os.uname().nodename
                if hasattr(os, "uname") else None)


def writer_alive(owner):
    """True when the process described by ``owner`` (a lock file's dict) still runs."""
    try:
        pid = int(owner["pid"])
    except (KeyError, TypeError, ValueError):
        return False
    if pid <= 0:
        return False
    boot = _boot_time()
    if owner.get("boot") is not None and boot is not None and owner["boot"] != boot:
        return False   # the machine has booted since: nothing of that run lives
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass   # alive, owned by another user
    except OSError:
        return False
    started = _process_start(pid)
    if owner.get("started") is not None and started is not None and started != owner["started"]:
        return False   # the pid was reused by a later process
    return True


# ---------------------------------------------------------------------------------------------
# creating

def create(target, *, suffix=""):
    """A new :class:`Partial` for ``target`` (its folder must exist).

    The lock file is written first, so a partial file never exists without its writer named.
    ``suffix`` ends the partial's name (an extension such as ".wav", for readers of the
    folder). Raises OSError as the system gives it.
    """
    target = os.path.abspath(os.fspath(target))
    folder = os.path.join(os.path.dirname(target), PARTIAL_FOLDER)
    stem = os.path.splitext(os.path.basename(target))[0][:_STEM_MAX]
    owner = json.dumps(_owner()).encode()
    for _ in range(16):
        created = _make_folder(folder)
        base = os.path.join(folder, f"{stem}.{secrets.token_hex(6)}")
        lock_path, path = base + _LOCK_EXT, base + suffix + ".partial"
        try:
            lock_fd = os.open(lock_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
        except FileExistsError:
            continue
        except FileNotFoundError:
            continue   # another writer removed the empty folder just now: make it again
        try:
            os.write(lock_fd, owner)
        finally:
            os.close(lock_fd)
        try:
            fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o666)
        except BaseException:
            _unlink(lock_path)
            raise
        if created:
            _remember(os.path.dirname(target))
        return Partial(target=target, path=path, lock_path=lock_path, fd=fd)
    raise FileExistsError(f"no free partial-file name in '{folder}'")


def _make_folder(folder):
    try:
        os.mkdir(folder, 0o755)
        return True
    except FileExistsError:
        return False


# ---------------------------------------------------------------------------------------------
# sweeping

def sweep(folder):
    """Remove the partial files in ``folder``'s partial folder whose writer is gone.

    Returns
    -------
    list of str
        The partial files removed (lock files not counted).
    """
    pfolder = os.path.join(os.path.abspath(os.fspath(folder)), PARTIAL_FOLDER)
    try:
        entries = list(os.scandir(pfolder))
    except (FileNotFoundError, NotADirectoryError, PermissionError):
        return []
    locks = {e.name[:-len(_LOCK_EXT)]: e for e in entries if e.name.endswith(_LOCK_EXT)}
    removed = []
    now = time.time()
    for base, lock in locks.items():
        owner = _read_owner(lock.path)
        if owner is None and _age(lock, now) < _GRACE_S:
            continue
        if owner is not None and writer_alive(owner):
            continue
        for e in entries:
            if e.name.startswith(base + ".") and e.name.endswith(".partial") and _unlink(e.path):
                removed.append(e.path)
        _unlink(lock.path)
    # partial files with no lock at all (the lock was removed by hand): old ones go
    for e in entries:
        if not e.name.endswith(".partial") or e.path in removed:
            continue
        base = e.name[:-len(".partial")]
        if any(base.startswith(b) for b in locks):
            continue
        if _age(e, now) >= _GRACE_S and _unlink(e.path):
            removed.append(e.path)
    try:
        os.rmdir(pfolder)
    except OSError:
        pass
    return removed


def _age(entry, now):
    try:
        return now - entry.stat().st_mtime
    except FileNotFoundError:
        return 0.0


def _read_owner(path):
    try:
        with open(path, "rb") as f:
            return json.loads(f.read(4096) or b"null")
    except (OSError, ValueError):
        return None


# ---------------------------------------------------------------------------------------------
# folders to sweep at the command line's next start

def remembered_list_path():
    """The list of folders partials were written in: ``$RATEFERRY_STATE_DIR/partial-folders``
    (default ``$XDG_STATE_HOME/rateferry``, i.e. ``~/.local/state/rateferry``)."""
    base = os.environ.get("RATEFERRY_STATE_DIR") or os.path.join(
        os.environ.get("XDG_STATE_HOME") or os.path.join(os.path.expanduser("~"), ".local",
                                                         "state"), "rateferry")
    return os.path.join(base, "partial-folders")


def _remember(folder):
    path = remembered_list_path()
    try:
        os.makedirs(os.path.dirname(path), exist_ok=True)
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
        try:
            os.write(fd, (folder + "\n").encode("utf-8", "surrogateescape"))
        finally:
            os.close(fd)
    except OSError:
        pass   # the list is a help for the next start, not a condition of this one


def sweep_remembered():
    """Sweep every remembered folder; forget those with no partial folder left.

    Returns the removed partial files. Errors reading the list are ignored (it is a help).
    """
    path = remembered_list_path()
    try:
        with open(path, "rb") as f:
            folders = list(dict.fromkeys(
                line.decode("utf-8", "surrogateescape") for line in f.read().splitlines()
                if line.strip()))
    except OSError:
        return []
    removed, keep = [], []
    for folder in folders:
        removed += sweep(folder)
        if os.path.isdir(os.path.join(folder, PARTIAL_FOLDER)):
            keep.append(folder)
    try:
        temp = f"{path}.{secrets.token_hex(4)}.tmp"
        with open(temp, "wb") as f:
            f.write("".join(k + "\n" for k in keep).encode("utf-8", "surrogateescape"))
        os.replace(temp, path)
    except OSError:
        pass
    return removed
