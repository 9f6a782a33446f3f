"""Sources: probe, streaming block reader, excerpts, sha256 (read-only: a source is never written)."""

import hashlib
import math
import os
from dataclasses import dataclass, field

import numpy as np
import soundfile as sf

from webapp.dsp.errors import AudioFileError, ParameterError
from webapp.dsp.rates import validate_rate
from webapp.oserrors import read_failure

from .formats import (
    _FLOAT_SUBTYPES,
    _LOSSY_SUBTYPES,
    _PERCEPTUAL_SUBTYPES,
    _SOURCE_WORDS,
    EXCERPT_MAX_S,
    READ_DTYPES,
    TAG_NAMES,
)

# --------------------------------------------------------------------------------------------
# probe

@dataclass(frozen=True)
class Probe:
    """What a file holds, as read from its header.

    Attributes
    ----------
    path : str
        The file as given.
    format, subtype : str
        soundfile's major format ("WAV", "FLAC", ...) and sample encoding ("PCM_16", ...).
    rate_hz : int
        Sample rate.
    channels, frames : int
        Channel count and frames per channel (both > 0).
    duration_s : float
        ``frames / rate_hz``.
    tags : dict of str to str
        The non-empty text tags soundfile exposes (see :data:`TAG_NAMES`).
    is_float : bool
        True when the samples are float (FLOAT/DOUBLE) or come from a perceptual decoder
        (Vorbis, Opus, MPEG), which delivers float with no fixed word length.
    size_bytes : int
        File size on disk.
    """

    path: str
    format: str
    subtype: str
    rate_hz: int
    channels: int
    frames: int
    duration_s: float
    tags: dict = field(default_factory=dict)
    is_float: bool = False
    size_bytes: int = 0

    @property
    def is_lossy(self):
        """True when the samples come from a lossy codec."""
        return self.subtype in _LOSSY_SUBTYPES

    @property
    def word_length(self):
        """The source's word length as one of :data:`WORD_LENGTHS`, or None for lossy sources."""
        if self.is_lossy:
            return None
        return _SOURCE_WORDS.get(self.subtype, "24")


def _display_name(path):
    return os.path.basename(os.fspath(path)) or os.fspath(path)


def _check_source_path(path):
    """Raise AudioFileError unless ``path`` names an existing, non-empty regular file."""
    name = _display_name(path)
    if not os.path.exists(path):
        raise AudioFileError(f"cannot open '{name}': no such file", "path")
    if os.path.isdir(path):
        raise AudioFileError(f"cannot open '{name}': it is a folder, not an audio file", "path")
    if not os.path.isfile(path):
        raise AudioFileError(f"cannot open '{name}': not a regular file", "path")
    if os.path.getsize(path) == 0:
        raise AudioFileError(f"cannot read '{name}': the file is empty (0 bytes)", "path")


def _open_source(path):
    """Open ``path`` read-only, mapping libsndfile's complaints to plain AudioFileErrors."""
    path = os.fspath(path)
    _check_source_path(path)
    name = _display_name(path)
    try:
        return sf.SoundFile(path, mode="r")
    except sf.LibsndfileError as exc:
        # Codes 1 and 7 are libsndfile's "format not recognised" and its misleading
        # "file does not exist or is not a regular file" after a failed MPEG sniff; the file
        # is known to exist here, so both mean the bytes are not audio it can decode.
        if exc.code in (1, 7):
            reason = "not a recognised audio format (or the header is damaged)"
        else:
            reason = read_failure(exc, path) or f"libsndfile error {exc.code}"
        raise AudioFileError(f"cannot read '{name}': {reason}", "path") from None
    except (OSError, RuntimeError) as exc:
        raise AudioFileError(f"cannot read '{name}': {read_failure(exc, path)}", "path") from None


