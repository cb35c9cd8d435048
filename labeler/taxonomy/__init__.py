"""Topic taxonomies: learned from item text or taken from editorial categories."""
from .build import build_taxonomy
from .model import Taxonomy

__all__ = ["Taxonomy", "build_taxonomy"]
