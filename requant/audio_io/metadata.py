"""Carrying metadata from a source to its requantized output.

A WAV written from a WAV gets every chunk of the source that requantizing does not
invalidate, byte for byte (``bext`` with one coding-history row appended); FLAC and
AIFF outputs keep the text tags libsndfile exposes; what cannot be carried is listed.
"""

import struct

from requant import __version__
from requant.errors import OutputError

__all__ = ["CarryMetadata", "is_riff_wave", "source_tags"]


# Source WAV chunks that are not metadata (see requant.audio_io.riff.copy_metadata).
_NOT_METADATA = frozenset({"fmt ", "data", "fact", "ds64", "JUNK", "junk", "PAD ", "FLLR",
                           "PEAK", "levl"})


def is_riff_wave(path):
    try:
        with open(path, "rb") as fh:
            head = fh.read(12)
    except OSError:
        return False
    return len(head) == 12 and head[:4] in (b"RIFF", b"RF64", b"BW64") and head[8:] == b"WAVE"


def source_tags(path):
    import soundfile as sf

    try:
        with sf.SoundFile(path) as f:
            return {k: v for k, v in f.copy_metadata().items() if v}
    except Exception:  # convert_file reports an unreadable source with its own message
        return {}


def _history_text(settings, dither_applied=None):
    shaping = settings["shaping"]
    if shaping not in ("none", "first-order", "hearing"):
        shaping = "file" if shaping.lower().endswith(".json") else "custom"
    dither = dither_applied or settings["dither"]
    text = f"requant {__version__}; {settings['quantizer']}; dither {dither}; shaping {shaping}"
    return "".join(ch for ch in text if " " <= ch <= "~" and ch != ",")


class CarryMetadata:
    """convert_file's ``finalize``: carry WAV chunks over, or record what is lost."""

    def __init__(self, source, out_path, settings, tags, source_is_wav):
        self.source = source
        self.out_path = out_path
        self.settings = settings
        self.tags = tags
        self.source_is_wav = source_is_wav

    def __call__(self, tmp_out, out_format, report=None):
        from requant.audio_io import riff  # noqa: F401

        meta = {"copied": [], "rewritten": [], "dropped": [], "tags": sorted(self.tags or {})}
        if not self.source_is_wav:
            return meta
        try:
            chunks = riff.read_chunks(self.source)
        except riff.ChunkError as exc:
            meta["error"] = (f"the WAV chunks of the source could not be read ({exc}); the audio "
                             "was converted without them")
            return meta
        except OSError:
            return meta  # convert_file has just read it; a vanishing file is not our story
        carried = [c.id for c in chunks if c.id not in _NOT_METADATA]
        if out_format not in ("WAV", "RF64"):
            meta["dropped"] = carried
            return meta
        if not carried:
            return meta  # nothing to carry over: keep the file as written (saves a rewrite)
        rate, channels = self._rate_channels(riff, tmp_out)
        applied = None
        if report is not None:  # a convert_file that passes its report to finalize
            applied = report.get("settings", {}).get("dither_applied")
        row = riff.coding_history_row(sample_rate=rate, bits=self.settings["bits"],
                                      channels=channels,
                                      text=_history_text(self.settings, applied))
        try:
            got = riff.copy_metadata(self.source, tmp_out, coding_history_row=row)
        except riff.ChunkError as exc:
            meta["error"] = (f"the WAV chunks of the source could not be copied ({exc}); the "
                             "audio was converted without them")
            return meta
        except OSError as exc:
            raise OutputError(f"copying the WAV chunks into {self.out_path!r} failed "
                              f"({exc.strerror or exc}); check the destination's free space and "
                              "permissions") from None
        meta.update(copied=got["copied"], rewritten=got["rewritten"],
                    dropped=[c for c in got["dropped"] if c not in _NOT_METADATA])
        return meta

    @staticmethod
    def _rate_channels(riff, path):
        # WAVEFORMAT (RIFF 1991): wFormatTag u16, nChannels u16, nSamplesPerSec u32, ...
        fmt = next(c for c in riff.read_chunks(path) if c.id == "fmt ")
        channels, rate = struct.unpack_from("<HI", fmt.read(path, max_bytes=64)[:8], 2)
        return rate, channels


