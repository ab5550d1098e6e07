"""The release number (read by the model file, the command line and cluster checks)."""

__version__ = "0.1.0"
