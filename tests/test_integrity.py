"""Data integrity: nothing is lost, nothing hangs, nothing stale ships."""

import json
import os

import numpy as np
import pytest
import soundfile as sf

from requant.audio_io.probe import declared_frames, non_regular_kind

from helpers import run_cli


@pytest.fixture
def fifo(tmp_path):
    path = tmp_path / "pipe.wav"
    os.mkfifo(path)
    return path


def test_a_fifo_is_named_not_opened(fifo):
    assert non_regular_kind(fifo) == "a FIFO (named pipe)"
    assert non_regular_kind(fifo.parent) is None


@pytest.mark.parametrize("command", [["convert", "{f}", "{o}"], ["inspect", "{f}"]])
def test_fifo_input_is_refused_at_once(fifo, tmp_path, command):
    # opening a FIFO for reading waits for a writer forever: refuse it before that
    args = [a.format(f=fifo, o=tmp_path / "o.wav") for a in command]
    code, _, err = run_cli(*args, timeout=30)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and "FIFO" in lines[0] and "Traceback" not in err
    assert not (tmp_path / "o.wav").exists()


@pytest.mark.parametrize("dry_run", [False, True])
def test_batch_lists_a_fifo_as_skipped(tmp_path, dry_run):
    src = tmp_path / "lib"
    src.mkdir()
    sf.write(src / "a.wav", np.zeros((480, 1)), 48000, subtype="PCM_24")
    os.mkfifo(src / "b.wav")
    code, out, err = run_cli("batch", src, tmp_path / "out", "--jobs", 1,
                             *(["--dry-run"] if dry_run else []), timeout=60)
    assert code == 0, err
    if dry_run:
        assert "b.wav" in out and "regular file" in out
        return
    events = [json.loads(line) for line in
              (tmp_path / "out" / "requant-manifest.jsonl").read_text().splitlines()]
    by_source = {e["source"]: e for e in events}
    assert by_source["a.wav"]["status"] == "converted"
    assert by_source["b.wav"]["status"] == "skipped"
    assert "not a regular file" in by_source["b.wav"]["reason"]


@pytest.mark.parametrize("fmt, subtype", [("WAV", "PCM_24"), ("AIFF", "PCM_16"),
                                          ("RF64", "PCM_16"), ("WAV", "FLOAT")])
def test_declared_frames_of_whole_and_cut_files(tmp_path, fmt, subtype):
    # RIFF 1991 / EBU Tech 3306: data size over block align; AIFF: COMM numSampleFrames
    x = np.random.default_rng(1).uniform(-0.5, 0.5, (4800, 2))
    whole = tmp_path / f"w.{fmt.lower()}"
    sf.write(whole, x, 48000, subtype=subtype, format=fmt)
    assert declared_frames(whole) == 4800 == sf.info(whole).frames
    cut = tmp_path / f"c.{fmt.lower()}"
    data = whole.read_bytes()
    cut.write_bytes(data[: len(data) // 2])
    # libsndfile reads what is there; the header still says what should have been
    assert declared_frames(cut) == 4800 and sf.info(cut).frames < 4800


def test_declared_frames_of_other_files(tmp_path):
    sf.write(tmp_path / "x.flac", np.zeros((100, 1)), 48000)
    (tmp_path / "t.wav").write_bytes(b"RIFF")
    assert declared_frames(tmp_path / "x.flac") is None
    assert declared_frames(tmp_path / "t.wav") is None
    assert declared_frames(tmp_path / "absent.wav") is None


def test_ctrl_c_waits_for_a_chunk_handover():
    # the local pool commits a chunk's outputs with Ctrl-C held back: the interrupt
    # arrives after the block, never between a rename and its record
    import signal

    from requant.library.executors.local import _sigint_deferred

    done = []
    with pytest.raises(KeyboardInterrupt):
        with _sigint_deferred():
            os.kill(os.getpid(), signal.SIGINT)
            done.append("after the signal")
    assert done == ["after the signal"]
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler
