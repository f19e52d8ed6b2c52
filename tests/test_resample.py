"""The sample-rate converter (requant.dsp.resample, requant.dsp.ratekernel).

Outside references, named beside each check:
- the sampling theorem (REFERENCES.md §8): a sum of sines below the lower Nyquist
  frequency, resampled, equals the same sines evaluated at the new sample times;
- the Kaiser window design formulas (Kaiser 1974; Oppenheim & Schafer, Discrete-Time
  Signal Processing, the Kaiser window method; REFERENCES.md §8) and scipy.signal's
  kaiserord, firwin and freqz (their documentation is the check);
- the direct form of rational resampling (upsample by L, lowpass, keep every M-th), computed
  here naively from the prototype, against the polyphase kernel.
"""

import math
from fractions import Fraction

import numpy as np
import pytest
import scipy.signal as ss
from hypothesis import given, settings
from hypothesis import strategies as st

from requant.dsp import native, resample
from requant.dsp.ratekernel import LANES, resample_block_plain
from requant.dsp.resample import RateFilter, Resampler, design
from requant.errors import UsageError

from helpers import run_cli

#: The pairs the issue names, both directions of the two families.
PAIRS = [(96000, 44100), (44100, 48000), (48000, 44100), (44100, 96000)]


def _run(x, rate_in, rate_out, blocks=None, **kw):
    """Resample ``x`` (frames, channels) in the given block sizes (cycled), or in one block."""
    r = Resampler(rate_in, rate_out, x.shape[1], **kw)
    out = []
    if blocks is None:
        out.append(r.process(x))
    else:
        i = j = 0
        while i < len(x):
            n = blocks[j % len(blocks)]
            out.append(r.process(x[i:i + n]))
            i += n
            j += 1
    out.append(r.finish())
    return np.concatenate(out)


def _dbfs_rms(e):
    # AES17: a full-scale sine (RMS 1/sqrt(2)) is 0 dBFS
    return 20.0 * np.log10(np.sqrt(np.mean(np.square(e))) * np.sqrt(2.0) + 1e-300)


def _sines(freqs, amps, phases, t):
    return (amps * np.sin(2.0 * np.pi * freqs * t[:, None] + phases)).sum(axis=1)


# -- the analytic oracle ---------------------------------------------------------------------------

@pytest.mark.parametrize("rate_in, rate_out", PAIRS + [(8000, 44100)])
def test_sines_land_on_the_new_sample_times(rate_in, rate_out):
    # Sampling theorem (REFERENCES.md §8): band-limited sines below the passband, resampled,
    # equal the same sines evaluated at t = k / rate_out; the goal is -130 dBFS RMS
    # away from the first and last filter length.
    rf = design(rate_in, rate_out)
    rng = np.random.default_rng(7)
    freqs = np.array([31.5, 997.0, 4321.1, 9876.5, 15000.25, 19000.0])
    freqs = freqs[freqs < 0.98 * rf.passband_edge_hz]
    amps = np.array([0.3, 0.2, 0.1, 0.1, 0.1, 0.1])[:freqs.size]
    phases = rng.uniform(0, 2 * np.pi, freqs.size)
    n = rate_in // 4
    x = _sines(freqs, amps, phases, np.arange(n) / rate_in)
    y = _run(x[:, None], rate_in, rate_out, blocks=[4096])[:, 0]
    ref = _sines(freqs, amps, phases, np.arange(len(y)) / rate_out)
    edge = math.ceil(rf.total_taps / rf.intermediate_rate * rate_out)  # one filter length
    err = (y - ref)[edge:-edge]
    assert _dbfs_rms(err) < -130.0
    # and the output is the signal itself, not silence that would pass a loose bound
    assert _dbfs_rms(y[edge:-edge]) > -10.0


