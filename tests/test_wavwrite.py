"""requant.audio_io.wavwrite against libsndfile (python-soundfile), the reference
reader and writer of WAV files.

* The header bytes must equal what libsndfile writes for the same file, apart
  from libsndfile's optional PEAK chunk on float files.
* libsndfile must read back exactly the codes and samples we wrote.
* Layout rules from IBM & Microsoft, *Multimedia Programming Interface and
  Data Specifications 1.0* (1991): 8-bit PCM is unsigned with 128 for zero,
  and an odd-sized data chunk is followed by one pad byte that the RIFF size
  counts.
"""

import struct

import numpy as np
import pytest
import soundfile as sf

from requant.audio_io.riff import read_chunks
from requant.audio_io.wavwrite import RAW_SUBTYPES, WavWriter


def _codes(subtype, frames, ch, rng):
    bits = RAW_SUBTYPES[subtype][1]
    dtype = RAW_SUBTYPES[subtype][2]
    if subtype == "FLOAT":
        return rng.uniform(-1, 1, (frames, ch)).astype(np.float32)
    container = 16 if dtype == np.int16 else 32
    k = rng.integers(-(2 ** (bits - 1)), 2 ** (bits - 1), (frames, ch))
    return (k << (container - bits)).astype(dtype)


def _ours(path, subtype, ch, blocks, **kw):
    with WavWriter(path, samplerate=44100, channels=ch, subtype=subtype, **kw) as w:
        for b in blocks:
            w.write(b)


def _chunks_without_peak(path):
    data = path.read_bytes()
    out = []
    for c in read_chunks(path):
        if c.id != "PEAK":
            out.append((c.id, data[c.offset:c.offset + c.size] if c.id != "data" else c.size))
    return out


@pytest.mark.parametrize("subtype", sorted(RAW_SUBTYPES))
@pytest.mark.parametrize("ch", [1, 2, 6])
@pytest.mark.parametrize("frames", [0, 1, 997])
def test_same_file_as_libsndfile(tmp_path, subtype, ch, frames):
    rng = np.random.default_rng(ch * 1000 + frames)
    x = _codes(subtype, frames, ch, rng)
    ours, ref = tmp_path / "ours.wav", tmp_path / "ref.wav"
    _ours(ours, subtype, ch, [x[:frames // 3], x[frames // 3:]])
    with sf.SoundFile(ref, "w", 44100, ch, subtype, format="WAV") as f:
        f.write(x)
    assert _chunks_without_peak(ours) == _chunks_without_peak(ref)
    back, rate = sf.read(ours, dtype=x.dtype if subtype != "PCM_U8" else "int16",
                         always_2d=True)
    assert rate == 44100
    ref_back, _ = sf.read(ref, dtype=back.dtype, always_2d=True)
    assert np.array_equal(back, ref_back)
    if subtype != "PCM_U8":
        assert np.array_equal(back, x)


def test_eight_bit_is_unsigned_with_pad_byte(tmp_path):
    # 3 frames of mono 8-bit: odd data size, so one pad byte follows (RIFF 1991)
    p = tmp_path / "u8.wav"
    codes = (np.array([[-128], [0], [127]]) << 8).astype(np.int16)
    _ours(p, "PCM_U8", 1, [codes])
    raw = p.read_bytes()
    riff_size = struct.unpack("<I", raw[4:8])[0]
    assert riff_size == len(raw) - 8
    assert raw.endswith(bytes([0, 128, 255, 0]))


def test_background_sync_writes_the_same_bytes(tmp_path, monkeypatch):
    import requant.audio_io.wavwrite as ww

    monkeypatch.setattr(ww, "SYNC_BYTES", 1000)  # flush after nearly every block
    rng = np.random.default_rng(4)
    x = _codes("PCM_16", 20000, 2, rng)
    a, b = tmp_path / "a.wav", tmp_path / "b.wav"
    _ours(a, "PCM_16", 2, np.array_split(x, 40), background_sync=True)
    _ours(b, "PCM_16", 2, [x])
    assert a.read_bytes() == b.read_bytes()


def test_wrong_blocks_are_refused(tmp_path):
    with WavWriter(tmp_path / "w.wav", samplerate=8000, channels=2, subtype="PCM_16") as w:
        with pytest.raises(TypeError, match="int16"):
            w.write(np.zeros((4, 2), np.float32))
        with pytest.raises(TypeError, match="int16"):
            w.write(np.zeros((4, 3), np.int16))
    with pytest.raises(ValueError, match="PCM_16"):
        WavWriter(tmp_path / "x.wav", samplerate=8000, channels=1, subtype="ULAW")


def test_disk_errors_come_through_as_oserror(tmp_path):
    # /dev/full fails every write with ENOSPC (Linux): the convert path maps that errno
    pytest.importorskip("os").stat("/dev/full")
    with pytest.raises(OSError) as info:
        w = WavWriter("/dev/full", samplerate=8000, channels=1, subtype="PCM_16")
        w.write(np.zeros((10, 1), np.int16))
        w.close()
    import errno

    assert info.value.errno == errno.ENOSPC
