"""bext / iXML / cue chunks: layout, rescaling to a new rate, atomic insertion into a written WAV.

Sources named beside each check:
- EBU Tech 3285 (Broadcast Wave Format): the bext layout (602 fixed bytes; TimeReference as two
  32-bit words, the first sample's count since midnight).
- Arithmetic: 10:00:00:00 is 36,000 s: 1,728,000,000 samples at 48 kHz and 1,587,600,000 at
  44.1 kHz.
- Microsoft RIFF / WAVE: cue points (24 bytes each) and LIST/adtl labels.
- soundfile (libsndfile) as an independent reader of the audio after the chunks are added.
"""

import os
import struct

import numpy as np
import pytest
import soundfile as sf

from webapp.dsp.errors import AudioFileError
from webapp.riffchunks import (
    Bext, CuePoint, bext_body, carried_chunks, cue_chunks, finish_with_chunks, insert_chunks,
    parse_bext, parse_cues, read_chunks, rescale_ixml, rescale_position,
)

IXML = ("<?xml version=\"1.0\" encoding=\"UTF-8\"?><BWFXML><IXML_VERSION>1.5</IXML_VERSION>"
        "<PROJECT>Harbour walk</PROJECT><SPEED><FILE_SAMPLE_RATE>48000</FILE_SAMPLE_RATE>"
        "<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI>0</TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI>"
        "<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_LO>1728000000</TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_LO>"
        "<TIMESTAMP_SAMPLE_RATE>48000</TIMESTAMP_SAMPLE_RATE></SPEED></BWFXML>")


