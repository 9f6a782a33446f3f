"""Tests of webapp.media against real files written and read by soundfile (libsndfile).

The reference for every figure is soundfile itself (a general-purpose library outside the
project): files are generated in tmp_path with soundfile, and whatever webapp.media reports or
writes is compared with what soundfile reads.
"""

import hashlib
import inspect
import os

import numpy as np
import pytest
import soundfile as sf

from webapp import __version__, media
from webapp.dsp.errors import AudioFileError, ParameterError
from webapp.media import (
    OUTPUT_FORMATS, TAG_NAMES, TAG_SUPPORT, WORD_LENGTHS, AtomicWriter, OutputPlan, Probe,
    converted_comment, output_plan, probe, read_blocks, read_excerpt, refuse_same_file,
    sha256_file,
)


def _noise(rng, frames, channels, scale=0.25):
    return scale * rng.uniform(-1.0, 1.0, size=(frames, channels))


# --------------------------------------------------------------------------------------------
# pinned defaults

def test_public_defaults_are_pinned():
    assert OUTPUT_FORMATS == {
        ".wav": "WAV", ".flac": "FLAC", ".ogg": "OGG", ".opus": "OGG",
        ".aif": "AIFF", ".aiff": "AIFF", ".w64": "W64", ".rf64": "RF64", ".mp3": "MP3",
    }
    assert WORD_LENGTHS == ("16", "24", "32f", "64f")
    params = inspect.signature(read_blocks).parameters
    assert params["blocksize"].default == 65536
    assert params["dtype"].default == "float64"
    assert params["start"].default == 0
    assert params["frames"].default == -1
    assert converted_comment(44100, 48000) == f"Converted 44100 -> 48000 Hz by Rateferry {__version__}"


# --------------------------------------------------------------------------------------------
# probe

@pytest.mark.parametrize(
    "name, fmt, subtype, is_float",
    [
        ("a.wav", "WAV", "PCM_16", False),
        ("a24.wav", "WAV", "PCM_24", False),
        ("f.wav", "WAV", "FLOAT", True),
        ("a.flac", "FLAC", "PCM_24", False),
        ("a.ogg", "OGG", "VORBIS", True),
        ("a.aiff", "AIFF", "PCM_16", False),
    ],
)
def test_probe_reports_the_figures_soundfile_wrote(tmp_audio, rng, name, fmt, subtype, is_float):
    path = tmp_audio(name, _noise(rng, 11025, 2), 44100, format=fmt, subtype=subtype)
    info = probe(path)
    assert isinstance(info, Probe)
    assert (info.format, info.subtype) == (fmt, subtype)
    assert (info.rate_hz, info.channels, info.frames) == (44100, 2, 11025)
    assert info.duration_s == pytest.approx(0.25, abs=1e-12)
    assert info.is_float is is_float
    assert info.size_bytes == os.path.getsize(path)
    assert info.path == os.fspath(path)


def test_probe_word_length_follows_the_subtype(tmp_audio, rng):
    cases = {"PCM_16": "16", "PCM_24": "24", "PCM_32": "32f", "FLOAT": "32f", "DOUBLE": "64f",
             "PCM_U8": "16"}
    for subtype, word in cases.items():
        path = tmp_audio(f"w_{subtype}.wav", _noise(rng, 100, 1), 8000, subtype=subtype)
        assert probe(path).word_length == word, subtype
    ogg = tmp_audio("w.ogg", _noise(rng, 4000, 1), 8000, format="OGG", subtype="VORBIS")
    assert probe(ogg).word_length is None
    assert probe(ogg).is_lossy


def test_probe_reads_tags(tmp_audio, rng):
    tags = {"title": "Harbour test", "artist": "Nobody", "comment": "a note"}
    path = tmp_audio("t.flac", _noise(rng, 1000, 1), 44100, subtype="PCM_16", tags=tags)
    assert {k: probe(path).tags.get(k) for k in tags} == tags


def test_probe_names_a_missing_file(tmp_path):
    with pytest.raises(AudioFileError, match=r"'nowhere\.wav': no such file") as err:
        probe(tmp_path / "nowhere.wav")
    assert err.value.field == "path"


def test_probe_names_a_folder(tmp_path):
    (tmp_path / "clips.wav").mkdir()
    with pytest.raises(AudioFileError, match=r"'clips\.wav'.*folder"):
        probe(tmp_path / "clips.wav")


