"""Shared fixtures: small generated audio and job files (nothing is downloaded)."""

import textwrap

import numpy as np
import pytest
import soundfile as sf


@pytest.fixture(scope="session", autouse=True)
def _response_cache_of_the_session(tmp_path_factory):
    """Every test (and every process a test starts) uses one response cache of the session's own,
    never the user's ``~/.cache``; tests of the cache itself set their own folder."""
    import os

    saved = os.environ.get("RENDER_CACHE_DIR")
    os.environ["RENDER_CACHE_DIR"] = str(tmp_path_factory.mktemp("response-cache"))
    yield
    if saved is None:
        os.environ.pop("RENDER_CACHE_DIR", None)
    else:
        os.environ["RENDER_CACHE_DIR"] = saved


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


def write_audio(path, data, rate_hz, subtype, fmt=None):
    path.parent.mkdir(parents=True, exist_ok=True)
    sf.write(str(path), data, rate_hz, subtype=subtype, format=fmt)
    return path


def speechlike(rng, frames, channels, level=0.05):
    """Noise bursts with gaps (invented test material)."""
    x = rng.standard_normal((frames, channels)) * level
    gate = (np.sin(np.arange(frames) / frames * 2 * np.pi * 5) > 0).astype(float)
    return np.clip(x * gate[:, None], -0.5, 0.5)


@pytest.fixture
def make_job(tmp_path):
    def make(text):
        path = tmp_path / "job.toml"
        path.write_text(textwrap.dedent(text), encoding="utf-8")
        return path

    return make


#: A small, short room so that tests run fast.
SMALL_ROOM = """
[rooms.box]
decay_s = 0.25
size_m = [3.0, 2.5, 2.4]
distance_m = 1.0
"""
