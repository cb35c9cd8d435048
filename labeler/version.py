"""The tool's version: part of every taxonomy, labels and store version it writes."""
__version__ = "0.1.0"
