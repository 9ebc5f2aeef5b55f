"""What a C3D marker trial becomes: :class:`MarkerTrial` (file axes, metres, invalid points NaN) and its
:class:`C3DEvent` s; the unit words of POINT:UNITS (c3d.org user guide)."""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Mapping

import numpy as np


if TYPE_CHECKING:
    from ..labframe import LabFrame

__all__ = ["MarkerTrial", "C3DEvent", "UNIT_TO_METRES", "TEXT_PADDING", "clean_text"]

UNIT_TO_METRES = {"mm": 1e-3, "cm": 1e-2, "m": 1.0, "millimeters": 1e-3, "millimetres": 1e-3, "meters": 1.0, "metres": 1.0}

_FOOT_STRIKE_WORDS = ("foot strike", "footstrike", "foot_strike", "initial contact", "foot contact", "heel strike",
                      "touchdown", "touch down")
_TOE_OFF_WORDS = ("foot off", "footoff", "foot_off", "toe off", "toeoff", "toe_off", "final contact", "take off",
                  "takeoff")


@dataclass(frozen=True)
class C3DEvent:
    """One event from the file: ``kind`` is 'foot_strike', 'toe_off' or the file's own label (lower case)."""

    kind: str
    side: str  # 'left', 'right' or 'general'
    time_s: float  # from the first frame = 0 s
    label: str = ""


@dataclass(frozen=True)
class MarkerTrial:
    """A marker trial in the internal lab frame, metres, NaN where the file marks a point invalid."""

    path: str
    labels: tuple[str, ...]
    xyz: np.ndarray  # [frame, marker, 3]
    rate_hz: float
    first_frame: int  # 1-based frame number of the first frame in the original capture
    events: tuple[C3DEvent, ...]
    meta: Mapping[str, object] = field(default_factory=dict)
    units_in_file: str = "mm"
    lab: "LabFrame | None" = None  # labframe.LabFrame once mapped to the internal lab frame (None: file axes)
    force_plates: tuple = ()  # plates.ForcePlate per FORCE_PLATFORM (plates.attach_force_plates)

    @property
    def name(self) -> str:
        return Path(self.path).stem

    @property
    def n_frames(self) -> int:
        return int(self.xyz.shape[0])

    @property
    def first_frame_time_s(self) -> float:
        return (self.first_frame - 1) / self.rate_hz

    @property
    def time_s(self) -> np.ndarray:
        return np.arange(self.n_frames) / self.rate_hz

    def marker(self, label: str) -> np.ndarray:
        return self.xyz[:, self.labels.index(label), :]


TEXT_PADDING = " \x00"


def clean_text(value: object) -> str:
    """A string read from a C3D parameter without its padding (spaces and NUL bytes at either end)."""
    return str(value).strip(TEXT_PADDING)
