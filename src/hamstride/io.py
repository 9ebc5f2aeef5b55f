"""C3D reading and writing, atomic files and row-wise vector helpers (compatibility module).

The code lives in :mod:`hamstride.c3d` (trial, screen, reader, writer), :mod:`hamstride.atomic` and
:mod:`hamstride.numerics`; these names stay importable from here. Patch ``hamstride.c3d.reader.NUMPY_READER``
(not this module's copy) to force the native reader.
"""
from __future__ import annotations

from .atomic import atomic_open, atomic_path, atomic_write_bytes, atomic_write_text, safe_name
from .c3d.reader import (MAX_ABS_COORDINATE_M, NUMPY_READER, TEXT_PADDING, clean_text, read_c3d,
                         read_c3d_isolated)
from .c3d.screen import C3DLayout, check_c3d_header
from .c3d.trial import UNIT_TO_METRES, C3DEvent, MarkerTrial
from .c3d.writer import write_c3d
from .numerics import all_xyz, any_xyz, cross_rows, dot_rows, finite_points, norm_rows

__all__ = ["read_c3d", "read_c3d_isolated", "write_c3d", "check_c3d_header", "clean_text", "MarkerTrial",
           "C3DEvent", "C3DLayout", "UNIT_TO_METRES", "MAX_ABS_COORDINATE_M", "TEXT_PADDING", "NUMPY_READER",
           "atomic_open", "atomic_path", "atomic_write_bytes", "atomic_write_text", "safe_name", "all_xyz", "any_xyz",
           "cross_rows", "dot_rows", "finite_points", "norm_rows"]
