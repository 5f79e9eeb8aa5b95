"""actdoc: find hidden units that no longer do useful work in a dump of a trained network."""

__version__ = "0.1.0"
