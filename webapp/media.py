"""Audio files: probe, streaming block reader, output plans and atomic output.

This is the only application module that imports soundfile; the DSP core never touches files.

Conventions
-----------
- Data is frames x channels, 2-D even for mono.
- Rates are integers in Hz (``rate_hz``); sizes are in bytes (``size_bytes``); durations in
  seconds (``duration_s``).
- A word length ("bits") is one of :data:`WORD_LENGTHS`: ``"16"`` and ``"24"`` are integer PCM,
  ``"32f"`` and ``"64f"`` are IEEE float. Lossy targets (Vorbis, Opus) have no word length.
- Sources are opened read-only and never written. Outputs are written to a temporary file in the
  target's folder and moved onto the target with ``os.replace`` only after a clean finish, so a
  failed or cancelled job leaves no partial output behind.
- Every rule below that libsndfile would otherwise enforce late (or, for Vorbis above 200 kHz,
  by crashing the process) is checked in :func:`output_plan`, before any work starts.
"""

from dataclasses import dataclass, field
import hashlib
import math
import os

import numpy as np
import soundfile as sf

from webapp import __version__, partials, riffchunks
from webapp.dsp.dither import WORD_LENGTHS  # word lengths an output may carry (one list)
from webapp.dsp.errors import AudioFileError, ParameterError
from webapp.dsp.rates import validate_rate
from webapp.oserrors import os_error_text, read_failure, write_failure as _write_failure

__all__ = [
    "OUTPUT_FORMATS",
    "WORD_LENGTHS",
    "TAG_NAMES",
    "TAG_SUPPORT",
    "READ_DTYPES",
    "WRITE_DTYPES",
    "Probe",
    "OutputPlan",
    "AtomicWriter",
    "probe",
    "read_blocks",
    "read_excerpt",
    "output_plan",
    "refuse_same_file",
    "converted_comment",
    "sha256_file",
]

#: Output file extension -> (soundfile major format). Opus travels in an Ogg container.
OUTPUT_FORMATS = {
    ".wav": "WAV",
    ".flac": "FLAC",
    ".ogg": "OGG",
    ".opus": "OGG",
    ".aif": "AIFF",
    ".aiff": "AIFF",
    ".w64": "W64",
    ".rf64": "RF64",
    ".mp3": "MP3",
}

#: The text tags soundfile exposes, in its order.
TAG_NAMES = (
    "title", "copyright", "software", "artist", "comment",
    "date", "album", "license", "tracknumber", "genre",
)

# Measured with libsndfile 1.2.2 by writing each tag and reading it back (the round trip is
# pinned by tests/media/test_media.py): WAV/RF64 INFO chunks drop "license", AIFF keeps five,
# W64 refuses string data altogether.
_WAV_TAGS = ("title", "copyright", "software", "artist", "comment", "date", "album",
             "tracknumber", "genre")
#: Major format -> tags a file of that format keeps.
TAG_SUPPORT = {
    "WAV": _WAV_TAGS,
    "RF64": _WAV_TAGS,
    "FLAC": TAG_NAMES,
    "OGG": TAG_NAMES,
    # ID3v2 as written by libsndfile 1.2.2 (measured): no copyright or license; "software"
    # is the encoder's own text
    "MP3": ("title", "artist", "comment", "date", "album", "tracknumber", "genre"),
    "AIFF": ("title", "copyright", "software", "artist", "comment"),
    "W64": (),
}

READ_DTYPES = ("float64", "float32", "int32", "int16")
WRITE_DTYPES = ("float64", "float32", "int32", "int16")

_WORD_SUBTYPES = {"16": "PCM_16", "24": "PCM_24", "32f": "FLOAT", "64f": "DOUBLE"}
_WORD_BYTES = {"16": 2, "24": 3, "32f": 4, "64f": 8}
_FLOAT_SUBTYPES = frozenset({"FLOAT", "DOUBLE"})
# Perceptual codecs decode to float samples with no fixed word length.
_PERCEPTUAL_SUBTYPES = frozenset({"VORBIS", "OPUS", "MPEG_LAYER_I", "MPEG_LAYER_II",
                                  "MPEG_LAYER_III"})