def test_probe_rejects_an_empty_file(tmp_path):
    path = tmp_path / "empty.wav"
    path.write_bytes(b"")
    with pytest.raises(AudioFileError, match=r"'empty\.wav'.*empty \(0 bytes\)"):
        probe(path)


def test_probe_rejects_random_bytes(tmp_path, rng):
    path = tmp_path / "noise.wav"
    path.write_bytes(rng.bytes(5000))
    with pytest.raises(AudioFileError, match=r"'noise\.wav'.*not a recognised audio format"):
        probe(path)


def test_probe_rejects_a_truncated_header(tmp_audio, rng, tmp_path):
    good = tmp_audio("good.wav", _noise(rng, 1000, 2), 44100, subtype="PCM_16")
    cut = tmp_path / "cut.wav"
    cut.write_bytes(good.read_bytes()[:30])  # RIFF + part of "fmt ", no "data" chunk
    with pytest.raises(AudioFileError, match=r"cannot read 'cut\.wav': .*data"):
        probe(cut)


def test_probe_rejects_a_file_with_no_frames(tmp_audio):
    path = tmp_audio("silent.wav", np.zeros((0, 2)), 44100, subtype="PCM_16")
    assert sf.info(path).frames == 0  # the file itself is valid to libsndfile
    with pytest.raises(AudioFileError, match=r"'silent\.wav'.*0 frames"):
        probe(path)


@pytest.mark.parametrize("rate_hz", [800, 999])
def test_probe_rejects_a_rate_below_1000_hz(tmp_audio, rate_hz):
    path = tmp_audio("slow.wav", np.zeros((100, 1)), rate_hz, subtype="PCM_16")
    with pytest.raises(ParameterError, match=rf"'slow\.wav': .*1000 to 768000 Hz, got {rate_hz}"):
        probe(path)


# --------------------------------------------------------------------------------------------
# reading

@pytest.mark.parametrize("blocksize", [1, 7, 1000, 4097, 9973, 65536])
@pytest.mark.parametrize("dtype", ["float64", "float32", "int16", "int32"])
def test_streaming_read_equals_whole_file_read(tmp_audio, rng, blocksize, dtype):
    path = tmp_audio("s.wav", _noise(rng, 9973, 3), 48000, subtype="PCM_24")
    whole, _ = sf.read(path, dtype=dtype, always_2d=True)
    blocks = list(read_blocks(path, blocksize=blocksize, dtype=dtype))
    assert all(b.ndim == 2 and b.dtype == np.dtype(dtype) for b in blocks)
    assert all(b.shape[0] == blocksize for b in blocks[:-1])
    np.testing.assert_array_equal(np.concatenate(blocks), whole)


def test_streaming_read_of_mono_is_two_dimensional(tmp_audio, rng):
    path = tmp_audio("m.flac", _noise(rng, 5000, 1)[:, 0], 44100, subtype="PCM_16")
    blocks = list(read_blocks(path, blocksize=999))
    assert [b.shape[1] for b in blocks] == [1] * 6
    np.testing.assert_array_equal(np.concatenate(blocks)[:, 0], sf.read(path)[0])


@pytest.mark.parametrize("start, frames", [(0, 10), (1234, 5000), (29000, -1), (29000, 99999),
                                           (30011, -1)])
def test_streaming_read_of_a_window_equals_soundfile(tmp_audio, rng, start, frames):
    path = tmp_audio("w.flac", _noise(rng, 30011, 2), 44100, subtype="PCM_24")
    expected, _ = sf.read(path, start=start, frames=frames, always_2d=True)
    got = list(read_blocks(path, blocksize=777, start=start, frames=frames))
    got = np.concatenate(got) if got else np.zeros((0, 2))
    np.testing.assert_array_equal(got, expected)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_streaming_read_reports_a_non_finite_sample_with_its_frame(tmp_audio, rng, bad):
    data = _noise(rng, 20000, 2)
    data[12345, 1] = bad
    path = tmp_audio("broken.wav", data, 44100, subtype="FLOAT")
    reader = read_blocks(path, blocksize=1000)
    good = [next(reader) for _ in range(12)]  # frames 0..11999 are fine
    assert sum(b.shape[0] for b in good) == 12000
    with pytest.raises(AudioFileError, match=r"'broken\.wav'.*at frame 12345, channel 1"):
        next(reader)


def test_streaming_read_frame_index_counts_from_the_file_start(tmp_audio, rng):
    data = _noise(rng, 5000, 1)
    data[4321, 0] = np.nan
    path = tmp_audio("late.wav", data, 8000, subtype="DOUBLE")
    with pytest.raises(AudioFileError, match=r"at frame 4321,"):
        list(read_blocks(path, blocksize=64, start=4000))


