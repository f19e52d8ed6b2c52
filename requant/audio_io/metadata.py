"""Carrying metadata from a source to its requantized output.

A WAV written from a WAV gets every chunk of the source that requantizing does not
invalidate, byte for byte (``bext`` with one coding-history row appended); FLAC and
AIFF outputs keep the text tags libsndfile exposes; what cannot be carried is listed.
"""

import struct

from requant import __version__
from requant.audio_io import riff
from requant.audio_io.probe import sndfile_target
from requant.errors import OutputError

__all__ = ["CarryMetadata", "is_riff_wave", "source_tags", "history_text", "metadata_sentences"]


# Source WAV chunks that are not metadata (see requant.audio_io.riff.copy_metadata).
_NOT_METADATA = frozenset({"fmt ", "data", "fact", "ds64", "JUNK", "junk", "PAD ", "FLLR",
                           "PEAK", "levl"})


def is_riff_wave(path):
    """True when ``path`` starts like a RIFF/RF64/BW64 WAVE file."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(12)
    except OSError:
        return False
    return len(head) == 12 and head[:4] in (b"RIFF", b"RF64", b"BW64") and head[8:] == b"WAVE"


def source_tags(path):
    """The text tags libsndfile reads from ``path`` (title, artist, ...), without empty ones."""
    import soundfile as sf

    try:
        target, closefd = sndfile_target(path)
        with sf.SoundFile(target, closefd=closefd) as f:
            return {k: v for k, v in f.copy_metadata().items() if v}
    except Exception:  # convert_file reports an unreadable source with its own message
        return {}


def history_text(recipe, dither_applied=None):
    """The free-text part of our coding-history row (printable ASCII, no commas)."""
    dither = dither_applied or recipe.dither
    text = (f"requant {__version__}; {recipe.quantizer}; dither {dither}; shaping "
            f"{recipe.shaping.label}")
    return "".join(ch for ch in text if " " <= ch <= "~" and ch != ",")


class CarryMetadata:
    """Carry a source's WAV chunks over to a finished output, or record what is lost.

    Called by :func:`requant.convert.convert_file` on the temporary output
    before it is renamed into place, with the dither actually applied (for the
    coding-history row); returns the record that goes into the report's
    ``output.metadata``.
    """

    def __init__(self, source, out_path, recipe, tags, source_is_wav):
        self.source = source
        self.out_path = out_path
        self.recipe = recipe
        self.tags = tags
        self.source_is_wav = source_is_wav

    def __call__(self, tmp_out, out_format, dither_applied=None, rate_changed=False):
        """Carry the chunks into ``tmp_out``; the record of what was carried and dropped.

        ``rate_changed``: the output's sample rate is not the source's, so the
        chunks that hold sample positions (:data:`requant.audio_io.riff.POSITION_CHUNKS`)
        are dropped, and said to be.
        """
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
        row = riff.coding_history_row(sample_rate=rate, bits=self.recipe.bits,
                                      channels=channels,
                                      text=history_text(self.recipe, dither_applied))
        try:
            got = riff.copy_metadata(self.source, tmp_out, coding_history_row=row,
                                     also_drop=riff.POSITION_CHUNKS if rate_changed
                                     else frozenset())
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


def metadata_sentences(meta, out_format):
    """What a conversion did with the source's metadata, for people.

    Parameters
    ----------
    meta : requant.report.model.MetadataRecord
    out_format : str
        The output container (``WAV``, ``RF64``, ``FLAC``, ``AIFF``).

    Returns
    -------
    (str or None, list of str)
        One line saying what was carried (None when the source had none), and
        warnings: chunks dropped and why, a chunk list that could not be read.
        ``convert`` prints them; ``batch`` records them per file.
    """
    warnings = []
    kept = [*meta.rewritten, *meta.copied]
    parts = []
    if kept:
        shown = [f"{c.strip()} (+1 coding-history row)" if c == "bext" and c in meta.rewritten
                 else c.strip() for c in kept]
        parts.append("WAV chunks " + ", ".join(shown))
    if meta.tags and out_format not in ("WAV", "RF64"):
        parts.append("text tags " + ", ".join(meta.tags))
    line = ("metadata kept: " + "; ".join(parts)) if parts else None
    dropped = [c for c in meta.dropped if c not in _NOT_METADATA]
    if dropped:
        names = ", ".join(repr(c) for c in dropped)
        if out_format not in ("WAV", "RF64"):
            warnings.append(f"the WAV chunks {names} cannot be stored in {out_format} and were "
                            "dropped; write WAV (a .wav output, or --format wav in a batch) to "
                            "keep them")
        else:
            warnings.append(f"the WAV chunks {names} hold sample positions that a change of "
                            "sample rate makes wrong, and were dropped")
    if meta.error:
        warnings.append(meta.error)
    return line, warnings