# Every lossy encoding: the perceptual codecs plus the speech/companding ones.
_LOSSY_SUBTYPES = _PERCEPTUAL_SUBTYPES | frozenset({
    "GSM610", "G721_32", "G723_24", "G723_40", "VOX_ADPCM", "IMA_ADPCM", "MS_ADPCM",
    "NMS_ADPCM_16", "NMS_ADPCM_24", "NMS_ADPCM_32", "ULAW", "ALAW",
})
# Integer source subtype -> word length kept by "like the source". Narrow integer codes (8 bit)
# go to 16 (no output word length is narrower); 32-bit integers go to 32-bit float, whose
# 24-bit mantissa plus exponent keeps more than any converter's noise floor and leaves headroom
# for inter-sample overs.
_SOURCE_WORDS = {
    "PCM_S8": "16", "PCM_U8": "16", "PCM_16": "16", "DWVW_12": "16", "DWVW_16": "16",
    "PCM_24": "24", "DWVW_24": "24", "DWVW_N": "24",
    "PCM_32": "32f", "FLOAT": "32f", "DOUBLE": "64f",
}

#: Rates an Opus stream may carry (RFC 6716 section 2, "(from memory)"; libsndfile 1.2.2 refuses
#: the others with the same list).
OPUS_RATES_HZ = (8000, 12000, 16000, 24000, 48000)
#: FLAC's STREAMINFO/frame header cap on the rate that libsndfile 1.2.2 enforces (measured:
#: 655350 accepted, 655351 refused).
FLAC_MAX_RATE_HZ = 655350
#: Highest rate the Vorbis encoder accepts here. Measured with libsndfile 1.2.2/libvorbis:
#: 200000 Hz encodes; 200001 Hz and above crash the process, so the plan must refuse them.
VORBIS_MAX_RATE_HZ = 200000
#: Rates an MPEG Layer III stream may carry: MPEG-1 (32, 44.1, 48 kHz), MPEG-2 (16, 22.05,
#: 24 kHz) and MPEG-2.5 (8, 11.025, 12 kHz) (ISO/IEC 11172-3 and 13818-3; from memory;
#: libsndfile 1.2.2 with LAME takes these).
MP3_RATES_HZ = (8000, 11025, 12000, 16000, 22050, 24000, 32000, 44100, 48000)
#: Highest MP3 bit rate, kbit/s, by rate: MPEG-1 320, MPEG-2 160, MPEG-2.5 64 (the same
#: standards; libsndfile's encoder maps its compression level onto these ranges).
_MP3_KBPS = ((32000, 32, 320), (16000, 8, 160), (0, 8, 64))
_MP3_MODES = {"constant": "CONSTANT", "average": "AVERAGE", "variable": "VARIABLE"}
_MAX_CHANNELS = {"FLAC": 8, "OGG": 255, "MP3": 2}  # FLAC frame header; Ogg channel mapping (measured)
_SF_MAX_CHANNELS = 1024  # libsndfile's own ceiling (measured: 1025 refused for WAV/AIFF/W64/RF64)
# RIFF/WAVE chunk sizes are unsigned 32-bit (Microsoft RIFF specification, 1991; from memory);
# keep 1 MiB for the header and the INFO chunk.
_WAV_LIMIT_BYTES = 2**32 - 2**20
# AIFF chunk sizes are a signed 32-bit "long" (Apple AIFF 1.3, 1989; from memory).
_AIFF_LIMIT_BYTES = 2**31 - 2**20
#: Longest excerpt :func:`read_excerpt` returns, so a page request can't pull hours into memory.
EXCERPT_MAX_S = 600.0

_COMMENT_JOIN = "; "


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
# output plans