def test_streaming_read_checks_its_arguments_at_the_call(tmp_audio, tmp_path, rng):
    path = tmp_audio("a.wav", _noise(rng, 100, 1), 8000, subtype="PCM_16")
    with pytest.raises(ParameterError, match="blocksize must be at least 1, got 0"):
        read_blocks(path, blocksize=0)
    with pytest.raises(ParameterError, match="dtype must be one of"):
        read_blocks(path, dtype="uint8")
    with pytest.raises(ParameterError, match="start must be at least 0, got -5"):
        read_blocks(path, start=-5)
    with pytest.raises(ParameterError, match="frames must be at least 0 .or -1 for all., got -2"):
        read_blocks(path, frames=-2)
    with pytest.raises(AudioFileError, match="'gone.wav': no such file"):
        read_blocks(tmp_path / "gone.wav")
    with pytest.raises(ParameterError, match="at most the file's length of 100 frames, got 101"):
        list(read_blocks(path, start=101))


def test_read_excerpt_equals_the_slice_soundfile_reads(tmp_audio, rng):
    path = tmp_audio("e.wav", _noise(rng, 44100, 2), 44100, subtype="PCM_16")
    got = read_excerpt(path, start_s=0.25, length_s=0.1)
    expected, _ = sf.read(path, start=11025, frames=4410, always_2d=True)
    np.testing.assert_array_equal(got, expected)
    tail = read_excerpt(path, start_s=0.9, length_s=5.0, dtype="int16")
    assert tail.shape == (44100 - 39690, 2) and tail.dtype == np.int16


@pytest.mark.parametrize("kwargs, message", [
    ({"start_s": -0.1, "length_s": 1.0}, "start_s must be 0 s or later"),
    ({"start_s": 2.0, "length_s": 1.0}, "start_s must lie inside the file"),
    ({"start_s": 0.0, "length_s": 0.0}, "length_s must be more than 0 s"),
    ({"start_s": 0.0, "length_s": 601.0}, "at most 600 s"),
    ({"start_s": float("nan"), "length_s": 1.0}, "start_s must be a finite number"),
])
def test_read_excerpt_rejects_bad_times(tmp_audio, rng, kwargs, message):
    path = tmp_audio("e.wav", _noise(rng, 8000, 1), 8000, subtype="PCM_16")
    with pytest.raises(ParameterError, match=message):
        read_excerpt(path, **kwargs)


# --------------------------------------------------------------------------------------------
# output plans

@pytest.mark.parametrize("ext", sorted(OUTPUT_FORMATS))
@pytest.mark.parametrize("bits", [None, *WORD_LENGTHS])
def test_every_accepted_plan_is_a_format_soundfile_accepts(ext, bits, tmp_path):
    rate = 48000
    try:
        plan = output_plan(tmp_path / f"x{ext}", rate_hz=rate, channels=2, bits=bits)
    except ParameterError:
        lossy = ext in (".ogg", ".opus")
        fmt = OUTPUT_FORMATS[ext]
        # Refused only when the format really can't carry it (soundfile.check_format) or is
        # lossy with an explicit word length.
        assert bits is not None
        assert lossy or not sf.check_format(fmt, {"16": "PCM_16", "24": "PCM_24",
                                                  "32f": "FLOAT", "64f": "DOUBLE"}[bits])
        return
    assert sf.check_format(plan.format, plan.subtype)
    # and the writer produces exactly that file
    target = tmp_path / f"x{ext}"
    with AtomicWriter(target, plan) as out:
        out.write(np.zeros((4800, 2)))
    info = sf.info(target)
    assert (info.format, info.subtype, info.samplerate, info.channels) == (
        plan.format, plan.subtype, rate, 2)


def test_flac_with_float_words_is_refused_before_any_file_exists(tmp_path):
    with pytest.raises(ParameterError, match="FLAC carries 16- or 24-bit .*got bits=32f") as err:
        output_plan(tmp_path / "out.flac", rate_hz=48000, channels=2, bits="32f")
    assert err.value.field == "bits"
    assert os.listdir(tmp_path) == []


def test_opus_at_44100_hz_is_refused_before_any_file_exists(tmp_path):
    with pytest.raises(ParameterError,
                       match="Opus carries only 8000, 12000, 16000, 24000, 48000 Hz; got 44100"):
        output_plan(tmp_path / "out.opus", rate_hz=44100, channels=2)
    assert os.listdir(tmp_path) == []