def test_direct_form_equals_the_polyphase_kernel():
    # The definition of rational resampling (upsample by L with zeros, lowpass at L*rate_in,
    # keep every M-th sample), computed naively from the prototype with the delay removed:
    # y[k] = sum_n x[n] * L * h[k*M - n*L + D]. Edges: zeros outside the input.
    for rate_in, rate_out in [(96000, 44100), (8000, 44100), (44100, 8000), (48000, 96000)]:
        rf = design(rate_in, rate_out)
        x = np.random.default_rng(3).uniform(-1, 1, (700, 2))
        y = _run(x, rate_in, rate_out, blocks=[333])
        h, L, M, D = rf.prototype, rf.up, rf.down, rf.delay
        assert len(y) == Resampler.frames_out(len(x), rate_in, rate_out)
        n = np.arange(len(x))
        for k in range(len(y)):
            idx = k * M - n * L + D
            ok = (idx >= 0) & (idx < h.size)
            ref = L * h[idx[ok]] @ x[ok]
            np.testing.assert_allclose(y[k], ref, rtol=0, atol=1e-14)


# -- aliasing ------------------------------------------------------------------------------------

def test_tones_above_20k_leave_nothing_above_minus_140_dbfs_below_20k():
    # The goal: full-scale tones anywhere above 20 kHz in a 96 kHz input leave nothing
    # above -140 dBFS below 20 kHz in the 44.1 kHz output. Each tone is full scale (the
    # resampler is linear, so together they test each one). 23 kHz lies in the transition and
    # folds to 21.1 kHz, above 20 kHz, as the design allows; the others fold below 20 kHz.
    rate_in, rate_out, nfft = 96000, 44100, 1 << 16
    tones = [23000.0, 24150.0, 26000.0, 30000.0, 35000.5, 40000.0, 44100.0, 47900.0]
    n = int(1.8 * rate_in)
    t = np.arange(n) / rate_in
    x = sum(np.sin(2 * np.pi * f * t + i) for i, f in enumerate(tones))
    # a known -130 dBFS tone on an FFT bin shows the measurement can see that low
    probe_hz = round(5000 * nfft / rate_out) * rate_out / nfft  # 4999.8 Hz, on bin 7430
    x = x + 10 ** (-130 / 20) * np.sin(2 * np.pi * probe_hz * t)
    y = _run(x[:, None], rate_in, rate_out, blocks=[65536])[:, 0]
    seg = y[2000:2000 + nfft]
    # Kaiser window, beta 30: sidelobes below -230 dB (checked here, not assumed)
    w = ss.windows.kaiser(nfft, 30.0, sym=False)
    ww = np.abs(np.fft.rfft(w, 16 * nfft))
    ww /= ww[0]
    lobe = 16 * 10  # the main lobe ends within 10 bins at beta 30
    assert 20 * np.log10(ww[lobe:].max()) < -230
    level = 20 * np.log10(np.abs(np.fft.rfft(seg * w)) * 2 / w.sum() + 1e-300)  # dBFS per bin
    f = np.fft.rfftfreq(nfft, 1 / rate_out)
    probe = np.abs(f - probe_hz) < 30 * rate_out / nfft
    assert abs(level[np.argmin(np.abs(f - probe_hz))] - (-130.0)) < 0.1
    below = (f < 20000) & ~probe
    assert level[below].max() < -140.0
    assert level[(f > 21000) & (f < 21200)].max() > -100  # the transition tone is there


# -- the design: Kaiser's formulas, measured figures --------------------------------------------

@pytest.mark.parametrize("rate_in, rate_out", PAIRS)
def test_kaiser_formulas_and_scipy_kaiserord(rate_in, rate_out):
    rf = design(rate_in, rate_out)
    a = rf.attenuation_db
    width = (rf.stopband_edge_hz - rf.passband_edge_hz) / (rf.intermediate_rate / 2)
    # Kaiser 1974 (Oppenheim & Schafer, eq. for beta): beta = 0.1102 (A - 8.7) for A > 50 dB
    assert rf.beta == pytest.approx(0.1102 * (a - 8.7), rel=1e-12)
    # Kaiser's length formula as scipy.signal.kaiserord documents and computes it:
    # numtaps = (A - 7.95) / (2.285 pi width) + 1, rounded up; ours is made odd
    n = math.ceil((a - 7.95) / (2.285 * np.pi * width) + 1)
    assert rf.total_taps == n + 1 - n % 2
    assert (rf.total_taps, rf.beta) == (ss.kaiserord(a, width)[0] | 1, ss.kaiserord(a, width)[1])
    # Oppenheim & Schafer's form M = (A - 8) / (2.285 dw) (from memory): within 0.1 %
    assert rf.total_taps - 1 == pytest.approx((a - 8) / (2.285 * np.pi * width), rel=1e-3)
    # the goals, measured on the designed filter
    assert rf.passband_ripple_db <= 0.0001
    assert rf.stopband_rejection_db >= 140.0
    # the cutoff sits on the lower Nyquist frequency (the design's stated choice)
    assert (rf.passband_edge_hz + rf.stopband_edge_hz) / 2 == min(rate_in, rate_out) / 2


