"""labeler: in-profile or new-interest, one answer per interaction."""
__version__ = "0.1.0"
