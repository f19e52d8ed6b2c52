"""requant.audio_io."""
