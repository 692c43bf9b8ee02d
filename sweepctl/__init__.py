"""sweepctl: seeded, resumable Lyapunov-exponent campaigns for network models."""

__version__ = "0.1.0"

__all__ = ["__version__"]
