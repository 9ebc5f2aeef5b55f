"""The `hamstride` command line: a thin typer layer over the Python API.

Exit codes: 0 success, 1 when some trials failed (listed), 2 on usage errors.
"""
from __future__ import annotations

import os
import sys

# Parallelism is per trial (a process pool); BLAS threads inside each worker would only fight over the same cores
# (measured: the same wall time per trial at twice the CPU time). Set before numpy is first imported.
for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")
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


@app.callback()
def _every_command() -> None:
    # Before any command: let this process reuse freed memory (batch.tune_allocator; no effect without glibc).
    from .batch import tune_allocator

    tune_allocator()


def _fail(exc: HamstrideError, code: int = 1) -> None:
    err_console.print(f"[bold red]error[/] [{exc.code}] {exc.message}", highlight=False, soft_wrap=True)
    raise typer.Exit(code)


@app.command("landmarks")
def landmarks_cmd(
    trial: Path = typer.Argument(..., help="A C3D trial."),
    markers: Optional[Path] = typer.Option(None, "--markers", help="TOML marker map (landmark = C3D label)."),
) -> None:
    """Show how each anatomical landmark resolved in a trial (label used, % valid frames).

    Example: `hamstride landmarks demo_trials/KT07/2026-03-02_testing/sprint_01.c3d`

    Exit code 0 when every required landmark resolves, 1 otherwise.
    """
    from .io import read_c3d_isolated
    from .landmarks import LandmarkError, load_marker_map, plain_name, resolve_landmarks

    try:
        marker_map = load_marker_map(markers)
        data = read_c3d_isolated(trial)
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
    headers = {"muscle": "muscle", "length_m": "length\nm", "strain_pct": "strain\n%",
               "fibre_length_lopt": "fibre\nl/lopt", "tendon_slack_length_m": "tendon\nslack m",
               "hip_flexion_arm_mm": "hip flex\narm mm", "hip_adduction_arm_mm": "hip add\narm mm",
               "hip_rotation_arm_mm": "hip rot\narm mm", "knee_flexion_arm_mm": "knee flex\narm mm"}
    for col in frame.columns:
        table.add_column(headers.get(str(col), str(col)), justify="left" if col == "muscle" else "right")
    for _, row in frame.iterrows():
        table.add_row(*[f"{v:.3g}" if isinstance(v, float) else str(v) for v in row])
    console.print(table)
    console.print("Moment arms by tendon excursion, r = -dL/dtheta: negative at the hip = extensor, positive at the "
                  "knee = flexor. Strain is relative to standing upright (hip 0, knee 0 deg).")
    if plot is not None:
        console.print(f"wrote {plot_moment_arms(plot, dims, hip_flexion, knee_flexion)}")


@app.command("analyze")
def analyze_cmd(
    trial: Path = typer.Argument(..., help="A C3D sprint trial."),
    markers: Optional[Path] = typer.Option(None, "--markers", help="TOML marker map (landmark = C3D label)."),
    body_mass: Optional[float] = typer.Option(None, "--body-mass", help="Body mass in kg (needed for forces and work)."),
    sex: str = typer.Option("male", "--sex", help="male or female (segment inertia, de Leva 1996)."),
    static: Optional[Path] = typer.Option(None, "--static", help="Static standing trial for calibration."),
    cutoff: Optional[float] = typer.Option(None, "--cutoff", help="Low-pass cutoff in Hz (default: residual analysis)."),
    out: Path = typer.Option(Path("reports/trial"), "--out", help="Output folder."),
    strict: bool = typer.Option(False, "--strict", help="Treat warnings (gaps, rejected strides, event "
                                "disagreements, ...) as errors: such a trial fails with the warning's code."),
) -> None:
    """Analyse one trial and write its strides.csv and curves.csv.

    Example: `hamstride analyze demo_trials/KT07/2026-03-02_testing/sprint_01.c3d --body-mass 74 --out reports/one`
    """
    from .batch import columns_csv
    from .io import atomic_write_text, read_c3d_isolated
    from .pipeline import AnalysisOptions, AthleteInfo, analyse_trial

    info = AthleteInfo(athlete=trial.parent.parent.name, session=trial.parent.name, body_mass_kg=body_mass,
                       sex="female" if sex.lower().startswith("f") else "male")
    try:
        for path in (trial, static):
            if path is not None:
                read_c3d_isolated(path)  # a native reader crash becomes an error message, not a dead process
        result = analyse_trial(trial, AnalysisOptions(cutoff_hz=cutoff, strict=strict), athlete=info, static_path=static,
                               markers=markers)
    except HamstrideError as exc:
        _fail(exc)
    atomic_write_text(out / "strides.csv", columns_csv(result.tables["strides"]))
    atomic_write_text(out / "curves.csv", columns_csv(result.tables["curves"]))
    n = result.info.get("n_strides", {})
    console.print(f"{trial.name}: {n.get('left', 0)} left and {n.get('right', 0)} right strides, "
                  f"speed {result.info['speed_m_s']:.2f} m/s, cutoff {result.info['cutoff_hz']:.1f} Hz "
                  f"({result.info['cutoff_method']}); wrote {out}/strides.csv and curves.csv")
    for warning in result.info.get("warnings", []):
        console.print(f"[yellow]note[/] {warning}", highlight=False)


