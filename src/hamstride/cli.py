"""The `hamstride` command line: a thin typer layer over the Python API.

Exit codes: 0 success, 1 when some trials failed (listed), 2 on usage errors.
"""
from __future__ import annotations

import sys
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console
from rich.table import Table

from .errors import HamstrideError

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    rich_markup_mode="markdown",
    help=(
        "Late-swing hamstring stretch, lengthening velocity and lengthening work of sprinters from C3D marker "
        "files.\n\n"
        "Example: `hamstride squad demo_trials --out reports/`\n\n"
        "A screening and monitoring aid, not a diagnosis; decisions about an athlete's care belong to qualified "
        "clinicians and local practice."
    ),
)
console = Console()
err_console = Console(stderr=True)


def _fail(exc: HamstrideError, code: int = 1) -> None:
    err_console.print(f"[bold red]error[/] [{exc.code}] {exc.message}", highlight=False, soft_wrap=True)
    raise typer.Exit(code)


@app.command("landmarks")
def landmarks_cmd(
    trial: Path = typer.Argument(..., help="A C3D trial."),
    markers: Optional[Path] = typer.Option(None, "--markers", help="TOML marker map (landmark = C3D label)."),
) -> None:
    """Show how each anatomical landmark resolved in a trial (label used, % valid frames).

    Example: `hamstride landmarks demo_trials/KT07/2026-03-02_week0/sprint_01.c3d`

    Exit code 0 when every required landmark resolves, 1 otherwise.
    """
    from .io import read_c3d
    from .landmarks import LandmarkError, load_marker_map, plain_name, resolve_landmarks

    try:
        marker_map = load_marker_map(markers)
        data = read_c3d(trial)
    except HamstrideError as exc:
        _fail(exc)
    try:
        lm = resolve_landmarks(data, marker_map)
        problem = None
    except LandmarkError as exc:
        problem = exc
        lm = resolve_landmarks(data, marker_map, allow_missing=tuple(marker_map.landmarks))
    table = Table(title=f"{trial.name}: {data.n_frames} frames at {data.rate_hz:g} Hz, "
                        f"vertical {data.lab.vertical_axis}, travel {data.lab.travel_axis} ({marker_map.source})")
    table.add_column("landmark")
    table.add_column("label")
    table.add_column("valid frames %", justify="right")
    table.add_column("")
    for row in lm.report:
        status = "required" if row.required else "optional"
        label = row.label if row.label is not None else f"[red]missing[/] ({row.note})"
        table.add_row(plain_name(row.landmark), label, f"{row.valid_pct:.0f}", status)
    console.print(table)
    if problem is not None:
        _fail(problem)


@app.command("demo")
def demo_cmd(
    directory: Path = typer.Argument(Path("demo_trials"), help="Folder to write the invented demo squad into."),
) -> None:
    """Write the invented demo squad (six fictional athletes, C3D sprint trials and athletes.csv).

    Example: `hamstride demo my_demo/`
    """
    from .synth import write_demo_squad

    paths = write_demo_squad(directory)
    console.print(f"wrote {len(paths)} files under {directory}")


@app.command("muscles")
def muscles_cmd(
    hip_flexion: float = typer.Option(0.0, "--hip-flexion", help="Hip flexion in degrees."),
    knee_flexion: float = typer.Option(0.0, "--knee-flexion", help="Knee flexion in degrees."),
    height: float = typer.Option(1.80, "--height", help="Athlete height in metres (scales the model)."),
    plot: Optional[Path] = typer.Option(None, "--plot", help="Also draw moment-arm curves to this PNG."),
) -> None:
    """Print each hamstring's length, strain and moment arms at one hip and knee angle.

    Example: `hamstride muscles --hip-flexion 70 --knee-flexion 30 --plot arms.png`
    """
    from .muscles import MuscleDims, muscle_table, plot_moment_arms

    dims = MuscleDims.from_height(height) if hasattr(MuscleDims, "from_height") else MuscleDims(
        pelvis_width_m=0.145 * height, pelvis_depth_m=0.09 * height, thigh_length_m=0.245 * height,
        shank_length_m=0.246 * height)
    frame = muscle_table(hip_flexion, knee_flexion, dims)
    table = Table(title=f"hamstring model at hip flexion {hip_flexion:g} deg, knee flexion {knee_flexion:g} deg, "
                        f"height {height:g} m")
    for col in frame.columns:
        table.add_column(str(col))
    for _, row in frame.iterrows():
        table.add_row(*[f"{v:.4g}" if isinstance(v, float) else str(v) for v in row])
    console.print(table)
    if plot is not None:
        console.print(f"wrote {plot_moment_arms(plot, dims)}")


def main() -> None:  # pragma: no cover - console entry point helper
    app()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(app())
