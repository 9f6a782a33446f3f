"""Shared fixtures: a seeded random generator and a helper that writes real audio files."""

import numpy as np
import pytest
import soundfile as sf


@pytest.fixture
def rng():
    """A fresh generator with the project's fixed seed, so every test sees the same numbers."""
    return np.random.default_rng(20261201)


def _speech_bursts(rng, frames, rate_hz):
    """Speech-like bursts of noise with pauses (only a test signal): on for 0.3-1.5 s at a level
    of 0.3-1.0, off for 0.1-0.6 s."""
    x = rng.standard_normal(frames)
    env = np.zeros(frames)
    i = 0
    while i < frames:
        on = int(rng.uniform(0.3, 1.5) * rate_hz)
        env[i:i + on] = rng.uniform(0.3, 1.0)
        i += on + int(rng.uniform(0.1, 0.6) * rate_hz)
    return x * env


@pytest.fixture(scope="session")
def speech_bursts():
    """Return ``make(rng, frames, rate_hz) -> 1-D array``: speech-like bursts with pauses."""
    return _speech_bursts


@pytest.fixture
def tmp_audio(tmp_path):
    """Return ``make(name, data, rate_hz, *, subtype=None, format=None, tags=None) -> path``.

    Writes ``data`` (frames x channels) through soundfile into ``tmp_path`` and returns the path.
    """

    def make(name, data, rate_hz, *, subtype=None, format=None, tags=None):
        path = tmp_path / name
        channels = 1 if data.ndim == 1 else data.shape[1]
        with sf.SoundFile(path, "w", samplerate=rate_hz, channels=channels,
                          subtype=subtype, format=format) as f:
            for key, value in (tags or {}).items():
                setattr(f, key, value)
            f.write(data)
        return path

    return make


@pytest.fixture(autouse=True)
def _state_folder(tmp_path_factory, monkeypatch):
    """Keep the list of folders with partial files (webapp.partials) out of the user's home."""
    monkeypatch.setenv("RATEFERRY_STATE_DIR", str(tmp_path_factory.mktemp("state")))
