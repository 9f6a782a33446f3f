"""What each output format can carry: extensions, subtypes, rate and size limits, tags.

Facts measured on the installed libsndfile are marked so; see the package docstring."""





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
