"""scenemon: a streaming acoustic-scene monitor for small on-device audio classifiers."""

__version__ = "0.1.0"
