"""What a WAV or AIFF header declares, read straight from its bytes.

libsndfile trims the frame count of a file that was cut off (a recorder that lost power, a
copy that stopped) to the data actually there, without a word. The header still says how
long the recording was meant to be; :func:`declared_frames` reads that figure so a conversion
can warn that the source is shorter than its header declares.

Layouts (from memory): RIFF/WAVE - "RIFF" size "WAVE", then chunks (4-byte id, little-endian
u32 size, data padded to even length); "fmt " holds block_align at byte 12; "data" holds the
samples. RF64 keeps the real data size in the "ds64" chunk (u64 at byte 8). AIFF/AIFC - "FORM"
size "AIFF"/"AIFC", big-endian chunks; "COMM" holds numSampleFrames (u32 at byte 2).
"""

import struct

__all__ = ["declared_frames", "clear_peak_time"]

_MAX_CHUNKS = 64


def declared_frames(path):
    """Frames the header of the WAV/RF64/AIFF file at ``path`` declares, or None (another
    format, or a header this reader does not follow)."""
    try:
        with open(path, "rb") as f:
            head = f.read(12)
            if len(head) < 12:
                return None
            if head[:4] in (b"RIFF", b"RF64") and head[8:12] == b"WAVE":
                return _wave(f, rf64=head[:4] == b"RF64")
            if head[:4] == b"FORM" and head[8:12] in (b"AIFF", b"AIFC"):
                return _aiff(f)
    except OSError:
        return None
    return None


def clear_peak_time(path):
    """Set the time stamp of the ``PEAK`` chunk that libsndfile writes into float WAV, RF64
    and AIFF files to 0 (no time given), in place; True when there was one.

    The chunk holds each channel's peak and where it is, and the seconds since 1970 when the
    file was written: the one field that made two writes of the same samples differ, so a
    re-run could not reproduce a recipe's SHA-256. Layout (from memory): u32 version, u32 time
    stamp, then a (float value, u32 position) pair per channel.
    """
    with open(path, "r+b") as f:
        head = f.read(12)
        if len(head) < 12:
            return False
        if head[:4] in (b"RIFF", b"RF64") and head[8:12] == b"WAVE":
            endian = "<"
        elif head[:4] == b"FORM" and head[8:12] in (b"AIFF", b"AIFC"):
            endian = ">"
        else:
            return False
        for cid, size, at in _chunks(f, endian):
            if cid == b"PEAK" and size >= 8:
                f.seek(at + 4)
                f.write(b"\0\0\0\0")
                return True
    return False


def _chunks(f, endian):
    for _ in range(_MAX_CHUNKS):
        head = f.read(8)
        if len(head) < 8:
            return
        cid, size = head[:4], struct.unpack(endian + "I", head[4:])[0]
        at = f.tell()
        yield cid, size, at
        f.seek(at + size + (size & 1))


def _wave(f, *, rf64):
    block_align = data_size = None
    ds64_size = None
    for cid, size, at in _chunks(f, "<"):
        if cid == b"ds64" and size >= 16:
            f.seek(at + 8)
            ds64_size = struct.unpack("<Q", f.read(8))[0]
        elif cid == b"fmt " and size >= 14:
            f.seek(at + 12)
            block_align = struct.unpack("<H", f.read(2))[0]
        elif cid == b"data":
            data_size = ds64_size if (rf64 and size == 0xFFFFFFFF) else size
            break
    if not block_align or data_size is None:
        return None
    return data_size // block_align


def _aiff(f):
    for cid, size, at in _chunks(f, ">"):
        if cid == b"COMM" and size >= 6:
            f.seek(at + 2)
            return struct.unpack(">I", f.read(4))[0]
    return None
