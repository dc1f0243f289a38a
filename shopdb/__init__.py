"""shopdb: surface-figure records and statistical process control for optical polishing shops."""

__version__ = "0.1.0"