@dataclass(frozen=True)
class OutputPlan:
    """How an output file will be written, decided and checked before any work.

    Attributes
    ----------
    format : str
        soundfile major format ("WAV", "RF64", "FLAC", "OGG", "AIFF", "W64").
    subtype : str
        soundfile subtype ("PCM_16", "PCM_24", "FLOAT", "DOUBLE", "VORBIS", "OPUS").
    rate_hz : int
    channels : int
    bits : str or None
        One of :data:`WORD_LENGTHS`, or None for lossy formats.
    compression_level : float or None
        libsndfile's compression level (0 best .. 1 smallest) for MP3; None otherwise.
    bitrate_mode : str or None
        "CONSTANT", "AVERAGE" or "VARIABLE" for MP3; None otherwise.
    kbps : int or None
        The MP3 bit rate the compression level stands for.
    """

    format: str
    subtype: str
    rate_hz: int
    channels: int
    bits: str | None
    compression_level: float | None = None
    bitrate_mode: str | None = None
    kbps: int | None = None

    @property
    def is_lossy(self):
        return self.bits is None


def _extension(path):
    return os.path.splitext(os.fspath(path))[1].lower()


def _normalise_bits(bits):
    if bits is None:
        return None
    text = str(bits).strip().lower() if not isinstance(bits, bool) else None
    if text in WORD_LENGTHS:
        return text
    raise ParameterError(
        f"bits must be one of {', '.join(WORD_LENGTHS)} (or unset for 'like the source'), "
        f"got {bits!r}", "bits")


def mp3_plan(rate, channels, kbps, mode):
    """The MP3 :class:`OutputPlan`: the bit rate turned into libsndfile's compression level.

    libsndfile 1.2.2 (mpeg_l3_encoder_set_quality) maps a compression level c in 0..1 onto
    ``bitrate = int(high - c (high - low))`` kbit/s for constant and average bit rate (MPEG-1
    32..320, MPEG-2 8..160, MPEG-2.5 8..64) and onto LAME's VBR quality ``10 c`` for variable
    bit rate; half a kbit/s is added before the truncation so the bit rate asked for is the one
    encoded. Variable bit rate uses the same level (a higher rate gives a better quality).
    """
    if rate not in MP3_RATES_HZ:
        raise ParameterError(f"MP3 carries only {', '.join(str(r) for r in MP3_RATES_HZ)} Hz; got "
                             f"{rate} Hz", "rate_hz")
    low, high = next((lo, hi) for floor, lo, hi in _MP3_KBPS if rate >= floor)
    kbps = 128 if kbps is None else kbps
    if isinstance(kbps, bool) or not isinstance(kbps, int) or not low <= kbps <= high:
        raise ParameterError(f"mp3_kbps must be a whole number from {low} to {high} kbit/s at "
                             f"{rate} Hz, got {kbps!r}", "mp3_kbps")
    if mode not in _MP3_MODES:
        raise ParameterError(f"mp3_mode must be one of {', '.join(_MP3_MODES)}, got {mode!r}",
                             "mp3_mode")
    level = min(1.0, max(0.0, (high - kbps - 0.5) / (high - low)))
    return OutputPlan("MP3", "MPEG_LAYER_III", rate, channels, None, compression_level=level,
                      bitrate_mode=_MP3_MODES[mode], kbps=kbps)


