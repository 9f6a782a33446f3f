"""Broadcast WAV metadata chunks: read, rescale to a new rate, and add to a written WAV atomically.

Why our own: on the package registry the maintained WAV metadata readers only read these
chunks (no writer), and general audio libraries (soundfile / libsndfile) carry only the text
tags. The RIFF layout is small, so this module reads and writes it directly.

Chunks handled (little-endian RIFF/WAVE; each chunk is a 4-byte id, a 32-bit size and the body,
padded to an even length):

* ``bext`` (EBU Tech 3285, Broadcast Wave Format): Description 256 bytes, Originator 32,
  OriginatorReference 32, OriginationDate 10, OriginationTime 8, TimeReference as two 32-bit
  words (low, high: the first sample's count of samples since midnight), Version 2, UMID 64,
  then 190 bytes (version 2: five 16-bit loudness fields and 180 reserved) and the coding
  history (text to the end). The 190 bytes are kept as they are.
* ``iXML`` (the iXML specification, an XML text; field names from memory): the rate fields
  ``FILE_SAMPLE_RATE``, ``TIMESTAMP_SAMPLE_RATE`` and the time stamp
  ``TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI`` / ``_LO`` are updated, the rest is left as written.
* ``cue `` (Microsoft RIFF: a count, then 24-byte points: ID, Position, fccChunk, ChunkStart,
  BlockStart, SampleOffset) and ``LIST`` of type ``adtl`` (``labl`` / ``note``: cue ID and
  text; ``ltxt``: cue ID, a length in samples, then purpose, country, language, dialect, code
  page and text).

Rescaling rule (ours): a sample position or length n at fs_in becomes
``round(n * fs_out / fs_in)``, to the nearest whole sample with halves rounded up, computed in
integers: ``(2 n fs_out + fs_in) // (2 fs_in)``. A point therefore lands within half an output
sample of its original time.
"""

from dataclasses import dataclass, replace
import os
import re
import struct
import tempfile

from .dsp.errors import AudioFileError, ParameterError

__all__ = ["Bext", "CuePoint", "read_chunks", "parse_bext", "bext_body", "parse_cues",
           "cue_chunks", "rescale_position", "rescale_ixml", "carried_chunks", "insert_chunks",
           "finish_with_chunks"]

_BEXT_FIXED = struct.Struct("<256s32s32s10s8sIIH64s190s")      # 602 bytes
_CUE_POINT = struct.Struct("<II4sIII")                           # 24 bytes
_COPY_BLOCK = 1 << 20


@dataclass(frozen=True)
class Bext:
    """The ``bext`` chunk's fields (text fields decoded as ASCII / Latin-1, nulls removed)."""

    description: str = ""
    originator: str = ""
    originator_reference: str = ""
    origination_date: str = ""
    origination_time: str = ""
    time_reference: int = 0
    version: int = 1
    umid: bytes = bytes(64)
    extension: bytes = bytes(190)     # version 2 loudness fields and reserved bytes, kept as read
    coding_history: str = ""


@dataclass(frozen=True)
class CuePoint:
    """One cue point: its ID, its position in samples, and its label / note / region length."""

    ident: int
    position: int
    label: str = ""
    note: str = ""
    length: int | None = None          # ``ltxt`` sample length, for regions


def rescale_position(samples, fs_in, fs_out):
    """``round(samples * fs_out / fs_in)``, halves up, in exact integer arithmetic."""
    n, a, b = int(samples), int(fs_in), int(fs_out)
    if n < 0 or a <= 0 or b <= 0:
        raise ParameterError(f"positions and rates must be >= 0 and > 0, got {n}, {a}, {b}", "samples")
    return (2 * n * b + a) // (2 * a)


# --- reading --------------------------------------------------------------------------------------

def read_chunks(path):
    """Top-level chunks of a RIFF/WAVE file as ``[(id, body_or_None, offset, size)]``.

    The ``data`` chunk's body is not read (``None``); ``offset`` is where its body starts.
    """
    chunks = []
    with open(path, "rb") as f:
        head = f.read(12)
        if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"WAVE":
            raise AudioFileError(f"{os.fspath(path)!r} is not a RIFF/WAVE file (RF64 and other "
                                 f"containers carry no chunks here)", "path")
        end = 8 + struct.unpack("<I", head[4:8])[0]
        size_on_disk = os.fstat(f.fileno()).st_size
        position = 12
        while position + 8 <= min(end, size_on_disk):
            f.seek(position)
            ident, size = struct.unpack("<4sI", f.read(8))
            if position + 8 + size > size_on_disk:
                raise AudioFileError(f"{os.fspath(path)!r}: chunk {ident!r} runs past the end of "
                                     f"the file", "path")
            body = None if ident == b"data" else f.read(size)
            chunks.append((ident, body, position + 8, size))
            position += 8 + size + (size & 1)
    return chunks


