"""The operating system's refusals in words that name the cause and the place.

"System error" (libsndfile's whole message for any failed read or write) or a bare errno tells
the user nothing; these say "permission denied on 'take.wav'" or "no space left on the device
holding '/mnt/usb/out'". libsndfile keeps the errno to itself, so :func:`write_failure` and
:func:`read_failure` ask the system again (free space, access rights, opening the file) to find
the cause.
"""

import errno
import os

__all__ = ["os_error_text", "write_failure", "read_failure", "LOW_SPACE_BYTES"]

#: Less free space than this on the output's device counts as "no space left".
LOW_SPACE_BYTES = 1 << 20


def _name(path):
    path = os.fspath(path)
    return os.path.basename(path) or path


def _folder(path):
    return os.path.dirname(os.path.abspath(os.fspath(path)))


def os_error_text(exc, path):
    """Words for the OSError ``exc`` met on ``path`` (its cause and the place it concerns)."""
    name, folder = _name(path), _folder(path)
    code = getattr(exc, "errno", None)
    words = {
        errno.EACCES: f"permission denied on '{name}'",
        errno.EPERM: f"permission denied on '{name}' (the operation is not permitted)",
        errno.ENOSPC: f"no space left on the device holding '{folder}'",
        errno.EDQUOT: f"the disk quota is used up on the device holding '{folder}'",
        errno.EROFS: f"the device holding '{folder}' is read-only",
        errno.ENOENT: f"'{name}' does not exist (no such file or folder)",
        errno.EISDIR: f"'{name}' is a folder",
        errno.ENOTDIR: f"a part of the path of '{name}' is not a folder",
        errno.EFBIG: f"'{name}' would be larger than the file system (or the process limit) "
                     "allows",
        errno.EIO: f"input/output error on the device holding '{folder}' (a failing or "
                   "removed drive?)",
        errno.ENAMETOOLONG: f"the name '{name}' is too long for the file system",
        errno.EMFILE: "too many files are open in this process",
        errno.ENFILE: "too many files are open on this system",
        errno.ENXIO: f"the device holding '{folder}' is not there",
    }
    if code in words:
        return words[code]
    reason = (getattr(exc, "strerror", None) or str(exc) or type(exc).__name__).rstrip(".")
    return f"{reason[:1].lower()}{reason[1:]} on '{name}'"


def write_failure(exc, path):
    """Words for a failed write of ``path``: from the OSError itself, else (libsndfile's
    "System error") from the state of the device and the folder."""
    if isinstance(exc, OSError) and exc.errno is not None:
        return os_error_text(exc, path)
    folder = _folder(path)
    try:
        st = os.statvfs(folder)
        if st.f_bavail * st.f_frsize < LOW_SPACE_BYTES:
            return os_error_text(OSError(errno.ENOSPC, "no space"), path)
    except (OSError, AttributeError):
        pass
    if not os.access(folder, os.W_OK):
        return f"permission denied on '{folder}'"
    reason = getattr(exc, "error_string", None) or str(exc) or type(exc).__name__
    return reason.strip().rstrip(".")


def read_failure(exc, path):
    """Words for a failed read of ``path``; a "System error" is traced to its cause by opening
    the file again."""
    if isinstance(exc, OSError) and exc.errno is not None:
        return os_error_text(exc, path)
    try:
        with open(path, "rb") as f:
            f.read(1)
    except OSError as again:
        return os_error_text(again, path)
    reason = getattr(exc, "error_string", None) or str(exc) or type(exc).__name__
    return reason.strip().rstrip(".")
