"""Version of the qcflag package (single source of truth)."""

__version__ = "0.1.0"
