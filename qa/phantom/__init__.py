"""Phantom definitions: the data model, materials and the YAML reader."""

from .load import load_phantom
from .model import Phantom, PhantomObject, Shape

__all__ = ["load_phantom", "Phantom", "PhantomObject", "Shape"]