@pytest.mark.parametrize("rate_hz", [8000, 12000, 16000, 24000, 48000])
def test_opus_plans_the_rates_it_carries(tmp_path, rate_hz):
    plan = output_plan(tmp_path / "o.opus", rate_hz=rate_hz, channels=1)
    assert plan == OutputPlan("OGG", "OPUS", rate_hz, 1, None)


@pytest.mark.parametrize("ext", [".ogg", ".opus"])
def test_lossy_targets_refuse_a_word_length(tmp_path, ext):
    with pytest.raises(ParameterError, match=rf"\{ext} \((Vorbis|Opus)\) is lossy.*got 16"):
        output_plan(tmp_path / f"o{ext}", rate_hz=48000, channels=2, bits="16")


def test_vorbis_above_200_khz_is_refused(tmp_path):
    assert output_plan(tmp_path / "v.ogg", rate_hz=200000, channels=1).subtype == "VORBIS"
    with pytest.raises(ParameterError, match="Vorbis encodes rates up to 200000 Hz; got 384000"):
        output_plan(tmp_path / "v.ogg", rate_hz=384000, channels=1)


def test_flac_rate_ceiling(tmp_path):
    plan = output_plan(tmp_path / "f.flac", rate_hz=655350, channels=1, bits="16")
    with AtomicWriter(tmp_path / "f.flac", plan) as out:  # libsndfile accepts the ceiling
        out.write(np.zeros((100, 1)))
    assert sf.info(tmp_path / "f.flac").samplerate == 655350
    with pytest.raises(ParameterError, match="FLAC carries rates up to 655350 Hz; got 705600"):
        output_plan(tmp_path / "g.flac", rate_hz=705600, channels=1, bits="16")


@pytest.mark.parametrize("ext, channels, limit", [(".flac", 9, 8), (".opus", 256, 255),
                                                  (".wav", 1025, 1024)])
def test_channel_ceilings(tmp_path, ext, channels, limit):
    with pytest.raises(ParameterError, match=f"at most {limit} channels, got {channels}"):
        output_plan(tmp_path / f"c{ext}", rate_hz=48000, channels=channels)


def test_unknown_extension_lists_the_known_ones(tmp_path):
    with pytest.raises(ParameterError, match=r"must be one of \.aif, \.aiff, \.flac, \.mp3, "
                                             r"\.ogg, \.opus, \.rf64, \.w64, \.wav; got '\.m4a'"):
        output_plan(tmp_path / "a.m4a", rate_hz=48000, channels=2)
    with pytest.raises(ParameterError, match="got no extension"):
        output_plan(tmp_path / "a", rate_hz=48000, channels=2)


@pytest.mark.parametrize("kwargs, message", [
    ({"rate_hz": 500, "channels": 1}, "rate_hz must be an integer from 1000 to 768000 Hz, got 500"),
    ({"rate_hz": 48000, "channels": 0}, "channels must be at least 1, got 0"),
    ({"rate_hz": 48000, "channels": 1, "bits": "20"}, "bits must be one of 16, 24, 32f, 64f"),
    ({"rate_hz": 48000, "channels": 1, "frames_estimate": -1},
     "frames_estimate must be at least 0"),
])
def test_plan_rejects_bad_values(tmp_path, kwargs, message):
    with pytest.raises(ParameterError, match=message):
        output_plan(tmp_path / "x.wav", **kwargs)


@pytest.mark.parametrize("source_subtype, source_fmt, target, expected", [
    ("FLOAT", "WAV", ".wav", "FLOAT"),
    ("DOUBLE", "WAV", ".w64", "DOUBLE"),
    ("FLOAT", "WAV", ".flac", "PCM_24"),  # FLAC has no float: its widest word
    ("PCM_16", "WAV", ".flac", "PCM_16"),
    ("PCM_24", "WAV", ".aiff", "PCM_24"),
    ("PCM_32", "WAV", ".wav", "FLOAT"),
    ("VORBIS", "OGG", ".wav", "PCM_24"),  # lossy source -> 24 bit
    ("PCM_16", "FLAC", ".ogg", "VORBIS"),
])
def test_plan_like_the_source(tmp_audio, rng, source_subtype, source_fmt, target, expected):
    ext = ".ogg" if source_fmt == "OGG" else ".wav"
    src = tmp_audio(f"src{ext}", _noise(rng, 4000, 2), 44100, format=source_fmt,
                    subtype=source_subtype)
    plan = output_plan(f"out{target}", rate_hz=48000, channels=2, source_probe=probe(src))
    assert plan.subtype == expected
    assert plan.rate_hz == 48000 and plan.channels == 2


