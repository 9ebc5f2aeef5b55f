"""C3D files: :mod:`.trial` (what a trial becomes), :mod:`.screen` (header and parameter checker), :mod:`.reader`
(numpy/ezc3d reading) and :mod:`.writer` (ezc3d writing)."""
from __future__ import annotations

from .reader import MAX_ABS_COORDINATE_M, TEXT_PADDING, clean_text, read_c3d, read_c3d_isolated
from .screen import C3DLayout, check_c3d_header
from .trial import UNIT_TO_METRES, C3DEvent, MarkerTrial
from .writer import write_c3d

__all__ = ["read_c3d", "read_c3d_isolated", "write_c3d", "check_c3d_header", "clean_text", "MarkerTrial",
           "C3DEvent", "C3DLayout", "UNIT_TO_METRES", "MAX_ABS_COORDINATE_M", "TEXT_PADDING"]
