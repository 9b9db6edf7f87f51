"""Transition-line detection: edge map, Hough transform, families, refinement, jumps.

Pipeline (each step a public function; :class:`LineDetector` runs them all):
:func:`edge_map` → :func:`find_segments` → :func:`classify_lines` →
:func:`refine_segment` → family slopes and :func:`assess_quality`, with
:func:`detect_charge_jumps` excluding rows where the pattern shifts.
"""

from .detector import LineDetector, detect_lines
from .edges import EdgeMap, edge_map
from .families import classify_lines
from .hough import PixelSegment, find_segments, segment_to_line
from .jumps import detect_charge_jumps
from .refine import RefinedLine, refine_segment, refine_segments
from .result import ChargeJump, LineDetection, LineFamily, TransitionLine
from .verdict import assess_quality, family_slope

__all__ = [
    "LineDetector",
    "detect_lines",
    "EdgeMap",
    "edge_map",
    "PixelSegment",
    "find_segments",
    "segment_to_line",
    "classify_lines",
    "RefinedLine",
    "refine_segment",
    "refine_segments",
    "detect_charge_jumps",
    "family_slope",
    "assess_quality",
    "TransitionLine",
    "LineFamily",
    "ChargeJump",
    "LineDetection",
]