def probe(path):
    """Return a :class:`Probe` of the audio file at ``path``.

    Parameters
    ----------
    path : str or os.PathLike
        The file to inspect. It is opened read-only.

    Returns
    -------
    Probe

    Raises
    ------
    AudioFileError
        If the file is missing, a folder, empty, not audio, has a damaged header, or holds
        0 frames or 0 channels. The message names the file and gives the reason.
    ParameterError
        If its rate lies outside 1000 to 768000 Hz (the rule of
        :func:`webapp.dsp.rates.validate_rate`).

    Examples
    --------
    >>> import numpy as np, soundfile as sf, tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "tone.wav")
    >>> sf.write(p, np.zeros((4410, 2)), 44100, subtype="PCM_16")
    >>> info = probe(p)
    >>> (info.rate_hz, info.channels, info.frames, info.duration_s, info.subtype)
    (44100, 2, 4410, 0.1, 'PCM_16')
    """
    path = os.fspath(path)
    name = _display_name(path)
    with _open_source(path) as f:
        fmt, subtype = f.format, f.subtype
        rate, channels, frames = int(f.samplerate), int(f.channels), int(f.frames)
        tags = {k: v for k, v in f.copy_metadata().items() if k in TAG_NAMES and v}
    if channels <= 0:
        raise AudioFileError(f"cannot use '{name}': it has 0 channels", "path")
    if frames <= 0:
        raise AudioFileError(f"cannot use '{name}': it holds no audio (0 frames)", "path")
    try:
        rate = validate_rate(rate, field="rate_hz")
    except ParameterError as exc:
        raise ParameterError(f"'{name}': {exc.message}", exc.field) from None
    return Probe(
        path=path,
        format=fmt,
        subtype=subtype,
        rate_hz=rate,
        channels=channels,
        frames=frames,
        duration_s=frames / rate,
        tags=tags,
        is_float=subtype in _FLOAT_SUBTYPES or subtype in _PERCEPTUAL_SUBTYPES,
        size_bytes=os.path.getsize(path),
    )


# --------------------------------------------------------------------------------------------
# reading

def _check_finite_block(block, *, name, first_frame, action="read"):
    """Raise AudioFileError at the first NaN/Inf of a float block; return the block."""
    if block.dtype.kind != "f" or block.size == 0:
        return block
    finite = np.isfinite(block)
    if finite.all():
        return block
    frame_in_block, channel = (int(i) for i in np.argwhere(~finite)[0])
    value = block[frame_in_block, channel]
    frame = first_frame + frame_in_block
    verb = "holds" if action == "read" else "was given"
    raise AudioFileError(
        f"'{name}' {verb} a non-finite sample ({value}) at frame {frame}, channel {channel}; "
        "samples must be finite numbers",
        "path" if action == "read" else "block",
    )


def _check_int(value, *, field, minimum, allow_minus_one=False):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ParameterError(f"{field} must be a whole number, got {value!r}", field)
    value = int(value)
    if allow_minus_one and value == -1:
        return value
    if value < minimum:
        extra = " (or -1 for all)" if allow_minus_one else ""
        raise ParameterError(f"{field} must be at least {minimum}{extra}, got {value}", field)
    return value


def _check_dtype(dtype, allowed, field="dtype"):
    name = np.dtype(dtype).name if _is_dtype_like(dtype) else None
    if name not in allowed:
        raise ParameterError(f"{field} must be one of {', '.join(allowed)}, got {dtype!r}", field)
    return name


def _is_dtype_like(dtype):
    try:
        np.dtype(dtype)
    except TypeError:
        return False
    return True