def test_measured_figures_agree_with_scipy_freqz():
    # scipy.signal.freqz evaluates the DTFT directly at the frequencies given; the design's
    # own figures (chirp z-transform and FFT) must agree with it
    rf = design(44100, 48000)
    fi, lobe = rf.intermediate_rate, rf.intermediate_rate / rf.total_taps
    fp = np.linspace(0, rf.passband_edge_hz, 6000)
    fs = rf.stopband_edge_hz + np.linspace(0, 40 * lobe, 6000)
    _, hp = ss.freqz(rf.prototype, worN=fp, fs=fi)
    _, hs = ss.freqz(rf.prototype, worN=fs, fs=fi)
    ripple = np.max(np.abs(20 * np.log10(np.abs(hp))))
    rejection = -20 * np.log10(np.max(np.abs(hs)))
    assert ripple == pytest.approx(rf.passband_ripple_db, rel=0.05)
    assert rejection == pytest.approx(rf.stopband_rejection_db, abs=0.1)
    # A window design's passband ripple equals its stopband ripple (REFERENCES.md §8, from
    # memory): the largest passband deviation is within a factor 1.5 of the stopband's peak
    dev = np.max(np.abs(np.abs(hp) - 1))
    assert 10 ** (-rf.stopband_rejection_db / 20) / 1.5 < dev < 1.5 * 10 ** (
        -rf.stopband_rejection_db / 20)
    # unity gain at 0 Hz (scipy.signal.firwin's scale=True)
    assert rf.prototype.sum() == pytest.approx(1.0, abs=1e-12)


def test_table_is_the_prototype_in_phases():
    rf = design(96000, 44100)
    assert rf.table.shape == (rf.up, rf.taps_per_phase) and rf.taps_per_phase % LANES == 0
    assert rf.total_taps % 2 == 1 and rf.delay == (rf.total_taps - 1) // 2
    for p in (0, 1, 73, rf.up - 1):
        taps = rf.prototype[p::rf.up] * rf.up
        np.testing.assert_array_equal(rf.table[p, ::-1][:taps.size], taps)
        assert not rf.table[p, ::-1][taps.size:].any()
    assert not rf.table.flags.writeable and design(96000, 44100) is rf
    d = rf.to_dict()
    assert d["up"] == 147 and d["down"] == 320 and "table" not in d
    assert "147/320" in rf.describe()


@pytest.mark.parametrize("rate_in, rate_out", [
    (8000, 384000), (384000, 8000), (11025, 384000), (192000, 44100), (44100, 192000),
    (352800, 384000), (88200, 48000), (32000, 44100), (22050, 16000), (176400, 96000)])
def test_every_kind_of_pair_meets_the_goals(rate_in, rate_out):
    rf = design(rate_in, rate_out)
    assert rf.passband_ripple_db <= 0.0001 and rf.stopband_rejection_db >= 140.0
    assert isinstance(rf, RateFilter)
    assert rf.passband_edge_hz == min(20000.0, 0.4535 * min(rate_in, rate_out))


# -- lengths and time alignment ------------------------------------------------------------------

def _round_half_up(q):
    return math.floor(q + Fraction(1, 2))


@pytest.mark.parametrize("rate_in, rate_out", PAIRS + [(8000, 44100), (384000, 8000)])
def test_output_length_is_round_of_the_ratio(rate_in, rate_out):
    rng = np.random.default_rng(rate_in + rate_out)
    ns = list(range(0, 40)) + [int(v) for v in rng.integers(40, 20000, 25)] + [319, 320, 321]
    for n in ns:
        want = _round_half_up(Fraction(n * rate_out, rate_in))
        assert Resampler.frames_out(n, rate_in, rate_out) == want
        y = _run(np.zeros((n, 1), np.float32), rate_in, rate_out, blocks=[997])
        assert len(y) == want, n
        if Fraction(n * rate_out, rate_in).denominator != 2:
            assert want == round(n * rate_out / rate_in)  # Python's round, away from ties


