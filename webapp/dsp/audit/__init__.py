"""Test signals and measured artefact figures of a converter.

A design predicts its figures from its taps; an audit proves them: it runs the real converter
(the streaming code :func:`~webapp.dsp.polyphase.make_converter` builds, in the design's own
arithmetic) on test signals generated at the source rate and measures what comes out.

Conventions
-----------
* Rates are integers in Hz; a route converts ``fs_in`` to ``fs_out`` by ``up/down`` (L/M).
  Data is frames x channels; every level is in dB.
* Levels of sines are in dBFS as AES17 defines them: 0 dBFS is the rms of a sine whose peak just
  reaches full scale (amplitude 1.0), so an rms value ``r`` reads ``20 log10(r sqrt 2)`` dBFS.
* Coherent measurement: every test tone is a whole number of Hz and every measured segment is
  exactly one second of steady-state output, so each tone and each of its artefacts falls on
  one DFT bin. No window, no leakage: float64 resolves lines far below -200 dB.
* Artefact separation: shifting the input of an L/M converter by M samples shifts its output
  by L samples, so the converter is periodic in time with period 1/g seconds,
  g = gcd(fs_in, fs_out), and a tone at f makes output lines only at +-f + k g. Tones share one
  run (one channel of one converter call) when their residues +-f mod g differ; every output
  line then belongs to exactly one tone. (A system that commutes with shifts of 1/g seconds
  maps exp(j 2 pi f t) to a sum of lines at f + k g: expand its periodic gain in a Fourier
  series.) Below 8 usable residue classes (g < 17) tones share a run only when their
  fundamental and main-artefact bins differ ("key-bins": lines of other tones may then add to
  a measured line).
* An *alias* (downsampling) is the line a tone above the target Nyquist makes in the output
  band; an *image* (upsampling) is a line of the copies at k fs_in +- f of an in-band tone.
  Both are reported relative to the tone that caused them. The "main" artefact is the one the
  response predicts most directly: the alias at f itself, or the first image at fs_in - f; the
  "worst" is the largest line the tone makes anywhere in the output band.
* THD+N and dynamic range follow AES17-2015, "AES standard method for digital audio engineering -
  Measurement of digital audio equipment" (clause numbers from memory, not checked against the
  text: definitions of full scale and dBFS in clause 3, the standard low-pass filter and the
  notch filter among the instrument requirements in clause 5, THD+N and dynamic range among the
  procedures in clause 6). THD+N is the rms of what remains after notching the fundamental,
  band-limited to 20 Hz - 20 kHz (or the output Nyquist when lower), relative to the rms of the
  band-limited signal. Dynamic range is measured the same way on a 997 Hz tone at -60 dBFS,
  expressed relative to full scale (AES17: the -60 dBFS THD+N plus 60 dB). Here the notch and
  the band limit are ideal (DFT bins of a coherent segment), where AES17's notch and standard
  low-pass filter are real filters with tolerances; the test frequency 997 Hz is AES17's.

The package is a catalogue; each part lives in its own module:

* ``signals``  test signals: tone, multitone, log_sweep, impulse, silence, schroeder_phases
* ``measure``  running the converter and the measurements on its output
* ``tones``    tone plans: which tones share a run, where their artefacts land, predictions
* ``result``   AuditResult and VerdictRow
* ``verdict``  each figure beside the limit the mask sets for it
* ``run``      audit(): the steps that tie them together
"""

from ..dither import DITHERS
from .measure import (FLOOR_DB, alignment_from_lines, alignment_from_signals, band_rms_dbfs,
                      convert_channels, equivalent_time_response, impulse_group_delay,
                      line_spectrum, power_spectrum, predicted_response, prering_ms,
                      residual_dbfs, settle_time_s, steady_segment, thd_n_db)
from .result import AuditResult, VerdictRow
from .run import audit
from .signals import (AES17_FREQUENCY_HZ, AUDIT_WORD_LENGTHS, impulse, log_sweep, multitone,
                      schroeder_phases, silence, tone)
from .verdict import ALIGNMENT_LIMIT_SAMPLES

__all__ = [
    "AES17_FREQUENCY_HZ", "DITHERS", "AUDIT_WORD_LENGTHS", "FLOOR_DB", "ALIGNMENT_LIMIT_SAMPLES",
    "VerdictRow", "AuditResult", "audit",
    "tone", "multitone", "log_sweep", "impulse", "silence", "schroeder_phases",
    "settle_time_s", "convert_channels", "steady_segment", "line_spectrum", "power_spectrum",
    "thd_n_db", "residual_dbfs", "band_rms_dbfs", "impulse_group_delay",
    "equivalent_time_response", "prering_ms",
    "alignment_from_lines", "alignment_from_signals", "predicted_response",
]
