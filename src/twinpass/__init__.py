"""twinpass: zero-phase filtering of large multi-channel sensor archives.

Arrays are time-major, shape (samples, channels). Frequencies are in Hz, levels in dB,
lengths in samples unless a name says otherwise.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
