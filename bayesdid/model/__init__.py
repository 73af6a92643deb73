"""Model builders, one per outcome family, sharing the hierarchical terms in :mod:`.terms`."""

from .terms import default_scales, ModelSpec, build_model

__all__ = ["default_scales", "ModelSpec", "build_model"]
