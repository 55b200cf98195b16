"""latchwatch: latch-up checks for Python layout generators."""

__version__ = "0.1.0"
