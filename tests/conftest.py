import numpy as np
import pytest


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


def write_pcm(path, codes, rate, subtype, fmt=None):
    """Write exact integer codes (int16/int32 left-justified) with soundfile."""
    import soundfile as sf

    sf.write(path, codes, rate, subtype=subtype, format=fmt)
    return path