def output_plan(path, *, rate_hz, channels, bits=None, source_probe=None, frames_estimate=None,
                mp3_kbps=None, mp3_mode="constant"):
    """Decide and check the format of an output file before any work starts.

    Parameters
    ----------
    path : str or os.PathLike
        The target; its extension picks the format (see :data:`OUTPUT_FORMATS`).
    rate_hz : int
        Output rate.
    channels : int
        Output channel count.
    bits : {"16", "24", "32f", "64f"} or None, optional
        Word length. None (the default) means "like the source": a FLOAT/DOUBLE source gives
        32f/64f where the format carries float and 24 where it doesn't (FLAC); PCM_16 gives 16;
        PCM_24 gives 24; PCM_32 gives 32f (24 for FLAC); a lossy source, or no source, gives 24.
        Lossy targets (.ogg Vorbis, .opus) have no word length: ``bits`` must stay None.
    source_probe : Probe, optional
        The source, for "like the source".
    frames_estimate : int, optional
        Expected output frames. A .wav whose audio would pass 4 GiB (less 1 MiB kept for the
        header and tags) is planned as RF64 instead, which lifts the 32-bit size fields of RIFF;
        the file keeps its .wav name. An .aif/.aiff past 2 GiB is refused.

    Returns
    -------
    OutputPlan

    Raises
    ------
    ParameterError
        Naming the rule and the value: unknown extension (listing the known ones); rate outside
        1000..768000 Hz; channels outside 1..1024 (FLAC 1..8, Ogg 1..255); a word length the
        format can't carry (FLAC has no float); FLAC above 655350 Hz; Opus at a rate other than
        8000, 12000, 16000, 24000 or 48000 Hz; Vorbis above 200000 Hz; ``bits`` set for a lossy
        format; AIFF too large.

    Notes
    -----
    Every accepted plan passes ``soundfile.check_format(format, subtype)``.

    Examples
    --------
    >>> output_plan("episode_48k.flac", rate_hz=48000, channels=2, bits="24")
    OutputPlan(format='FLAC', subtype='PCM_24', rate_hz=48000, channels=2, bits='24')
    """
    ext = _extension(path)
    if ext not in OUTPUT_FORMATS:
        known = ", ".join(sorted(OUTPUT_FORMATS))
        got = f"'{ext}'" if ext else "no extension"
        raise ParameterError(f"output file type must be one of {known}; got {got}", "output")
    fmt = OUTPUT_FORMATS[ext]
    rate = validate_rate(rate_hz, field="rate_hz")
    channels = _check_int(channels, field="channels", minimum=1)
    max_channels = _MAX_CHANNELS.get(fmt, _SF_MAX_CHANNELS)
    if channels > max_channels:
        raise ParameterError(
            f"{ext} files carry at most {max_channels} channels, got {channels}", "channels")
    bits = _normalise_bits(bits)
    if source_probe is not None and not isinstance(source_probe, Probe):
        raise ParameterError(
            f"source_probe must be a Probe, got {type(source_probe).__name__}", "source_probe")

    if fmt == "MP3":
        if bits is not None:
            raise ParameterError(f"{ext} (MPEG Layer III) is lossy and has no word length; leave "
                                 f"bits unset, got {bits}", "bits")
        return mp3_plan(rate, channels, mp3_kbps, mp3_mode)
    if mp3_kbps is not None:
        raise ParameterError(f"mp3_kbps applies to .mp3 outputs only, got {mp3_kbps!r} for {ext}",
                             "mp3_kbps")
    if fmt == "OGG":
        codec = "OPUS" if ext == ".opus" else "VORBIS"
        label = "Opus" if codec == "OPUS" else "Vorbis"
        if bits is not None:
            raise ParameterError(
                f"{ext} ({label}) is lossy and has no word length; leave bits unset, "
                f"got {bits}", "bits")
        if codec == "OPUS" and rate not in OPUS_RATES_HZ:
            allowed = ", ".join(str(r) for r in OPUS_RATES_HZ)
            raise ParameterError(
                f"Opus carries only {allowed} Hz; got {rate} Hz", "rate_hz")
        if codec == "VORBIS" and rate > VORBIS_MAX_RATE_HZ:
            raise ParameterError(
                f"Vorbis encodes rates up to {VORBIS_MAX_RATE_HZ} Hz; got {rate} Hz", "rate_hz")
        return OutputPlan(fmt, codec, rate, channels, None)

    explicit = bits is not None
    if bits is None:
        bits = source_probe.word_length if source_probe is not None else None
        bits = bits or "24"
        if fmt == "FLAC" and bits in ("32f", "64f"):
            bits = "24"  # FLAC has no float; 24 bit is its widest word
    subtype = _WORD_SUBTYPES[bits]
    if fmt == "FLAC" and bits not in ("16", "24"):
        raise ParameterError(
            f"FLAC carries 16- or 24-bit integer samples only (no float); got bits={bits}",
            "bits")
    if not sf.check_format(fmt, subtype):
        raise ParameterError(
            f"{ext} files can't carry {bits}-bit samples; use one of "
            f"{', '.join(b for b in WORD_LENGTHS if sf.check_format(fmt, _WORD_SUBTYPES[b]))}",
            "bits" if explicit else "output")
    if fmt == "FLAC" and rate > FLAC_MAX_RATE_HZ:
        raise ParameterError(
            f"FLAC carries rates up to {FLAC_MAX_RATE_HZ} Hz; got {rate} Hz", "rate_hz")

    if frames_estimate is not None:
        frames_estimate = _check_int(frames_estimate, field="frames_estimate", minimum=0)
        data_bytes = frames_estimate * channels * _WORD_BYTES[bits]
        if fmt == "WAV" and data_bytes > _WAV_LIMIT_BYTES:
            fmt = "RF64"
        elif fmt == "AIFF" and data_bytes > _AIFF_LIMIT_BYTES:
            raise ParameterError(
                f"AIFF holds at most {_AIFF_LIMIT_BYTES} bytes of audio; this output needs about "
                f"{data_bytes} bytes; choose .rf64, .w64 or .flac", "output")
    return OutputPlan(fmt, subtype, rate, channels, bits)


