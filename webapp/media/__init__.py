"""Audio files: probe, streaming block reader, output plans and atomic output.

A catalogue: formats.py (what each format carries), source.py (reading), output.py (plans and
the atomic writer).

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

from webapp.dsp.dither import WORD_LENGTHS   # the word lengths an output may carry (one list)

from .formats import OUTPUT_FORMATS, READ_DTYPES, TAG_NAMES, TAG_SUPPORT, WRITE_DTYPES
from .output import AtomicWriter, OutputPlan, converted_comment, output_plan, refuse_same_file
from .source import Probe, probe, read_blocks, read_excerpt, sha256_file

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
