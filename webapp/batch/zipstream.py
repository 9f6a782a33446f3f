"""A zip archive streamed from files on disk, chunk by chunk, never whole in memory.

:func:`zip_chunks` yields the bytes of a ZIP_STORED archive (audio does not compress; storing
keeps the cost at one read of each file). :mod:`zipfile` writes to a stream that cannot seek by
putting each entry's sizes and CRC in a data descriptor after its data (ZIP application note,
section 4.3.9), so the archive goes out as it is made; Zip64 entries lift the 4 GiB limit.
"""

import zipfile

__all__ = ["zip_chunks", "CHUNK_BYTES"]

CHUNK_BYTES = 1 << 20


class _Sink:
    """A write-only stream that hands its bytes to the generator (no seek)."""

    def __init__(self):
        self._parts = []
        self._offset = 0

    def write(self, data):
        self._parts.append(bytes(data))
        self._offset += len(data)
        return len(data)

    def tell(self):
        return self._offset

    def flush(self):
        pass

    def take(self):
        data = b"".join(self._parts)
        self._parts.clear()
        return data


def zip_chunks(entries, *, chunk_bytes=CHUNK_BYTES):
    """Yield the archive of ``entries`` (an iterable of (name in the archive, path on disk)).

    Memory stays at about one chunk whatever the sizes of the files.
    """
    sink = _Sink()
    with zipfile.ZipFile(sink, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as zf:
        for arcname, path in entries:
            info = zipfile.ZipInfo.from_file(path, arcname)
            info.compress_type = zipfile.ZIP_STORED
            with open(path, "rb") as src, zf.open(info, "w", force_zip64=True) as dest:
                while True:
                    chunk = src.read(chunk_bytes)
                    if not chunk:
                        break
                    dest.write(chunk)
                    data = sink.take()
                    if data:
                        yield data
            data = sink.take()
            if data:
                yield data
    data = sink.take()
    if data:
        yield data