def test_plan_without_a_source_defaults_to_24_bit():
    assert output_plan("x.wav", rate_hz=48000, channels=2).bits == "24"


def test_large_wav_switches_to_rf64_at_the_riff_limit():
    # RIFF chunk sizes are unsigned 32-bit (Microsoft/IBM RIFF specification, 1991; from
    # memory): the plan keeps 1 MiB of the 4 GiB for header and tags.
    limit = 2**32 - 2**20
    frames_at_limit = limit // (2 * 3)  # stereo 24 bit: 6 bytes a frame
    at = output_plan("long.wav", rate_hz=48000, channels=2, bits="24",
                     frames_estimate=frames_at_limit)
    over = output_plan("long.wav", rate_hz=48000, channels=2, bits="24",
                       frames_estimate=frames_at_limit + 1)
    assert at.format == "WAV" and over.format == "RF64"
    assert over.subtype == "PCM_24"
    # 8 hours of 48 kHz stereo 32-bit float is 11 GB: RF64; W64 and FLAC are left alone.
    eight_hours = 8 * 3600 * 48000
    assert output_plan("n.wav", rate_hz=48000, channels=2, bits="32f",
                       frames_estimate=eight_hours).format == "RF64"
    assert output_plan("n.w64", rate_hz=48000, channels=2, bits="32f",
                       frames_estimate=eight_hours).format == "W64"
    assert output_plan("n.flac", rate_hz=48000, channels=2, bits="24",
                       frames_estimate=eight_hours).format == "FLAC"


def test_large_aiff_is_refused():
    with pytest.raises(ParameterError, match="AIFF holds at most .*choose .rf64, .w64 or .flac"):
        output_plan("n.aiff", rate_hz=48000, channels=2, bits="24",
                    frames_estimate=3600 * 48000 * 4)


# --------------------------------------------------------------------------------------------
# atomic writing

def _partials(folder):
    """Partial files and their folder: the writer keeps them in .rateferry-partial/."""
    sub = os.path.join(folder, ".rateferry-partial")
    inside = sorted(os.listdir(sub)) if os.path.isdir(sub) else []
    return [n for n in os.listdir(folder) if ".partial" in n] + \
        [n for n in inside if n.endswith(".partial")]


def test_target_appears_only_after_a_clean_exit(tmp_path, rng):
    target = tmp_path / "episode.wav"
    plan = output_plan(target, rate_hz=48000, channels=2, bits="24")
    data = _noise(rng, 10000, 2)
    with AtomicWriter(target, plan) as out:
        out.write(data[:6000])
        out.write(data[6000:])
        assert not target.exists()
        (temp,) = _partials(tmp_path)
        assert temp.startswith("episode.") and temp.endswith(".wav.partial")
    assert target.exists()
    assert _partials(tmp_path) == []
    back, rate = sf.read(target, always_2d=True)
    assert rate == 48000 and back.shape == (10000, 2)
    # 24-bit quantisation: libsndfile scales by 2**23 - 1 on write and 2**23 on read
    np.testing.assert_allclose(back, data, atol=2.0 / 2**23)
    assert out.frames_written == 10000


def test_exception_mid_write_leaves_no_output_and_no_temp_file(tmp_path, rng):
    target = tmp_path / "episode.flac"
    plan = output_plan(target, rate_hz=48000, channels=1, bits="16")
    with pytest.raises(RuntimeError, match="cancelled"):
        with AtomicWriter(target, plan) as out:
            out.write(_noise(rng, 5000, 1))
            raise RuntimeError("cancelled")
    assert os.listdir(tmp_path) == []


def test_failure_keeps_an_existing_target_unchanged(tmp_path, rng):
    target = tmp_path / "episode.wav"
    target.write_bytes(b"previous output")
    plan = output_plan(target, rate_hz=48000, channels=1, bits="16")
    with pytest.raises(AudioFileError, match="non-finite sample"):
        with AtomicWriter(target, plan) as out:
            out.write(_noise(rng, 100, 1))
            bad = _noise(rng, 100, 1)
            bad[40, 0] = np.nan
            out.write(bad)
    assert target.read_bytes() == b"previous output"
    assert _partials(tmp_path) == []


