"""requant.dsp."""