def _text(raw):
    return raw.split(b"\0", 1)[0].decode("latin-1")


def parse_bext(body):
    """:class:`Bext` from a ``bext`` chunk body."""
    if len(body) < _BEXT_FIXED.size:
        raise AudioFileError(f"bext chunk must be at least {_BEXT_FIXED.size} bytes, got {len(body)}",
                             "bext")
    (description, originator, reference, date, time, low, high, version, umid,
     extension) = _BEXT_FIXED.unpack_from(body)
    history = body[_BEXT_FIXED.size:].split(b"\0", 1)[0].decode("latin-1")
    return Bext(_text(description), _text(originator), _text(reference), _text(date), _text(time),
                (high << 32) | low, version, umid, extension, history)


def bext_body(bext):
    """A ``bext`` chunk body from :class:`Bext` (text truncated to its field)."""
    if not 0 <= bext.time_reference < 2 ** 64:
        raise ParameterError(f"time_reference must fit 64 bits, got {bext.time_reference}", "time_reference")
    fixed = _BEXT_FIXED.pack(
        bext.description.encode("latin-1")[:256], bext.originator.encode("latin-1")[:32],
        bext.originator_reference.encode("latin-1")[:32], bext.origination_date.encode("latin-1")[:10],
        bext.origination_time.encode("latin-1")[:8], bext.time_reference & 0xFFFFFFFF,
        bext.time_reference >> 32, bext.version, bext.umid[:64], bext.extension[:190])
    return fixed + bext.coding_history.encode("latin-1")


def parse_cues(cue_body, adtl_bodies=()):
    """:class:`CuePoint` list from a ``cue `` body and the bodies of ``LIST``/``adtl`` chunks."""
    count = struct.unpack_from("<I", cue_body)[0] if len(cue_body) >= 4 else 0
    if len(cue_body) < 4 + count * _CUE_POINT.size:
        raise AudioFileError(f"cue chunk announces {count} points but holds {len(cue_body)} bytes", "cue")
    points = {}
    for k in range(count):
        ident, position, _chunk, _start, _block, offset = _CUE_POINT.unpack_from(cue_body, 4 + k * 24)
        points[ident] = CuePoint(ident, offset)
    for body in adtl_bodies:
        for sub, data in _subchunks(body[4:]):
            ident = struct.unpack_from("<I", data)[0] if len(data) >= 4 else None
            if ident not in points:
                continue
            if sub == b"labl":
                points[ident] = replace(points[ident], label=_text(data[4:]))
            elif sub == b"note":
                points[ident] = replace(points[ident], note=_text(data[4:]))
            elif sub == b"ltxt" and len(data) >= 8:
                points[ident] = replace(points[ident], length=struct.unpack_from("<I", data, 4)[0])
    return sorted(points.values(), key=lambda p: (p.position, p.ident))


def _subchunks(body):
    out, i = [], 0
    while i + 8 <= len(body):
        ident, size = struct.unpack_from("<4sI", body, i)
        out.append((ident, body[i + 8:i + 8 + size]))
        i += 8 + size + (size & 1)
    return out


def _chunk(ident, body):
    return struct.pack("<4sI", ident, len(body)) + body + (b"\0" if len(body) & 1 else b"")


def cue_chunks(points):
    """``[(b"cue ", body), (b"LIST", body)]`` for cue points (the LIST only if any has text)."""
    cue = struct.pack("<I", len(points)) + b"".join(
        _CUE_POINT.pack(p.ident, p.position, b"data", 0, 0, p.position) for p in points)
    adtl = b""
    for p in points:
        if p.label:
            adtl += _chunk(b"labl", struct.pack("<I", p.ident) + p.label.encode("latin-1") + b"\0")
        if p.note:
            adtl += _chunk(b"note", struct.pack("<I", p.ident) + p.note.encode("latin-1") + b"\0")
        if p.length is not None:
            adtl += _chunk(b"ltxt", struct.pack("<II4sHHHH", p.ident, p.length, b"rgn ", 0, 0, 0, 0))
    chunks = [(b"cue ", cue)]
    if adtl:
        chunks.append((b"LIST", b"adtl" + adtl))
    return chunks


# --- rescaling ------------------------------------------------------------------------------------

_IXML_RATE_FIELDS = ("FILE_SAMPLE_RATE", "TIMESTAMP_SAMPLE_RATE")