def test_writer_names_the_output_frame_of_a_non_finite_sample(tmp_path, rng):
    target = tmp_path / "o.wav"
    plan = output_plan(target, rate_hz=48000, channels=2, bits="32f")
    with AtomicWriter(target, plan) as out:
        out.write(_noise(rng, 300, 2))
        bad = _noise(rng, 100, 2)
        bad[7, 1] = np.inf
        with pytest.raises(AudioFileError, match=r"'o\.wav' was given .*at frame 307, channel 1"):
            out.write(bad)
        out.abort()
    assert os.listdir(tmp_path) == []


def test_abort_leaves_nothing(tmp_path, rng):
    target = tmp_path / "a.aiff"
    plan = output_plan(target, rate_hz=44100, channels=2, bits="16")
    with AtomicWriter(target, plan) as out:
        out.write(_noise(rng, 1000, 2))
        out.abort()
    assert os.listdir(tmp_path) == []


def test_an_output_with_no_frames_is_not_made(tmp_path):
    target = tmp_path / "none.flac"
    plan = output_plan(target, rate_hz=48000, channels=1, bits="16")
    with pytest.raises(AudioFileError, match=r"no audio was written to 'none\.flac'"):
        with AtomicWriter(target, plan):
            pass
    assert os.listdir(tmp_path) == []


def test_writer_checks_block_shape_and_dtype(tmp_path):
    target = tmp_path / "s.wav"
    plan = output_plan(target, rate_hz=48000, channels=2, bits="16")
    with AtomicWriter(target, plan) as out:
        with pytest.raises(ParameterError, match=r"frames x 2 channels, got shape \(10, 3\)"):
            out.write(np.zeros((10, 3)))
        with pytest.raises(ParameterError, match=r"frames x 2 channels, got shape \(10,\)"):
            out.write(np.zeros(10))
        with pytest.raises(ParameterError, match="block dtype must be one of"):
            out.write(np.zeros((10, 2), dtype=np.uint8))
        out.abort()
    assert os.listdir(tmp_path) == []


def test_writer_fails_cleanly_when_the_folder_is_missing(tmp_path):
    target = tmp_path / "no" / "such" / "o.wav"
    plan = output_plan(target, rate_hz=48000, channels=1, bits="16")
    with pytest.raises(AudioFileError, match="does not exist"):
        with AtomicWriter(target, plan):
            pass


def test_writer_replaces_a_symlink_and_never_writes_through_it(tmp_path, rng):
    elsewhere = tmp_path / "keep.bin"
    elsewhere.write_bytes(b"untouched")
    target = tmp_path / "link.wav"
    target.symlink_to(elsewhere)
    plan = output_plan(target, rate_hz=8000, channels=1, bits="16")
    with AtomicWriter(target, plan) as out:
        out.write(_noise(rng, 100, 1))
    assert elsewhere.read_bytes() == b"untouched"
    assert not target.is_symlink() and sf.info(target).frames == 100


def test_float_overs_clip_instead_of_wrapping(tmp_path):
    # A wrapped 16-bit code would turn +1.5 into a large negative value.
    target = tmp_path / "c.wav"
    with AtomicWriter(target, output_plan(target, rate_hz=8000, channels=1, bits="16")) as out:
        out.write(np.array([[1.5], [-1.5], [0.5]]))
    np.testing.assert_array_equal(sf.read(target, dtype="int16")[0], [32767, -32768, 16384])


# --------------------------------------------------------------------------------------------
# exact integer codes

def test_int16_codes_round_trip_exactly_through_pcm_16(tmp_path, rng):
    codes = rng.integers(-32768, 32768, size=(20000, 2), dtype=np.int16)
    codes[:2] = [[-32768, 32767], [0, -1]]
    target = tmp_path / "c16.flac"
    with AtomicWriter(target, output_plan(target, rate_hz=48000, channels=2, bits="16")) as out:
        out.write(codes[:7001])
        out.write(codes[7001:])
    back, _ = sf.read(target, dtype="int16", always_2d=True)
    np.testing.assert_array_equal(back, codes)


@pytest.mark.parametrize("ext", [".wav", ".flac", ".aiff"])
def test_24_bit_codes_shifted_into_int32_round_trip_exactly(tmp_path, rng, ext):
    codes = rng.integers(-2**23, 2**23, size=(20000, 1), dtype=np.int32)
    codes[:2, 0] = [-2**23, 2**23 - 1]
    target = tmp_path / f"c24{ext}"
    with AtomicWriter(target, output_plan(target, rate_hz=96000, channels=1, bits="24")) as out:
        out.write(codes << 8)
    back, _ = sf.read(target, dtype="int32", always_2d=True)
    np.testing.assert_array_equal(back >> 8, codes)
    np.testing.assert_array_equal(back & 0xFF, 0)