@pytest.mark.parametrize("rate_in, rate_out", PAIRS)
def test_zero_crossing_keeps_its_time(rate_in, rate_out):
    # no added delay: a slow sine's rising zero crossing, placed between samples, is at the
    # same time in the output (to 1 ns; one sample of the intermediate rate is 70-140 ns)
    tc = 0.123456789
    x = 0.5 * np.sin(2 * np.pi * 50.0 * (np.arange(int(0.3 * rate_in)) / rate_in - tc))
    y = _run(x[:, None], rate_in, rate_out)[:, 0]
    k = int(tc * rate_out)
    assert y[k] < 0 <= y[k + 1]
    t_est = (k + y[k] / (y[k] - y[k + 1])) / rate_out
    assert abs(t_est - tc) < 1e-9


# -- streaming: blocks equal whole, bit for bit --------------------------------------------------

@pytest.mark.parametrize("rate_in, rate_out", PAIRS + [(8000, 44100), (384000, 8000)])
@pytest.mark.parametrize("blocks", [[1], [7], [4096], [1, 7, 4096, 333, 2, 10000]],
                         ids=["1", "7", "4096", "uneven"])
def test_blocks_equal_whole(rate_in, rate_out, blocks):
    n = 3000 if blocks == [1] else 20000
    x = np.random.default_rng(11).uniform(-1, 1, (n, 2)).astype(np.float32)
    whole = _run(x, rate_in, rate_out)
    parts = _run(x, rate_in, rate_out, blocks=blocks)
    assert parts.dtype == np.float64 and parts.shape == whole.shape
    assert np.array_equal(parts, whole)


@settings(max_examples=25, deadline=None)
@given(pair=st.sampled_from(PAIRS + [(8000, 44100), (22050, 32000)]),
       sizes=st.lists(st.integers(1, 3000), min_size=1, max_size=12),
       channels=st.integers(1, 3), n=st.integers(0, 6000))
def test_any_blocks_equal_whole(pair, sizes, channels, n):
    x = np.random.default_rng(n).standard_normal((n, channels))
    assert np.array_equal(_run(x, *pair, blocks=sizes), _run(x, *pair))


def test_threads_do_not_change_the_bits(monkeypatch):
    x = np.random.default_rng(5).uniform(-1, 1, (50000, 2))
    one = _run(x, 96000, 44100, blocks=[8192], threads=1)
    monkeypatch.setattr(resample, "_SPLIT_MACS", 1)  # split every block
    for threads in (2, 3):
        assert np.array_equal(_run(x, 96000, 44100, blocks=[8192], threads=threads), one)


def test_memory_stays_flat():
    r = Resampler(96000, 44100, 2)
    x = np.zeros((4096, 2), np.float32)
    for _ in range(300):
        r.process(x)
    assert r._buf.shape[1] <= r.filter.taps_per_phase + 3 * 4096
    # what is held back is the filter's look-ahead, no more
    behind = Resampler.frames_out(300 * 4096, 96000, 44100) - r.frames_done
    assert 0 < behind <= math.ceil(r.filter.lookahead_frames * 44100 / 96000) + 1


def test_float32_and_float64_input_give_the_same_output():
    x = np.random.default_rng(2).uniform(-1, 1, (5000, 2)).astype(np.float32)
    assert np.array_equal(_run(x, 44100, 48000), _run(x.astype(np.float64), 44100, 48000))


def test_equal_rates_are_the_identity():
    x = np.random.default_rng(4).uniform(-1, 1, (1000, 2)).astype(np.float32)
    r = Resampler(48000, 48000, 2)
    y = np.concatenate([r.process(x[:300]), r.process(x[300:]), r.finish()])
    assert r.filter is None and y.dtype == np.float64 and np.array_equal(y, x)


def test_misuse_is_refused():
    r = Resampler(44100, 48000, 2)
    with pytest.raises(ValueError, match=r"shape \(frames, 2\)"):
        r.process(np.zeros((10, 3)))
    with pytest.raises(TypeError, match="float32 or float64"):
        r.process(np.zeros((10, 2), np.int16))
    r.finish()
    with pytest.raises(ValueError, match="after finish"):
        r.process(np.zeros((10, 2)))
    with pytest.raises(ValueError, match="channels"):
        Resampler(44100, 48000, 0)
    with pytest.raises(ValueError, match="n_in"):
        Resampler.frames_out(-1, 44100, 48000)


