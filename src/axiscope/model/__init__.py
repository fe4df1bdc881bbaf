"""The fitted model: its on-disk format, what follows from it in closed form, and projection.

Everything needed to place new samples on the axes lives here, so that fitting, explaining
and scoring all build on this layer and none of them on each other.
"""

from .store import MODEL_VERSION, Model, load_model

__all__ = ["MODEL_VERSION", "Model", "load_model"]
