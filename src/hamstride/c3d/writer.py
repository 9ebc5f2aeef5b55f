"""Write C3D marker trials (through ezc3d), with events, subject details and force plates, atomically."""
from __future__ import annotations

from pathlib import Path
from typing import Iterable, Mapping, Sequence

import numpy as np

from ..atomic import atomic_path

__all__ = ["write_c3d"]


def write_c3d(path: str | Path, labels: Sequence[str], xyz: np.ndarray, rate_hz: float, *, units: str = "mm",
              events: Iterable[tuple[str, str, float]] = (), subject: Mapping[str, object] | None = None,
              force_plates: Sequence = (), analog_rate_hz: float = 1000.0) -> Path:
    """Write markers to a C3D file atomically (temporary file, then rename).

    ``xyz`` is [frame, marker, 3] in ``units`` in the file's own axes; NaN points are written as invalid (residual -1).
    ``events`` are (label, context, time_s) with time from the first frame = 0 s. ``subject`` may hold ``name``,
    ``body_mass_kg`` and ``height_m``. ``force_plates`` (plates.add_force_plates) adds type-2 force plates with
    analog channels at ``analog_rate_hz``.
    """
    import ezc3d

    path = Path(path)
    xyz = np.asarray(xyz, dtype=float)
    if xyz.ndim != 3 or xyz.shape[2] != 3 or xyz.shape[1] != len(labels):
        raise ValueError("xyz must be [frame, marker, 3] with one marker per label")
    c = ezc3d.c3d()
    c["parameters"]["POINT"]["RATE"]["value"] = [float(rate_hz)]
    c["parameters"]["POINT"]["LABELS"]["value"] = tuple(labels)
    c["parameters"]["POINT"]["UNITS"]["value"] = [units]
    pts = np.ones((4, xyz.shape[1], xyz.shape[0]))
    pts[:3] = xyz.transpose(2, 1, 0)
    c["data"]["points"] = pts
    for label, context, time_s in events:
        c.add_event(time=[0, float(time_s)], context=str(context), label=str(label))
    if subject:
        if subject.get("name"):
            c.add_parameter("SUBJECTS", "NAMES", [str(subject["name"])])
        if subject.get("body_mass_kg"):
            c.add_parameter("SUBJECTS", "BODY_MASS_KG", [float(subject["body_mass_kg"])])
        if subject.get("height_m"):
            c.add_parameter("SUBJECTS", "HEIGHT_M", [float(subject["height_m"])])
    if force_plates:
        from ..plates import add_force_plates

        add_force_plates(c, force_plates, xyz.shape[0], rate_hz, analog_rate_hz, units)
    with atomic_path(path, suffix=".partial.c3d") as tmp:  # ezc3d insists on a .c3d ending
        c.write(str(tmp))
    return path