def tagged_wav(tmp_audio, rng, name="src.wav", rate=48000):
    """A WAV written by soundfile, then given bext, iXML and cue chunks by our writer."""
    data = 0.1 * rng.standard_normal((rate // 2, 2))
    path = tmp_audio(name, data, rate, subtype="PCM_24")
    bext = Bext(description="Interview, take 3", originator="Rateferry demo", origination_date="2026-12-01",
                origination_time="10-00-00", time_reference=1_728_000_000, version=2,
                coding_history="A=PCM,F=48000,W=24,M=stereo\r\n")
    points = [CuePoint(1, 4800, label="question"), CuePoint(2, 12001, label="answer", note="laughs"),
              CuePoint(3, 20000, label="ending", length=3001)]
    chunks = [(b"bext", bext_body(bext)), (b"iXML", IXML.encode())] + cue_chunks(points)
    finish_with_chunks(insert_chunks(path, []), path, chunks)
    return path, data, bext, points


def test_bext_layout_is_602_bytes_with_the_time_reference_as_two_words():
    # EBU Tech 3285: 256 + 32 + 32 + 10 + 8 + 4 + 4 + 2 + 64 + 190 = 602 bytes before the history
    body = bext_body(Bext(time_reference=(5 << 32) + 7, version=1, coding_history="x"))
    assert len(body) == 603
    assert struct.unpack_from("<II", body, 338) == (7, 5)
    assert parse_bext(body).time_reference == (5 << 32) + 7
    assert parse_bext(body).coding_history == "x"


def test_rescaling_rounds_to_the_nearest_sample_halves_up():
    # the stated rule, in integers: round(n * fs_out / fs_in), halves up
    assert rescale_position(1_728_000_000, 48000, 44100) == 1_587_600_000
    assert rescale_position(1, 2, 1) == 1          # 0.5 -> 1
    assert rescale_position(3, 4, 1) == 1          # 0.75 -> 1
    assert rescale_position(1, 4, 1) == 0          # 0.25 -> 0
    assert rescale_position(0, 48000, 16000) == 0


def test_chunks_added_to_a_written_wav_read_back_and_leave_the_audio_alone(tmp_audio, rng):
    path, data, bext, points = tagged_wav(tmp_audio, rng)
    read, rate = sf.read(path)                     # libsndfile still reads the audio, unchanged
    assert rate == 48000
    np.testing.assert_allclose(read, data, atol=2 ** -23)
    chunks = {ident: body for ident, body, _, _ in read_chunks(path) if body is not None}
    assert parse_bext(chunks[b"bext"]) == bext
    assert chunks[b"iXML"].decode() == IXML
    adtl = [body for ident, body, _, _ in read_chunks(path) if ident == b"LIST" and body[:4] == b"adtl"]
    assert parse_cues(chunks[b"cue "], adtl) == points
    ids = [ident for ident, *_ in read_chunks(path)]
    assert ids.index(b"bext") < ids.index(b"data") < ids.index(b"cue ")
    # RIFF size field = file size - 8
    with open(path, "rb") as f:
        assert struct.unpack("<I", f.read(8)[4:])[0] == os.path.getsize(path) - 8


def test_ten_oclock_at_48k_lands_at_ten_oclock_at_44k1_with_cues_within_half_a_sample(tmp_audio, rng, tmp_path):
    # Issue check: bext time reference 10:00:00:00 at 48 kHz (1,728,000,000) -> 1,587,600,000 at
    # 44.1 kHz; cue points at the same times within half an output sample.
    path, _, bext, points = tagged_wav(tmp_audio, rng)
    out = tmp_path / "out.wav"
    temp = tmp_path / ".out.tmp.wav"
    sf.write(temp, np.zeros((rate_out_frames := 22050, 2)), 44100, subtype="PCM_16")
    finish_with_chunks(temp, out, carried_chunks(path, 48000, 44100))
    assert not temp.exists()
    chunks = {ident: body for ident, body, _, _ in read_chunks(out) if body is not None}
    carried = parse_bext(chunks[b"bext"])
    assert carried.time_reference == 1_587_600_000
    assert carried.time_reference / 44100 == 36000.0 == bext.time_reference / 48000
    assert carried.description == bext.description and carried.coding_history == bext.coding_history
    adtl = [body for ident, body, _, _ in read_chunks(out) if ident == b"LIST" and body[:4] == b"adtl"]
    moved = parse_cues(chunks[b"cue "], adtl)
    assert [p.label for p in moved] == [p.label for p in points]
    for before, after in zip(points, moved):
        assert abs(after.position / 44100 - before.position / 48000) <= 0.5 / 44100
    assert moved[2].length == rescale_position(3001, 48000, 44100)
    text = chunks[b"iXML"].decode()
    assert "<FILE_SAMPLE_RATE>44100</FILE_SAMPLE_RATE>" in text
    assert "<TIMESTAMP_SAMPLE_RATE>44100</TIMESTAMP_SAMPLE_RATE>" in text
    assert "<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_LO>1587600000<" in text
    assert "<PROJECT>Harbour walk</PROJECT>" in text
    assert sf.info(out).frames == rate_out_frames


def test_ixml_time_stamp_past_32_bits_carries_into_the_high_word():
    text = rescale_ixml(IXML.replace(">0</TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI", ">1</TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI"),
                        48000, 96000)
    stamp = 2 * ((1 << 32) + 1_728_000_000)
    assert f"<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_HI>{stamp >> 32}<" in text
    assert f"<TIMESTAMP_SAMPLES_SINCE_MIDNIGHT_LO>{stamp & 0xFFFFFFFF}<" in text


def test_odd_sized_chunks_are_padded_and_a_source_without_chunks_carries_none(tmp_audio, rng, tmp_path):
    path = tmp_audio("plain.wav", 0.1 * rng.standard_normal((1000, 1)), 16000, subtype="PCM_16")
    assert carried_chunks(path, 16000, 8000) == []
    flac = tmp_audio("plain.flac", 0.1 * rng.standard_normal((1000, 1)), 16000)
    assert carried_chunks(flac, 16000, 8000) == []
    out = tmp_path / "odd.wav"
    finish_with_chunks(insert_chunks(path, []), out, [(b"iXML", b"<a>odd</a>")])   # 10 bytes
    finish_with_chunks(insert_chunks(out, []), out, [(b"iXML", b"<a>odd!</a>")])   # 11: padded
    chunks = read_chunks(out)
    assert [body for ident, body, *_ in chunks if ident == b"iXML"] == [b"<a>odd!</a>"]   # replaced
    assert sf.info(out).frames == 1000


def test_a_broken_file_raises_and_leaves_no_output(tmp_path):
    temp = tmp_path / "temp.wav"
    temp.write_bytes(b"RIFF\x10\x00\x00\x00WAVEdata\xff\xff\x00\x00abc")
    out = tmp_path / "out.wav"
    with pytest.raises(AudioFileError, match="runs past the end"):
        finish_with_chunks(temp, out, [(b"iXML", b"<a/>")])
    assert not out.exists() and not temp.exists()
    assert [p.name for p in tmp_path.iterdir()] == []
