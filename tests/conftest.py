"""Shared fixtures: a seeded random generator and a helper that writes real audio files."""

import numpy as np
import pytest
import soundfile as sf


@pytest.fixture
def rng():
    """A fresh generator with the project's fixed seed, so every test sees the same numbers."""
    return np.random.default_rng(20261201)


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