def read_blocks(path, *, blocksize=65536, dtype="float64", start=0, frames=-1):
    """Return an iterator over the audio of ``path`` in blocks of frames x channels.

    Parameters
    ----------
    path : str or os.PathLike
        The source, opened read-only.
    blocksize : int, optional
        Frames per block (the last block may be shorter). Default is 65536.
    dtype : {"float64", "float32", "int32", "int16"}, optional
        Sample type, as soundfile converts it (float in [-1, 1)). Default is "float64".
    start : int, optional
        First frame to read. Default is 0.
    frames : int, optional
        Frames to read, or -1 for everything after ``start``. Default is -1.

    Returns
    -------
    iterator of numpy.ndarray
        Blocks of shape (n, channels), 2-D even for mono.

    Raises
    ------
    AudioFileError
        If the file can't be opened (see :func:`probe`) or a float block holds NaN or Inf; the
        message names the file and the frame index of the first bad sample.
    ParameterError
        For a bad ``blocksize``, ``dtype``, ``start`` or ``frames``.

    Notes
    -----
    Parameters and the file's presence are checked at the call; the file is opened at the first
    block and closed when the iterator ends or is closed. The finiteness check applies to float
    dtypes; integer reads of float files get libsndfile's clipped conversion and can't show
    NaN. Memory stays at one block whatever the duration.
    """
    blocksize = _check_int(blocksize, field="blocksize", minimum=1)
    dtype = _check_dtype(dtype, READ_DTYPES)
    start = _check_int(start, field="start", minimum=0)
    frames = _check_int(frames, field="frames", minimum=0, allow_minus_one=True)
    path = os.fspath(path)
    _check_source_path(path)  # a missing file fails here, not at the first next()
    return _iter_blocks(path, blocksize, dtype, start, frames)


def _iter_blocks(path, blocksize, dtype, start, frames):
    name = _display_name(path)
    with _open_source(path) as f:
        if start > f.frames:
            raise ParameterError(
                f"start must be at most the file's length of {f.frames} frames, got {start}",
                "start")
        remaining = f.frames - start if frames == -1 else min(frames, f.frames - start)
        if start:
            f.seek(start)
        position = start
        while remaining > 0:
            try:
                block = f.read(min(blocksize, remaining), dtype=dtype, always_2d=True)
            except sf.LibsndfileError as exc:
                raise AudioFileError(
                    f"cannot read '{name}' at frame {position}: {read_failure(exc, path)}",
                    "path") from None
            if block.shape[0] == 0:
                return  # the header promised more frames than the file holds
            _check_finite_block(block, name=name, first_frame=position)
            position += block.shape[0]
            remaining -= block.shape[0]
            yield block


def read_excerpt(path, *, start_s, length_s, dtype="float64"):
    """Return ``length_s`` seconds of ``path`` from ``start_s`` as one frames x channels array.

    Parameters
    ----------
    path : str or os.PathLike
    start_s : float >= 0
        Start time; rounded to the nearest frame. Must lie inside the file.
    length_s : float > 0
        Length, at most :data:`EXCERPT_MAX_S`; cut short at the end of the file.
    dtype : {"float64", "float32", "int32", "int16"}, optional
        Default is "float64".

    Returns
    -------
    numpy.ndarray
        Shape (n, channels).

    Raises
    ------
    ParameterError
        If a time is negative, not finite, too long, or the start lies past the end.
    AudioFileError
        As :func:`read_blocks`.
    """
    for value, fld in ((start_s, "start_s"), (length_s, "length_s")):
        if isinstance(value, bool) or not isinstance(value, (int, float, np.floating, np.integer)) \
                or not math.isfinite(value):
            raise ParameterError(f"{fld} must be a finite number of seconds, got {value!r}", fld)
    if start_s < 0:
        raise ParameterError(f"start_s must be 0 s or later, got {start_s}", "start_s")
    if not 0 < length_s <= EXCERPT_MAX_S:
        raise ParameterError(
            f"length_s must be more than 0 s and at most {EXCERPT_MAX_S:g} s, got {length_s}",
            "length_s")
    info = probe(path)
    start = int(round(start_s * info.rate_hz))
    if start >= info.frames:
        raise ParameterError(
            f"start_s must lie inside the file ({info.duration_s:.3f} s long), got {start_s}",
            "start_s")
    count = max(1, int(round(length_s * info.rate_hz)))
    blocks = list(read_blocks(path, dtype=dtype, start=start, frames=count))
    return np.concatenate(blocks, axis=0)



# --------------------------------------------------------------------------------------------
# hashing

def sha256_file(path, *, chunk_bytes=1 << 20):
    """Return the SHA-256 of the file at ``path`` as lowercase hex, read in chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(chunk_bytes), b""):
            digest.update(chunk)
    return digest.hexdigest()
