"""requant: requantize audio to a shorter word length, and prove the result."""

__version__ = "0.1.0"
