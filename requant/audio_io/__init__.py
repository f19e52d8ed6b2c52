"""Audio files in and out, and outputs that appear only when complete.

:mod:`.reader` opens inputs with one clear error and reads blocks on a thread;
:mod:`.writers` writes codes and error signals on a thread, and turns OS
errors into one sentence; :mod:`.wavwrite` is our WAV writer for integer codes;
:mod:`.formats` maps names to containers and word lengths; :mod:`.riff` reads
WAV/RF64 chunks and copies metadata; :mod:`.metadata` decides what a source's
metadata becomes in its output; :mod:`.atomic` writes every output to a
temporary file, flushes it and renames it into place (or removes it).
"""