# --------------------------------------------------------------------------------------------
# writing

def refuse_same_file(source, target):
    """Raise ParameterError when ``target`` is the file ``source`` (or would overwrite it).

    Uses ``os.path.samefile`` when both exist (so hard links and symlinks count), otherwise
    compares the normalised real paths. Callers run it before any work starts.

    Raises
    ------
    ParameterError
        With field "output", naming the path.
    """
    src, tgt = os.fspath(source), os.fspath(target)
    if os.path.exists(src) and os.path.exists(tgt):
        same = os.path.samefile(src, tgt)
    else:
        same = (os.path.normcase(os.path.realpath(src))
                == os.path.normcase(os.path.realpath(tgt)))
    if same:
        raise ParameterError(
            f"output must not be the source file; the source is never overwritten, got '{tgt}'",
            "output")


def converted_comment(fs_in, fs_out):
    """Return the comment line added to a converted file, e.g.
    ``"Converted 44100 -> 48000 Hz by Rateferry 0.1.0"``."""
    return f"Converted {int(fs_in)} -> {int(fs_out)} Hz by Rateferry {__version__}"


class AtomicWriter:
    """Write an output file in blocks; it appears at ``path`` only after a clean finish.

    Parameters
    ----------
    path : str or os.PathLike
        The target. Its folder must exist.
    plan : OutputPlan
        From :func:`output_plan`.
    tags : dict of str to str, optional
        Text tags (keys from :data:`TAG_NAMES`, e.g. ``probe(src).tags``). Those the target
        format keeps (:data:`TAG_SUPPORT`) are written; the rest are listed in
        :attr:`dropped_tags`. libsndfile appends "(libsndfile-x.y.z)" to "software" unless the
        text already names it, so copies don't stack.
    add_comment : str, optional
        Text appended to the comment tag (joined with "; "), e.g. :func:`converted_comment`.
    source : str or os.PathLike, optional
        The source file; when given, :func:`refuse_same_file` runs at construction.
    chunks : list of (bytes, bytes), optional
        RIFF chunks (``bext``, ``iXML``, ``cue ``, ``LIST``/``adtl``, from
        :func:`webapp.riffchunks.carried_chunks`) added to a WAV output before it is moved onto
        the target (:func:`webapp.riffchunks.insert_chunks`).
    check : callable(path), optional
        Called with the finished partial file (chunks added) before it is moved onto the
        target, e.g. to decode and measure a lossy output; when it raises, the partial file is
        removed, the target is left as it was, and the exception goes to the caller.

    Notes
    -----
    The data goes to a partial file in the hidden folder ``.rateferry-partial/`` of the
    target's folder (:mod:`webapp.partials`: a crash leaves it where the next start removes
    it); a clean exit closes it, fsyncs it, ``os.replace`` s it onto the target and fsyncs the
    folder. An
    exception, :meth:`abort`, or a file with no frames deletes the temporary file and leaves any
    existing target untouched. A symlink at the target is replaced, never followed.

    :meth:`write` accepts float32/float64 (libsndfile scales and clips to the word length) and
    int16/int32 codes. For exact codes (after dither) pass int16 for 16-bit, or int32 holding
    the 24-bit code shifted left by 8 for 24-bit: libsndfile keeps the top bits unchanged.

    Examples
    --------
    >>> import numpy as np, tempfile, os
    >>> target = os.path.join(tempfile.mkdtemp(), "out.wav")
    >>> plan = output_plan(target, rate_hz=48000, channels=1, bits="16")
    >>> with AtomicWriter(target, plan) as out:
    ...     out.write(np.zeros((480, 1), dtype=np.int16))
    >>> probe(target).frames
    480
    """

    def __init__(self, path, plan, *, tags=None, add_comment=None, source=None, chunks=(),
                 check=None):
        if not isinstance(plan, OutputPlan):
            raise ParameterError(f"plan must be an OutputPlan, got {type(plan).__name__}", "plan")
        self.path = os.fspath(path)
        self.plan = plan
        if source is not None:
            refuse_same_file(source, self.path)
        self._tags = self._prepare_tags(tags, add_comment)
        supported = TAG_SUPPORT.get(plan.format, ())
        self.dropped_tags = tuple(k for k in self._tags if k not in supported)
        self._tags = {k: v for k, v in self._tags.items() if k in supported}
        self.frames_written = 0
        self.temp_path = None
        self._partial = None
        self._fd = None
        self._sf = None
        self._done = False
        self._bytes_per_frame = plan.channels * _WORD_BYTES.get(plan.bits or "16", 2)
        if chunks and plan.format != "WAV":
            raise ParameterError(f"RIFF chunks go into WAV outputs only, got {plan.format}", "chunks")
        self._chunks = list(chunks)
        self._check = check

    @staticmethod
    def _prepare_tags(tags, add_comment):
        out = {}
        for key, value in (tags or {}).items():
            if key not in TAG_NAMES:
                raise ParameterError(
                    f"tag names must be among {', '.join(TAG_NAMES)}; got {key!r}", "tags")
            if not isinstance(value, str):
                raise ParameterError(f"tag {key} must be text, got {value!r}", "tags")
            if value:
                out[key] = value
        if add_comment:
            comment = out.get("comment")
            out["comment"] = f"{comment}{_COMMENT_JOIN}{add_comment}" if comment else add_comment
        return out

    # -- context manager ---------------------------------------------------------------------
    def __enter__(self):
        self.open()
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None or self._done:
            self.abort()
            return False
        self.commit()
        return False

    def open(self):
        """Create the temporary file and open it for writing."""
        if self._sf is not None or self._done:
            raise AudioFileError(f"'{_display_name(self.path)}' writer was already opened",
                                 "output")
        folder = os.path.dirname(os.path.abspath(self.path))
        name = _display_name(self.path)
        if not os.path.isdir(folder):
            raise AudioFileError(f"cannot write '{name}': the folder '{folder}' does not exist",
                                 "output")
        if os.path.isdir(self.path):
            raise AudioFileError(f"cannot write '{name}': a folder of that name exists", "output")
        try:
            self._partial = partials.create(self.path, suffix=os.path.splitext(self.path)[1])
        except OSError as exc:
            raise AudioFileError(f"cannot write '{name}': {os_error_text(exc, self.path)}",
                                 "output") from None
        self._fd = self._partial.fd
        self.temp_path = self._partial.path
        try:
            codec = {} if self.plan.compression_level is None else dict(
                compression_level=self.plan.compression_level,
                bitrate_mode=self.plan.bitrate_mode)
            self._sf = sf.SoundFile(self._fd, mode="w", samplerate=self.plan.rate_hz,
                                    channels=self.plan.channels, subtype=self.plan.subtype,
                                    format=self.plan.format, closefd=False, **codec)
            for key, value in self._tags.items():
                setattr(self._sf, key, value)  # before audio: FLAC/Ogg write tags up front
        except Exception as exc:
            self.abort()
            raise AudioFileError(f"cannot write '{name}': {_write_failure(exc, self.path)}",
                                 "output") from None
        return self

    def write(self, block):
        """Append a block of frames x channels (1-D allowed for mono).

        Raises
        ------
        ParameterError
            For a wrong shape or dtype.
        AudioFileError
            For a NaN/Inf sample (naming the output frame), a write failure, or a .wav passing
            its 4 GiB limit.
        """
        if self._sf is None:
            raise AudioFileError(
                f"'{_display_name(self.path)}' writer is not open (use it in a with block)",
                "output")
        block = np.asarray(block)
        if block.ndim == 1 and self.plan.channels == 1:
            block = block[:, None]
        if block.ndim != 2 or block.shape[1] != self.plan.channels:
            raise ParameterError(
                f"blocks must be frames x {self.plan.channels} channels, got shape {block.shape}",
                "block")
        _check_dtype(block.dtype, WRITE_DTYPES, field="block dtype")
        name = _display_name(self.path)
        _check_finite_block(block, name=name, first_frame=self.frames_written, action="write")
        if (self.plan.format == "WAV"
                and (self.frames_written + block.shape[0]) * self._bytes_per_frame
                > _WAV_LIMIT_BYTES):
            raise AudioFileError(
                f"'{name}' would pass the 4 GiB WAV limit; plan it with frames_estimate so it "
                "becomes RF64", "output")
        try:
            self._sf.write(block)
        except Exception as exc:
            raise AudioFileError(f"cannot write '{name}': {_write_failure(exc, self.path)}",
                                 "output") from None
        self.frames_written += block.shape[0]

    def commit(self):
        """Finish the file and move it onto the target."""
        name = _display_name(self.path)
        if self._sf is None:
            raise AudioFileError(f"'{name}' writer is not open", "output")
        if self.frames_written == 0:
            self.abort()
            raise AudioFileError(f"no audio was written to '{name}'; no output made", "output")
        try:
            self._sf.close()
            self._sf = None
            os.fsync(self._fd)
            os.close(self._fd)
            self._fd = self._partial.fd = None
            if self._chunks:
                os.replace(riffchunks.insert_chunks(self._partial.path, self._chunks),
                           self._partial.path)
        except Exception as exc:
            self.abort()
            raise AudioFileError(f"cannot finish '{name}': {_write_failure(exc, self.path)}",
                                 "output") from None
        if self._check is not None:
            try:
                self._check(self._partial.path)
            except BaseException:
                self.abort()
                raise
        try:
            self._partial.finish()
            self.temp_path = None
        except Exception as exc:
            self.abort()
            raise AudioFileError(f"cannot finish '{name}': {_write_failure(exc, self.path)}",
                                 "output") from None
        self._done = True
        _fsync_folder(os.path.dirname(os.path.abspath(self.path)))

    def abort(self):
        """Stop writing and delete the temporary file; the target is left as it was."""
        self._done = True
        if self._sf is not None:
            try:
                self._sf.close()
            except Exception:
                pass  # the file is being thrown away
            self._sf = None
        if self._partial is not None:
            self._partial.discard()   # closes the descriptor, removes the file and its lock
            self._partial = None
        self._fd = None
        self.temp_path = None


def _fsync_folder(folder):
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return  # not every platform lets a folder be opened; the rename itself is done
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


# --------------------------------------------------------------------------------------------
# hashing

def sha256_file(path, *, chunk_bytes=1 << 20):
    """Return the SHA-256 of the file at ``path`` as lowercase hex, read in chunks."""
    digest = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(chunk_bytes), b""):
            digest.update(chunk)
    return digest.hexdigest()