def rescale_ixml(text, fs_in, fs_out):
    """The iXML text with its rate fields set to ``fs_out`` and its time stamp rescaled."""
    for name in _IXML_RATE_FIELDS:
        text = re.sub(rf"(<{name}>)\s*\d+\s*(</{name}>)", rf"\g<1>{int(fs_out)}\g<2>", text)
    hi = re.search(r"<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI>\s*(\d+)\s*<", text)
    lo = re.search(r"<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_LO>\s*(\d+)\s*<", text)
    if hi and lo:
        stamp = rescale_position((int(hi.group(1)) << 32) | int(lo.group(1)), fs_in, fs_out)
        text = re.sub(r"(<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI>)\s*\d+\s*<", rf"\g<1>{stamp >> 32}<", text)
        text = re.sub(r"(<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_LO>)\s*\d+\s*<",
                      rf"\g<1>{stamp & 0xFFFFFFFF}<", text)
    return text


def carried_chunks(source_path, fs_in, fs_out):
    """The ``bext``, ``iXML``, ``cue `` and ``LIST``/``adtl`` chunks of a WAV source, rescaled.

    Returns ``[(id, body)]`` ready for :func:`insert_chunks`; an empty list when the source has
    none of them (or is not a RIFF/WAVE file, e.g. FLAC).
    """
    try:
        chunks = read_chunks(source_path)
    except AudioFileError:
        return []
    out = []
    bodies = {ident: body for ident, body, _, _ in chunks if body is not None}
    if b"bext" in bodies:
        bext = parse_bext(bodies[b"bext"])
        out.append((b"bext", bext_body(replace(
            bext, time_reference=rescale_position(bext.time_reference, fs_in, fs_out)))))
    if b"iXML" in bodies:
        text = bodies[b"iXML"].split(b"\0", 1)[0].decode("utf-8", errors="replace")
        out.append((b"iXML", rescale_ixml(text, fs_in, fs_out).encode("utf-8")))
    if b"cue " in bodies:
        adtl = [body for ident, body, _, _ in chunks if ident == b"LIST" and body[:4] == b"adtl"]
        points = [replace(p, position=rescale_position(p.position, fs_in, fs_out),
                          length=None if p.length is None else rescale_position(p.length, fs_in, fs_out))
                  for p in parse_cues(bodies[b"cue "], adtl)]
        out.extend(cue_chunks(points))
    return out


# --- writing --------------------------------------------------------------------------------------

def insert_chunks(wav_path, chunks):
    """Add ``chunks`` (``[(id, body)]``) to a written WAV, in a new temporary file beside it.

    ``bext`` and ``iXML`` go before ``data`` (where readers look first), ``cue `` and the
    ``LIST``/``adtl`` after it; a chunk of the same id (for ``LIST``, of the same list type)
    already in the file is replaced. The audio is copied in 1 MB blocks. Returns the path of
    the new file; the caller renames it (see :func:`finish_with_chunks`).
    """
    existing = read_chunks(wav_path)

    def key(ident, body):
        return (ident, body[:4]) if ident == b"LIST" else (ident, b"")

    replaced = {key(i, b) for i, b in chunks}
    before = [(i, b) for i, b in chunks if i in (b"bext", b"iXML")]
    after = [(i, b) for i, b in chunks if i not in (b"bext", b"iXML")]
    directory = os.path.dirname(os.path.abspath(wav_path))
    fd, new_path = tempfile.mkstemp(prefix=".chunks-", suffix=".wav", dir=directory)
    try:
        with os.fdopen(fd, "wb") as out, open(wav_path, "rb") as src:
            out.write(b"RIFF\0\0\0\0WAVE")
            for ident, body, offset, size in existing:
                if ident == b"data":
                    for i, b in before:
                        out.write(_chunk(i, b))
                    out.write(struct.pack("<4sI", ident, size))
                    src.seek(offset)
                    left = size + (size & 1)
                    while left:
                        block = src.read(min(left, _COPY_BLOCK))
                        if not block:
                            raise AudioFileError(f"{os.fspath(wav_path)!r}: data chunk is cut short", "path")
                        out.write(block)
                        left -= len(block)
                    for i, b in after:
                        out.write(_chunk(i, b))
                elif key(ident, body) not in replaced:
                    out.write(_chunk(ident, body))
            total = out.tell()
            if total - 8 >= 2 ** 32:
                raise AudioFileError("the WAV with its chunks would pass 4 GB, which RIFF cannot hold",
                                     "path")
            out.seek(4)
            out.write(struct.pack("<I", total - 8))
    except BaseException:
        os.unlink(new_path)
        raise
    return new_path


def finish_with_chunks(temp_path, final_path, chunks):
    """Insert ``chunks`` into the written ``temp_path`` and move the result to ``final_path``.

    Atomic: ``final_path`` appears complete (by ``os.replace``) or not at all; ``temp_path`` is
    removed either way. With no chunks it is a plain rename.
    """
    try:
        if chunks:
            with_chunks = insert_chunks(temp_path, chunks)
            os.replace(with_chunks, final_path)
        else:
            os.replace(temp_path, final_path)
    finally:
        if os.path.exists(temp_path):
            os.unlink(temp_path)
