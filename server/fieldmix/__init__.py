"""fieldmix: a real-time networked spatial mixing server."""

__version__ = "0.1.0"
