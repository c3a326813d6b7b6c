"""The package version, in one place (read by the document and fit writers)."""

__version__ = "0.1.0"
