"""Reconstruct geometrically true fingerprint images from swipe-strip capacitive sensor frames."""

from ._types import Event, QualityReport, Reconstruction, ReconstructionError, LowOverlapWarning
from .pipeline import stitch
from .stream import StreamingStitcher, StreamUpdate
from . import (calibrate, compare, evaluate, firmware, io, mosaic, plots, refine, register,
               report, simulate, sweep, trajectory)

__version__ = "0.1.0"

__all__ = ["stitch", "StreamingStitcher", "StreamUpdate", "compare", "firmware", "Event", "QualityReport", "Reconstruction", "ReconstructionError",
           "LowOverlapWarning", "calibrate", "evaluate", "io", "mosaic", "plots", "refine", "register",
           "report", "simulate", "sweep", "trajectory", "__version__"]
