"""Uploads stream straight into the instance folder, under generated names.

werkzeug parses a multipart body into temporary files; :class:`UploadRequest` makes those files
hidden ``.incoming-*`` files in ``uploads/`` (not the system temp folder), so accepting an upload
is one rename, with no second copy of a two-hour WAV. Files that are not kept are removed when
the request ends. The user's file name is only ever text: :func:`display_name` keeps its last
component for messages and download names, and :func:`upload_extension` maps its extension to
one of our own constants, which is all that reaches a path.
"""

import os
import tempfile
import unicodedata

from flask import Request, current_app

from .errors import ApiError

__all__ = ["UPLOAD_EXTENSIONS", "UploadRequest", "display_name", "upload_extension",
           "take_upload", "discard_incoming"]

#: Extensions accepted for upload (what libsndfile reads), lower case -> the one we store.
UPLOAD_EXTENSIONS = {
    ".wav": ".wav", ".wave": ".wav", ".flac": ".flac", ".aif": ".aif", ".aiff": ".aiff",
    ".aifc": ".aifc", ".ogg": ".ogg", ".oga": ".ogg", ".opus": ".opus", ".w64": ".w64",
    ".rf64": ".rf64", ".caf": ".caf", ".au": ".au", ".snd": ".au", ".mp3": ".mp3",
}
_NAME_MAX = 200
_EXT_MAX = 16


class UploadRequest(Request):
    """A request whose uploaded files land in ``uploads/.incoming-*``."""

    def _get_file_stream(self, total_content_length, content_type, filename=None,
                         content_length=None):
        folder = current_app.extensions["rateferry"].store.uploads
        fd, path = tempfile.mkstemp(prefix=".incoming-", dir=folder)
        stream = os.fdopen(fd, "w+b")
        incoming = self.__dict__.setdefault("_rateferry_incoming", {})
        incoming[id(stream)] = path
        return stream


def display_name(filename):
    """The last component of a user's file name, as text (never a path)."""
    text = unicodedata.normalize("NFC", str(filename or ""))
    text = text.replace("\\", "/").split("/")[-1]
    text = "".join(ch for ch in text if ch.isprintable()).strip()
    if len(text) > _NAME_MAX:   # shorten the stem, keep the extension that decides the type
        stem, ext = os.path.splitext(text)
        ext = ext if len(ext) <= _EXT_MAX else ""
        text = stem[:_NAME_MAX - len(ext)].rstrip() + ext
    return text or "upload"


def upload_extension(filename, field="file"):
    """Our stored extension for a user's file name; 415 for anything else."""
    ext = os.path.splitext(display_name(filename))[1].lower()
    if ext not in UPLOAD_EXTENSIONS:
        known = ", ".join(sorted(UPLOAD_EXTENSIONS))
        got = f"'{ext}'" if ext else "no extension"
        raise ApiError(415, f"file type must be one of {known}; got {got}", field)
    return UPLOAD_EXTENSIONS[ext]


def take_upload(request, storage, target):
    """Move the uploaded ``storage`` (a FileStorage) to ``target``; return its size in bytes."""
    incoming = request.__dict__.get("_rateferry_incoming", {})
    path = incoming.pop(id(storage.stream), None)
    storage.stream.flush()
    if path is None:  # a small part werkzeug kept in memory: write it out
        storage.stream.seek(0)
        with open(target, "xb") as f:
            while True:
                chunk = storage.stream.read(1 << 20)
                if not chunk:
                    break
                f.write(chunk)
    else:
        storage.stream.close()
        os.replace(path, target)
    return os.path.getsize(target)


def discard_incoming(request):
    """Remove incoming files of ``request`` that were not taken."""
    incoming = request.__dict__.pop("_rateferry_incoming", {})
    for path in incoming.values():
        try:
            os.unlink(path)
        except FileNotFoundError:
            pass