@app.command("squad")
def squad_cmd(
    root: Path = typer.Argument(..., help="Squad folder: athletes.csv and ATHLETE/SESSION/*.c3d."),
    out: Path = typer.Option(Path("reports"), "--out", help="Output folder for tables and reports."),
    jobs: Optional[int] = typer.Option(None, "--jobs", min=1, help="Worker processes (default: all cores)."),
    markers: Optional[Path] = typer.Option(None, "--markers", help="TOML marker map (landmark = C3D label)."),
    config: Optional[Path] = typer.Option(None, "--config", help="TOML config; see `hamstride config`."),
    no_report: bool = typer.Option(False, "--no-report", help="Write tables only, no HTML/PDF reports."),
    strict: bool = typer.Option(False, "--strict", help="Treat warnings (gaps, rejected strides, event "
                                "disagreements, ...) as errors: such a trial fails with the warning's code."),
    cluster: Optional[str] = typer.Option(
        None, "--cluster", help="Send trials to an existing Dask cluster: scheduler address tcp://HOST:PORT or a "
                                "scheduler file (needs `pip install 'hamstride[cluster]'`; workers must see ROOT "
                                "at the same path). --jobs is then ignored."),
) -> None:
    """Analyse a whole squad: tables, flags, manifest and reports (the main job).

    Example: `hamstride squad demo_trials --out reports/`

    On a Dask cluster: `hamstride squad /shared/squad --out reports/ --cluster tcp://10.0.0.5:8786`

    Exit code 0 when every trial succeeded, 1 when some failed (listed at the end), 2 on usage errors.
    """
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

    from .batch import load_config, run_squad

    try:
        cfg = load_config(config, strict=True if strict else None)
    except HamstrideError as exc:
        _fail(exc, 2)
    with Progress(TextColumn("[bold]{task.description:<7}"), BarColumn(), MofNCompleteColumn(),
                  TextColumn("{task.fields[failed]}"), TimeElapsedColumn(), console=err_console,
                  transient=False) as bar:
        task = bar.add_task("trials", total=None, failed="")

        def progress(done: int, total: int, failed: int) -> None:
            bar.update(task, completed=done, total=total, failed=f"{failed} failed" if failed else "")

        reports: list = []

        def report_progress(done: int, total: int) -> None:  # one step per athlete while the reports are written
            if not reports:
                reports.append(bar.add_task("reports", total=total, failed="athletes"))
            bar.update(reports[0], completed=done, total=total)

        try:
            run = run_squad(root, out, jobs=jobs, markers=markers, config=cfg, report=not no_report,
                            progress=progress, cluster=cluster, report_progress=report_progress)
        except HamstrideError as exc:
            _fail(exc, 2)
    counts = run.manifest["counts"]
    console.print(f"{counts['trials']} trials ({run.analysed} analysed, {run.cached} from cache), "
                  f"{counts['ok']} ok, {counts['failed']} failed; {counts['strides']} strides; "
                  f"{counts['flags']} flags. Tables in {out}/" + (f", report {out}/index.html" if not no_report else ""))
    if run.failed:
        console.print("[bold red]failed trials:[/]")
        for rec in run.failed:
            console.print(f"  {rec['file']}: [{rec.get('code', 'error')}] {rec['reason']}", highlight=False)
        raise typer.Exit(1)


@app.command("timeline")
def timeline_cmd(
    root: Path = typer.Argument(..., help="Squad folder (as for `squad`)."),
    athlete: str = typer.Option(..., "--athlete", help="Athlete code, e.g. RB12."),
    out: Path = typer.Option(Path("reports"), "--out", help="Output folder (shares the squad cache)."),
    markers: Optional[Path] = typer.Option(None, "--markers", help="TOML marker map."),
    config: Optional[Path] = typer.Option(None, "--config", help="TOML config; see `hamstride config`."),
    jobs: Optional[int] = typer.Option(None, "--jobs", min=1, help="Worker processes (default: all cores)."),
) -> None:
    """Return-to-run timeline of one athlete across sessions (CSV, PNG and HTML).

    Example: `hamstride timeline demo_trials --athlete RB12 --out reports/`
    """
    from .batch import build_timeline, load_config, run_squad
    from .report import render_timeline

    try:
        cfg = load_config(config)
        run = run_squad(root, out, jobs=jobs, markers=markers, config=cfg, report=False, athlete_filter=athlete,
                        write_outputs=False)
    except HamstrideError as exc:
        _fail(exc, 2)
    timeline = build_timeline(run, athlete)
    if timeline.empty:
        err_console.print(f"no analysed sessions for athlete {athlete!r} under {root}", highlight=False)
        raise typer.Exit(1)
    row = run.athletes[run.athletes["athlete"] == athlete]
    info = row.iloc[0].to_dict() if not row.empty else None
    paths = render_timeline(out, timeline, athlete, info, {"configuration": cfg.as_dict()})
    console.print(f"timeline of {athlete}: {timeline['session'].nunique()} sessions; wrote "
                  + ", ".join(str(p) for p in paths))
    if run.failed:
        raise typer.Exit(1)


@app.command("config")
def config_cmd() -> None:
    """Print the default configuration (TOML) with a note on every setting.

    Example: `hamstride config > my_config.toml`, edit, then `hamstride squad ROOT --config my_config.toml`
    """
    from .batch import default_config_toml

    typer.echo(default_config_toml())


def main() -> None:  # pragma: no cover - console entry point helper
    app()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(app())