# -- the kernel --------------------------------------------------------------------------------

@pytest.mark.parametrize("L, M, K, nch", [(147, 320, 224, 2), (160, 147, 104, 1), (1, 48, 64, 3),
                                          (48, 1, 8, 2)])
def test_native_kernel_equals_plain_twin(L, M, K, nch):
    rng = np.random.default_rng(L + M)
    table = rng.standard_normal(L * K)
    stride = 800
    buf = rng.standard_normal(nch * stride)
    t0 = (K - 1) * L + 5
    n = ((stride - 1) * L - t0) // M  # as many frames as the buffer holds
    a, b = np.zeros(n * nch), np.zeros(n * nch)
    native.kernel("resample")(buf, stride, nch, table, L, K, M, t0, n, a)
    resample_block_plain(buf, stride, nch, table, L, K, M, t0, n, b)
    assert np.array_equal(a, b) and a.any()


def test_kernel_refuses_reads_outside_its_buffer():
    k = native.kernel("resample")
    table, buf, out = np.zeros(147 * 224), np.zeros(2 * 1000), np.zeros(2 * 400)
    with pytest.raises(ValueError, match="n=400 breaks"):
        k(buf, 1000, 2, table, 147, 224, 320, 223 * 147, 400, out)  # reads past the row
    with pytest.raises(ValueError, match="t0=0 breaks"):
        k(buf, 1000, 2, table, 147, 224, 320, 0, 10, out)  # reads before it
    with pytest.raises(ValueError, match="table holds"):
        k(buf, 1000, 2, table[:-1], 147, 224, 320, 223 * 147, 10, out)
    assert not out.any()


# -- bad rates -------------------------------------------------------------------------------------

@pytest.mark.parametrize("rate_in, rate_out", [
    (7999, 44100), (44100, 384001), (0, 48000), (-44100, 48000), (44100.5, 48000),
    (float("nan"), 48000), ("44100", 48000), (True, 48000)])
def test_bad_rates_give_one_sentence(rate_in, rate_out):
    which, bad = ("output", rate_out) if rate_in == 44100 else ("input", rate_in)
    for call in (lambda: design(rate_in, rate_out),
                 lambda: Resampler(rate_in, rate_out, 2)):
        with pytest.raises(UsageError, match="give a rate from 8000 to 384000 Hz") as exc:
            call()
        msg = str(exc.value)
        assert "\n" not in msg and msg.count(";") == 1
        assert msg.startswith(f"the {which} rate {bad!r}")


def test_equal_rates_and_unreachable_ratios_are_explained():
    with pytest.raises(UsageError, match="nothing to convert"):
        design(48000, 48000)
    with pytest.raises(UsageError, match=r"exact ratio 48000/44101.*multiples of 100 Hz"):
        design(44101, 48000)


# -- the command ---------------------------------------------------------------------------------

def test_rate_show_prints_json_and_plots(tmp_path):
    import json

    png = tmp_path / "r.png"
    code, stdout, stderr = run_cli("rate", "show", "--from", 96000, "--to", 44100, "--plot", png)
    assert code == 0, stderr
    assert "147/320" in stdout and "rejection" in stdout and "delay" in stdout
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    code, stdout, stderr = run_cli("rate", "show", "--from", 44100, "--to", 48000, "--json")
    assert code == 0, stderr
    assert json.loads(stdout) == json.loads(json.dumps(design(44100, 48000).to_dict()))
    # the plot is not replaced without --overwrite
    code, _, stderr = run_cli("rate", "show", "--from", 96000, "--to", 44100, "--plot", png)
    assert code == 2 and "overwrite" in stderr


@pytest.mark.parametrize("args", [["--from", "4000", "--to", "48000"],
                                  ["--from", "44100", "--to", "44100"],
                                  ["--from", "44100.5", "--to", "48000"]])
def test_rate_show_bad_values(args):
    code, _, stderr = run_cli("rate", "show", *args)
    assert code == 2 and len(stderr.strip().splitlines()) == 1 and "Traceback" not in stderr