# --------------------------------------------------------------------------------------------
# same-file refusal

def test_same_file_is_refused_in_every_spelling(tmp_audio, rng, tmp_path):
    src = tmp_audio("src.wav", _noise(rng, 100, 1), 8000, subtype="PCM_16")
    (tmp_path / "sub").mkdir()
    os.link(src, tmp_path / "hard.wav")
    os.symlink(src, tmp_path / "soft.wav")
    for target in [src, tmp_path / "sub" / ".." / "src.wav", tmp_path / "hard.wav",
                   tmp_path / "soft.wav"]:
        with pytest.raises(ParameterError, match="output must not be the source file") as err:
            refuse_same_file(src, target)
        assert err.value.field == "output"
    refuse_same_file(src, tmp_path / "src_48k.wav")  # a different, not yet existing file
    # a source that doesn't exist yet is compared by normalised real path
    with pytest.raises(ParameterError):
        refuse_same_file(tmp_path / "a" / ".." / "new.wav", tmp_path / "new.wav")


def test_writer_with_its_source_refuses_before_creating_anything(tmp_audio, rng, tmp_path):
    src = tmp_audio("src.wav", _noise(rng, 100, 1), 8000, subtype="PCM_16")
    before = src.read_bytes()
    plan = output_plan(src, rate_hz=16000, channels=1, bits="16")
    with pytest.raises(ParameterError, match="must not be the source"):
        AtomicWriter(src, plan, source=src)
    assert src.read_bytes() == before
    assert sorted(os.listdir(tmp_path)) == ["src.wav"]


# --------------------------------------------------------------------------------------------
# tags

def test_tags_survive_wav_to_flac_with_the_conversion_comment(tmp_audio, rng, tmp_path):
    tags = {"title": "Harbour Lane, episode 12", "artist": "Studio B", "copyright": "CC BY 4.0",
            "comment": "rough cut", "date": "2026-12-01", "album": "Harbour Lane",
            "tracknumber": "12", "genre": "Speech", "software": "Field recorder 2"}
    src = tmp_audio("src.wav", _noise(rng, 4410, 1), 44100, subtype="PCM_16", tags=tags)
    info = probe(src)
    assert info.tags["software"].startswith("Field recorder 2")
    target = tmp_path / "out.flac"
    plan = output_plan(target, rate_hz=48000, channels=1, source_probe=info)
    with AtomicWriter(target, plan, tags=info.tags,
                      add_comment=converted_comment(44100, 48000)) as out:
        out.write(_noise(rng, 4800, 1))
    assert out.dropped_tags == ()
    with sf.SoundFile(target) as f:
        back = f.copy_metadata()
    for key in ("title", "artist", "copyright", "date", "album", "tracknumber", "genre"):
        assert back[key] == tags[key], key
    assert back["comment"] == f"rough cut; Converted 44100 -> 48000 Hz by Rateferry {__version__}"
    assert back["software"].startswith("Field recorder 2")


@pytest.mark.parametrize("fmt, ext", [("WAV", ".wav"), ("RF64", ".rf64"), ("FLAC", ".flac"),
                                      ("OGG", ".ogg"), ("AIFF", ".aiff"), ("W64", ".w64"),
                                      ("MP3", ".mp3")])
def test_tag_support_table_matches_libsndfile(tmp_path, rng, fmt, ext):
    tags = {key: f"value of {key}" for key in TAG_NAMES}
    target = tmp_path / f"t{ext}"
    plan = output_plan(target, rate_hz=48000, channels=1, bits=None)
    assert plan.format == fmt
    with AtomicWriter(target, plan, tags=tags) as out:
        out.write(_noise(rng, 4800, 1))
    assert set(out.dropped_tags) == set(TAG_NAMES) - set(TAG_SUPPORT[fmt])
    with sf.SoundFile(target) as f:
        back = f.copy_metadata()
    kept = {k for k in TAG_NAMES if back.get(k, "").startswith(f"value of {k}")}
    assert kept == set(TAG_SUPPORT[fmt])


