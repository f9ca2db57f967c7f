"""Rig files: what chambers exist, how they are wired, what they can physically do."""

from controller.rig._models import Chamber, ChamberLimits, Rig

__all__ = ["Chamber", "ChamberLimits", "Rig"]
