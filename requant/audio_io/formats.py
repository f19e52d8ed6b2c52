"""Containers and subtypes: which file format an output path asks for, and
which integer subtype holds a word length.

Codes go to soundfile as integer arrays (int16, or int32 left-justified) so
that libsndfile only moves bits: its own float scaling and rounding never
touch the result (python-soundfile docs; REFERENCES.md §6).
"""

import os

from requant.errors import UsageError

__all__ = [
    "OUTPUT_FORMATS",
    "LOSSY_EXTENSIONS",
    "LOSSY_SUBTYPES",
    "format_for_path",
    "subtype_for",
    "container_bits_of",
    "read_dtype_for",
    "RF64_THRESHOLD",
]

#: Output extensions and the libsndfile major format they select.
OUTPUT_FORMATS = {
    ".wav": "WAV",
    ".wave": "WAV",
    ".flac": "FLAC",
    ".aif": "AIFF",
    ".aiff": "AIFF",
    ".aifc": "AIFF",
}

#: Extensions of lossy codecs: their decoders do not return our codes.
LOSSY_EXTENSIONS = {
    ".mp3": "MP3", ".ogg": "Ogg Vorbis", ".oga": "Ogg Vorbis", ".opus": "Opus",
    ".m4a": "AAC", ".aac": "AAC", ".wma": "WMA", ".mp2": "MPEG layer II",
}

#: libsndfile subtypes of lossy codecs, as a source: what they decode to is the codec's
#: approximation, its noise floor the codec's, not the master's.
LOSSY_SUBTYPES = {"VORBIS": "Ogg Vorbis", "OPUS": "Opus", "MPEG_LAYER_I": "MPEG layer I",
                  "MPEG_LAYER_II": "MPEG layer II", "MPEG_LAYER_III": "MP3"}

#: Container word lengths of integer subtypes.
_SUBTYPE_BITS = {"PCM_U8": 8, "PCM_S8": 8, "PCM_16": 16, "PCM_24": 24, "PCM_32": 32}

#: Sizes above this (bytes of audio data) go to RF64 instead of RIFF WAV
#: (EBU Tech 3306): a RIFF size field is 32 bits; keep a margin for chunks.
RF64_THRESHOLD = 0xFFFFFFFF - (1 << 20)


def format_for_path(path, *, what="output"):
    """The libsndfile format ('WAV', 'FLAC', 'AIFF') for an output path.

    Raises
    ------
    UsageError
        For a lossy or unknown extension, with the list of allowed ones.
    """
    ext = os.path.splitext(os.fspath(path))[1].lower()
    if ext in OUTPUT_FORMATS:
        return OUTPUT_FORMATS[ext]
    if ext in LOSSY_EXTENSIONS:
        raise UsageError(
            f"{os.fspath(path)!r}: {LOSSY_EXTENSIONS[ext]} is a lossy format and cannot hold "
            f"requantized samples exactly; name the {what} .wav, .flac or .aiff"
        )
    raise UsageError(
        f"{os.fspath(path)!r}: unknown {what} extension {ext or '(none)'!r}; "
        "name it .wav, .flac or .aiff"
    )


def subtype_for(fmt, bits):
    """The smallest integer subtype of ``fmt`` that holds ``bits``.

    8-bit WAV is unsigned (PCM_U8), as RIFF/WAVE requires (IBM & Microsoft
    1991); FLAC holds at most 24 bits.
    """
    if bits <= 8:
        return "PCM_U8" if fmt in ("WAV", "RF64") else "PCM_S8"
    if bits <= 16:
        return "PCM_16"
    if bits <= 24:
        return "PCM_24"
    if fmt == "FLAC":
        raise UsageError(f"FLAC holds at most 24 bits, not {bits}; write .wav or .aiff for "
                         f"{bits} bits")
    return "PCM_32"


def container_bits_of(subtype):
    """Word length of an integer subtype, or None for float and others."""
    return _SUBTYPE_BITS.get(subtype)


def read_dtype_for(subtype):
    """Read dtype that holds every sample of ``subtype`` exactly.

    float32 holds 24-bit integers and float32 samples exactly and is much
    cheaper to read; 32-bit integer and double files need float64.
    """
    if subtype in ("PCM_S8", "PCM_U8", "PCM_16", "PCM_24", "FLOAT", "ULAW", "ALAW"):
        return "float32"
    return "float64"


#: Frames per block by default (how files are read and written; the output does not
#: depend on it).
DEFAULT_BLOCK_FRAMES = 65536
#: Largest block: a few blocks of this many frames of a 64-channel file stay well under
#: a gigabyte, and larger blocks buy no speed.
MAX_BLOCK_FRAMES = 1 << 22


def check_block_frames(block_frames):
    """``block_frames`` as an int 1..MAX_BLOCK_FRAMES; :class:`UsageError` otherwise."""
    if isinstance(block_frames, bool) or not isinstance(block_frames, int) or not (
            1 <= block_frames <= MAX_BLOCK_FRAMES):
        raise UsageError(f"block_frames={block_frames!r} must be an integer from 1 to "
                         f"{MAX_BLOCK_FRAMES} (larger blocks only cost memory)")
    return block_frames
