"""Executors: where a batch's files are converted (see :mod:`.base` for the protocol)."""
