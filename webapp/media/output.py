"""Outputs: output plans checked before any work, and the atomic writer."""

import os
from dataclasses import dataclass

import numpy as np
import soundfile as sf

from webapp import __version__, partials, riff, riffchunks
from webapp.dsp.dither import (
    WORD_LENGTHS,  # word lengths an output may carry (one list)
)
from webapp.dsp.errors import AudioFileError, ParameterError
from webapp.dsp.rates import validate_rate
from webapp.oserrors import os_error_text
from webapp.oserrors import write_failure as _write_failure

from .formats import (
    _AIFF_LIMIT_BYTES,
    _COMMENT_JOIN,
    _MAX_CHANNELS,
    _MP3_KBPS,
    _MP3_MODES,
    _SF_MAX_CHANNELS,
    _WAV_LIMIT_BYTES,
    _WORD_BYTES,
    _WORD_SUBTYPES,
    FLAC_MAX_RATE_HZ,
    MP3_RATES_HZ,
    OPUS_RATES_HZ,
    OUTPUT_FORMATS,
    TAG_NAMES,
    TAG_SUPPORT,
    VORBIS_MAX_RATE_HZ,
    WRITE_DTYPES,
)
from .source import Probe, _check_dtype, _check_finite_block, _check_int, _display_name

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
            riff.clear_peak_time(self._partial.path)    # the same samples, the same bytes
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
