"""Reconstruct geometrically true fingerprint images from swipe-strip capacitive sensor frames."""

from ._types import Event, QualityReport, Reconstruction, ReconstructionError, LowOverlapWarning

__version__ = "0.1.0"

__all__ = ["Event", "QualityReport", "Reconstruction", "ReconstructionError", "LowOverlapWarning",
           "__version__"]