def test_unknown_tag_names_are_refused(tmp_path):
    plan = output_plan(tmp_path / "x.flac", rate_hz=48000, channels=1, bits="16")
    with pytest.raises(ParameterError, match="tag names must be among .*got 'titel'"):
        AtomicWriter(tmp_path / "x.flac", plan, tags={"titel": "typo"})


# --------------------------------------------------------------------------------------------
# hashing

def test_sha256_file_equals_hashlib_over_the_whole_file(tmp_path, rng):
    path = tmp_path / "blob.bin"
    data = rng.bytes(3 * 2**20 + 17)
    path.write_bytes(data)
    assert sha256_file(path) == hashlib.sha256(data).hexdigest()
    assert sha256_file(path, chunk_bytes=1000) == hashlib.sha256(data).hexdigest()


def test_module_lists_its_public_names():
    for name in media.__all__:
        assert hasattr(media, name), name


# --------------------------------------------------------------------------------------------
# MP3

@pytest.mark.parametrize("rate, kbps", [(44100, 128), (48000, 320), (32000, 32), (16000, 64),
                                        (22050, 160), (8000, 32)])
def test_mp3_bit_rate_is_the_one_asked_for(tmp_path, rng, rate, kbps):
    # the size of a constant-bit-rate stream is kbps * duration / 8 (ISO/IEC 11172-3 frames
    # carry a fixed number of bits at a constant rate; from memory) plus the ID3 tag and the
    # encoder's delay and padding (at most two frames of 1152 samples, common practice)
    target = tmp_path / "c.mp3"
    plan = output_plan(target, rate_hz=rate, channels=2, mp3_kbps=kbps)
    assert (plan.format, plan.subtype, plan.bits, plan.kbps) == ("MP3", "MPEG_LAYER_III", None,
                                                                   kbps)
    seconds = 4
    with AtomicWriter(target, plan) as out:
        out.write(_noise(rng, rate * seconds, 2, scale=0.1))
    frame_s = (1152 if rate >= 32000 else 576) / rate
    size_bits = os.path.getsize(target) * 8
    assert kbps * 1000 * seconds <= size_bits <= kbps * 1000 * (seconds + 4 * frame_s) + 8 * 4096


@pytest.mark.parametrize("kwargs, message", [
    (dict(rate_hz=96000), r"MP3 carries only 8000, .*48000 Hz; got 96000 Hz"),
    (dict(rate_hz=16000, mp3_kbps=192), r"mp3_kbps must be a whole number from 8 to 160 kbit/s "
                                         r"at 16000 Hz, got 192"),
    (dict(rate_hz=48000, bits="16"), r"lossy and has no word length"),
    (dict(rate_hz=48000, channels=3), r"at most 2 channels, got 3"),
])
def test_mp3_plan_refusals(tmp_path, kwargs, message):
    args = dict(rate_hz=48000, channels=2) | kwargs
    with pytest.raises(ParameterError, match=message):
        output_plan(tmp_path / "x.mp3", **args)


def test_mp3_kbps_is_refused_for_other_formats(tmp_path):
    with pytest.raises(ParameterError, match=r"mp3_kbps applies to \.mp3 outputs only"):
        output_plan(tmp_path / "x.wav", rate_hz=48000, channels=2, mp3_kbps=128)


@pytest.mark.parametrize("ext", [".wav", ".aiff"])
def test_float_outputs_of_the_same_samples_are_the_same_bytes_a_second_later(tmp_path, rng, ext):
    # libsndfile writes a PEAK chunk into float WAV and AIFF files holding the time of writing
    # in seconds; two writes of the same samples a second apart differed in those four bytes,
    # so a re-run could not reproduce a recipe's sha256. The writer sets the stamp to 0.
    import struct
    import time
    x = _noise(rng, 4800, 2)
    digests = []
    for i in range(2):
        target = tmp_path / f"f{i}{ext}"
        plan = output_plan(target, rate_hz=48000, channels=2, bits="32f")
        with AtomicWriter(target, plan) as out:
            out.write(x)
        digests.append(sha256_file(target))
        raw = target.read_bytes()
        at = raw.find(b"PEAK")
        assert at > 0                                   # libsndfile wrote its PEAK chunk
        endian = "<" if ext == ".wav" else ">"
        assert struct.unpack(endian + "I", raw[at + 12:at + 16])[0] == 0     # the time stamp
        np.testing.assert_array_equal(sf.read(target, dtype="float32")[0], x.astype(np.float32))
        if i == 0:
            time.sleep(1.05)
    assert digests[0] == digests[1]
