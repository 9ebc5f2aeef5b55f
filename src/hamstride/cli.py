"""The `hamstride` command line: a thin typer layer over the Python API.

Exit codes: 0 success; 1 when some trials failed (each listed once); 2 on usage errors (bad arguments, missing or
invalid input files, invalid configuration: checked before any analysis, and nothing is written); 3 on an
unexpected internal error (one line on screen, the details in a log file it names). No traceback reaches the user.
Every message prints literally (codes in brackets and TOML section names such as [landmarks] stay visible).
"""
from __future__ import annotations

import os
import sys

# Parallelism is per trial (a process pool); BLAS threads inside each worker would only fight over the same cores
# (measured: the same wall time per trial at twice the CPU time). Set before numpy is first imported.
for _variable in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_variable, "1")
from pathlib import Path
from typing import Optional, Sequence

import typer
from rich.console import Console
from rich.table import Table
from rich.text import Text

from . import __version__
from .errors import ConfigError, HamstrideError
from .squadinput import HEIGHT_RANGE_M

EXIT_OK, EXIT_TRIALS_FAILED, EXIT_USAGE, EXIT_INTERNAL = 0, 1, 2, 3
# typer's own copy of click's exception classes (typer may vendor click, so `import click` would name other classes)
_CLICK_ERRORS = {cls.__name__: cls for cls in typer.BadParameter.__mro__}
_UsageError, _ClickException = _CLICK_ERRORS["UsageError"], _CLICK_ERRORS["ClickException"]

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    rich_markup_mode="markdown",
    pretty_exceptions_enable=False,
    help=(
        "Late-swing hamstring stretch, lengthening velocity and lengthening work of sprinters from C3D marker "
        "files.\n\n"
        "Example: `hamstride squad demo_trials --out reports/`\n\n"
        "Exit codes: 0 success, 1 some trials failed, 2 usage error (nothing analysed), 3 internal error.\n\n"
        "A screening and monitoring aid, not a diagnosis; decisions about an athlete's care belong to qualified "
        "clinicians and local practice."
    ),
)
console = Console(highlight=False)
err_console = Console(stderr=True, highlight=False)


def say(message: str, *, style: str = "", err: bool = False) -> None:
    """Print a message literally (never parsed as markup) on one logical line (no hard wrapping)."""
    (err_console if err else console).print(Text(message, style=style), soft_wrap=True)


def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _version_callback(value: bool) -> None:
    if value:
        say(f"hamstride {__version__}")
        raise typer.Exit(EXIT_OK)


@app.callback()
def _every_command(
    version: bool = typer.Option(False, "--version", is_eager=True, callback=_version_callback,
                                 help="Print the version and exit."),
) -> None:
    # Before any command: let this process reuse freed memory (batch.tune_allocator; no effect without glibc).
    from .squad.workers import tune_allocator

    tune_allocator()


def exit_code_of(exc: HamstrideError) -> int:
    """2 for a usage error (ConfigError: bad input files, configuration, arguments), 1 for a failed trial."""
    return EXIT_USAGE if isinstance(exc, ConfigError) else EXIT_TRIALS_FAILED


def _fail(exc: HamstrideError, code: int | None = None) -> None:
    say(f"error [{exc.code}] {_one_line(exc.message)}", style="bold red", err=True)
    raise typer.Exit(exit_code_of(exc) if code is None else code)


def _warn(message: str) -> None:
    say(f"warning {_one_line(message)}", style="yellow", err=True)


@app.command("landmarks")
def landmarks_cmd(
    trial: Path = typer.Argument(..., help="A C3D trial."),
    markers: Optional[Path] = typer.Option(None, "--markers", help="TOML marker map (landmark = C3D label)."),
    write_map: Optional[Path] = typer.Option(
        None, "--write-map", help="Write a marker map for this file's labels (best guess per landmark, other "
                                  "candidates in comments, unresolved ones as commented lines to fill in)."),
    overwrite: bool = typer.Option(False, "--overwrite", help="Let --write-map replace an existing file."),
    static: Optional[Path] = typer.Option(None, "--static", help="Static standing trial: landmarks missing in the "
                                          "trial are rebuilt from their segment's cluster, and shown as rebuilt."),
) -> None:
    """Show how each anatomical landmark resolved in a trial (label used, % valid frames), which were rebuilt from a
    static trial, and the window in which every required landmark is seen.

    Example: `hamstride landmarks demo_trials/KT07/2026-03-02_testing/sprint_01.c3d`

    Your lab's labels: `hamstride landmarks TRIAL.c3d --write-map my_markers.toml`, check the file, then pass
    `--markers my_markers.toml` to every command. Knee and ankle markers only in the static trial:
    `hamstride landmarks run_03.c3d --static static.c3d`.

    Exit code 0 when every required landmark resolves, 1 otherwise, 2 on usage errors.
    """
    from .atomic import atomic_write_text
    from .c3d import read_c3d_isolated
    from .numerics import finite_points
    from .landmarks import LandmarkError, load_marker_map, plain_name, resolve_landmarks, visible_window
    from .pipeline import landmarks_with_static
    from .segments import rebuilt_landmarks
    from .squadinput import check_marker_map, require_file

    try:
        require_file(trial, "trial")
        if write_map is not None:
            if markers is not None:
                raise ConfigError("use either --markers (an existing map) or --write-map (a new one), not both",
                                  code="usage")
            if write_map.is_dir():
                raise ConfigError(f"--write-map {write_map} is a folder; give a file name such as "
                                  f"{write_map / 'markers.toml'}", code="usage")
            if write_map.exists() and not overwrite:
                raise ConfigError(f"--write-map {write_map} already exists; choose another name or add --overwrite",
                                  code="usage")
        marker_map = check_marker_map(markers)
        data = read_c3d_isolated(trial)
        if static is not None:
            require_file(static, "static trial")
            read_c3d_isolated(static)
    except HamstrideError as exc:
        _fail(exc)
    if write_map is not None:
        from .mapwriter import map_toml, propose_map

        proposal = propose_map(data.labels)
        atomic_write_text(write_map, map_toml(proposal, trial.name, __version__))
        marker_map = load_marker_map(write_map)
        guessed = len(proposal.landmarks) - len(proposal.unresolved)
        say(f"wrote {write_map}: {guessed} of {len(proposal.landmarks)} landmarks guessed"
            + (f", to fill in: {', '.join(proposal.unresolved)}" if proposal.unresolved else "")
            + f". Check it, then use --markers {write_map}")
    rebuilt: dict[str, float] = {}
    try:
        lm, seen, _, _ = landmarks_with_static(data, marker_map, static)
        rebuilt = rebuilt_landmarks(seen, lm)
        problem = None
    except LandmarkError as exc:
        if exc.code == "several_subjects":  # no table can be shown until the map names the subject
            _fail(exc)
        problem = exc
        lm = seen = resolve_landmarks(data, marker_map, allow_missing=tuple(marker_map.landmarks))
    except HamstrideError as exc:
        _fail(exc)
    from .labframe import detect_lab_frame

    try:
        lab = detect_lab_frame(lm)
        axes = f"vertical {lab.vertical_axis}, travel {lab.travel_axis} (from {lab.travel_from})"
    except LandmarkError:
        axes = "lab axes unknown (pelvis or feet missing)"
    table = Table(title=Text(f"{trial.name}: {data.n_frames} frames at {data.rate_hz:g} Hz, {axes} "
                             f"({marker_map.source})"))
    table.add_column("landmark")
    table.add_column("label")
    table.add_column("valid frames %", justify="right")
    table.add_column("")
    n = max(data.n_frames, 1)
    for row in seen.report:
        status = "required" if row.required else "optional"
        label = row.label if row.label is not None else f"missing ({row.note})"
        valid = row.valid_pct
        if row.landmark in rebuilt:
            label = (f"{row.label}, gaps rebuilt from the static trial" if row.label is not None
                     else "rebuilt from the static trial")
            valid = 100.0 * finite_points(lm.points[row.landmark]).sum() / n
        style = "red" if row.label is None and row.landmark not in rebuilt else ""
        table.add_row(Text(plain_name(row.landmark)), Text(label, style=style), f"{valid:.0f}", status)
    console.print(table)
    if static is not None:
        names = ", ".join(f"{plain_name(k)} ({v:.0f}% of frames)" for k, v in rebuilt.items()) or "none"
        say(f"rebuilt from {static.name}: {names}")
    if problem is None:
        window = visible_window(lm)
        where = "the whole trial" if window.whole else window.describe()
        say(f"every required landmark seen: {where}")
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
    say(f"wrote {len(paths)} files under {directory}")


@app.command("muscles")
def muscles_cmd(
    hip_flexion: float = typer.Option(0.0, "--hip-flexion", min=-40.0, max=140.0,
                                      help="Hip flexion in degrees (-40 to 140)."),
    knee_flexion: float = typer.Option(0.0, "--knee-flexion", min=-10.0, max=160.0,
                                       help="Knee flexion in degrees (-10 to 160)."),
    height: float = typer.Option(1.80, "--height", min=HEIGHT_RANGE_M[0], max=HEIGHT_RANGE_M[1],
                                 help="Athlete height in metres (scales the model; 1.2 to 2.3)."),
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
    say("Moment arms by tendon excursion, r = -dL/dtheta: negative at the hip = extensor, positive at the "
        "knee = flexor. Strain is relative to standing upright (hip 0, knee 0 deg).")
    if plot is not None:
        say(f"wrote {plot_moment_arms(plot, dims, hip_flexion, knee_flexion)}")


def _squad_of(trial: Path) -> Path | None:
    """The squad folder around a trial (ROOT/athletes.csv, ROOT/ATHLETE/YYYY-MM-DD_name/trial.c3d), or None."""
    from .squadinput import session_date

    session_dir = trial.resolve().parent
    root = session_dir.parent.parent
    return root if session_date(session_dir.name) is not None and (root / "athletes.csv").is_file() else None


def _trial_athlete(trial: Path, subject: object, athlete: str | None, session: str | None, athletes):
    """Athlete code, session name and athletes.csv row (or None) of a single trial: the options; else, inside a
    squad folder (``athletes``: its athletes.csv, else None), the folder names and that athlete's row; else the
    C3D subject name and the file name. Unrelated parent folders never name anything."""
    if athletes is None:
        named = str(subject).strip() if subject is not None and str(subject).strip() else trial.stem
        return athlete or named, session or trial.stem, None
    folder = trial.resolve().parent
    code = athlete or folder.parent.name
    rows = athletes[athletes["athlete"].str.lower() == code.lower()]
    row = rows.iloc[0].to_dict() if not rows.empty else None
    return (row["athlete"] if row else code), session or folder.name, row


@app.command("analyze")
def analyze_cmd(
    trial: Path = typer.Argument(..., help="A C3D sprint trial."),
    markers: Optional[Path] = typer.Option(None, "--markers", help="TOML marker map (landmark = C3D label)."),
    body_mass: Optional[float] = typer.Option(None, "--body-mass", help="Body mass in kg (needed for forces and work; "
                                              "default: athletes.csv inside a squad folder, else the C3D file)."),
    sex: Optional[str] = typer.Option(None, "--sex", help="male or female (segment inertia, de Leva 1996; "
                                      "default: athletes.csv inside a squad folder, else male)."),
    static: Optional[Path] = typer.Option(None, "--static", help="Static standing trial for calibration."),
    cutoff: Optional[float] = typer.Option(None, "--cutoff", help="Low-pass cutoff in Hz (default: residual analysis)."),
    config: Optional[Path] = typer.Option(None, "--config", help="TOML config; see `hamstride config`."),
    athlete: Optional[str] = typer.Option(None, "--athlete", help="Athlete code for the tables (default: the squad "
                                          "folder, else the C3D subject name, else the file name)."),
    session: Optional[str] = typer.Option(None, "--session", help="Session name for the tables (default: the squad "
                                          "session folder, else the file name)."),
    out: Path = typer.Option(Path("reports/trial"), "--out", help="Output folder."),
    strict: bool = typer.Option(False, "--strict", help="Treat warnings (gaps, rejected strides, event "
                                "disagreements, ...) as errors: such a trial fails with the warning's code."),
) -> None:
    """Analyse one trial and write its strides.csv and curves.csv.

    Example: `hamstride analyze demo_trials/KT07/2026-03-02_testing/sprint_01.c3d --body-mass 74 --out reports/one`

    Exit code 0 when the trial was analysed, 1 when it failed, 2 on usage errors.
    """
    from .atomic import atomic_write_text
    from .c3d import read_c3d_isolated
    from .squad.export import columns_csv
    from .pipeline import AthleteInfo, analyse_trial
    from .settings import load_config, settings_of
    from .squadinput import BODY_MASS_RANGE_KG, SEXES, check_marker_map, read_athletes, require_file

    try:  # every input first: a usage error writes nothing
        require_file(trial, "trial")
        if static is not None:
            require_file(static, "static trial")
        check_marker_map(markers)
        if cutoff is not None:
            settings_of("analysis")["cutoff_hz"].check(cutoff, "--cutoff")
        cfg = load_config(config, cutoff_hz=cutoff, strict=True if strict else None)
        if body_mass is not None and not BODY_MASS_RANGE_KG[0] <= body_mass <= BODY_MASS_RANGE_KG[1]:
            raise ConfigError(f"--body-mass {body_mass:g}: expected kg between {BODY_MASS_RANGE_KG[0]:g} and "
                              f"{BODY_MASS_RANGE_KG[1]:g}", code="usage")
        if sex is not None and sex.strip().lower() not in SEXES:
            raise ConfigError(f"--sex {sex}: expected male or female", code="usage")
        if out.exists() and not out.is_dir():
            raise ConfigError(f"--out {out} is a file; give a folder", code="usage")
        squad = _squad_of(trial)
        athletes = read_athletes(squad / "athletes.csv") if squad is not None else None
    except HamstrideError as exc:
        _fail(exc)
    try:
        data = read_c3d_isolated(trial)  # a native reader crash becomes an error message, not a dead process
        if static is not None:
            read_c3d_isolated(static)
        athlete_code, session_name, row = _trial_athlete(trial, data.meta.get("subject"), athlete, session,
                                                            athletes)
        known = {} if row is None else {k: row[k] for k in ("body_mass_kg", "height_m") if row[k] == row[k]}
        info = AthleteInfo(athlete=athlete_code, session=session_name,
                           body_mass_kg=body_mass if body_mass is not None else known.get("body_mass_kg"),
                           height_m=known.get("height_m"),
                           sex=SEXES[sex.strip().lower()] if sex is not None else (row or {}).get("sex", "male"))
        result = analyse_trial(trial, cfg.analysis, athlete=info, static_path=static, markers=markers)
    except HamstrideError as exc:
        _fail(exc, EXIT_TRIALS_FAILED)
    atomic_write_text(out / "strides.csv", columns_csv(result.tables["strides"]))
    atomic_write_text(out / "curves.csv", columns_csv(result.tables["curves"]))
    n = result.info.get("n_strides", {})
    say(f"{trial.name} (athlete {athlete_code}, session {session_name}): {n.get('left', 0)} left and "
        f"{n.get('right', 0)} right strides, speed {result.info['speed_m_s']:.2f} m/s, cutoff "
        f"{result.info['cutoff_hz']:.1f} Hz ({result.info['cutoff_method']}); wrote {out}/strides.csv and curves.csv")
    say(f"analysed window {result.info['window_start_s']:.2f}-{result.info['window_end_s']:.2f} s "
        f"({result.info['window_duration_s']:.2f} s: every required landmark seen)")
    if result.info.get("rebuilt_landmarks"):
        rebuilt = ", ".join(f"{name.replace('_', ' ')} ({pct:.0f}% of frames)"
                            for name, pct in result.info["rebuilt_landmarks"].items())
        say(f"rebuilt from the static trial: {rebuilt}")
    plates = result.info.get("force_plates")
    if plates:
        offsets = plates["marker_offset_from_plates"]
        parts = [f"{label} {o['median']:+.1f} ms (5-95 %: {o['p5']:+.1f} to {o['p95']:+.1f}, n={o['n']})"
                 for label, o in (("foot strike", offsets["foot_strike_ms"]), ("toe-off", offsets["toe_off_ms"]))
                 if o["n"]]
        say(f"force plates: {plates['n_plate_contacts']} contact(s) timed by {plates['n_plates']} plate(s); "
            "marker rule minus plates: " + ("; ".join(parts) if parts else "no contact seen by both"))
    for warning in result.info.get("warnings", []):
        say(f"note {_one_line(warning)}", style="yellow")


def _check_squad_inputs(root: Path, out: Path, markers: Optional[Path], config: Optional[Path],
                        allow_unlisted: bool, **overrides):
    """Configuration, marker map and squad folder, checked before anything runs; warnings printed once."""
    from .squad.discovery import discover_squad
    from .settings import load_config
    from .squadinput import check_marker_map

    cfg = load_config(config, **overrides)
    check_marker_map(markers)
    if out.exists() and not out.is_dir():
        raise ConfigError(f"--out {out} is a file; give a folder", code="usage")
    layout, _ = discover_squad(root, markers, allow_unlisted=allow_unlisted, exclude=(out,))
    for warning in layout.warnings:
        _warn(warning)
    return cfg, layout


_ALLOW_UNLISTED = typer.Option(False, "--allow-unlisted", help="Also analyse athlete folders that athletes.csv does "
                               "not list (without body data); by default they are skipped with a warning.")


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
    allow_unlisted: bool = _ALLOW_UNLISTED,
    cluster: Optional[str] = typer.Option(
        None, "--cluster", help="Send trials to an existing Dask cluster: scheduler address tcp://HOST:PORT or a "
                                "scheduler file (needs `pip install 'hamstride[cluster]'`; workers must see ROOT "
                                "at the same path). --jobs is then ignored."),
) -> None:
    """Analyse a whole squad: tables, flags, manifest and reports (the main job).

    Example: `hamstride squad demo_trials --out reports/`

    On a Dask cluster: `hamstride squad /shared/squad --out reports/ --cluster tcp://10.0.0.5:8786`

    Exit code 0 when every trial succeeded, 1 when some failed (listed at the end), 2 on usage errors (checked
    before any trial is analysed).
    """
    # Workers fork from this process once it has loaded the stages (a forkserver was measured and not kept:
    # DEVELOPERS.md, "Start-up").
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn

    from .squad.run import run_squad

    try:
        cfg, _ = _check_squad_inputs(root, out, markers, config, allow_unlisted, strict=True if strict else None)
    except HamstrideError as exc:
        _fail(exc, EXIT_USAGE)
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
                            progress=progress, cluster=cluster, allow_unlisted=allow_unlisted,
                            report_progress=report_progress)
        except HamstrideError as exc:
            _fail(exc, EXIT_USAGE)
    counts = run.manifest["counts"]
    say(f"{counts['trials']} trials ({run.analysed} analysed, {run.cached} from cache), "
        f"{counts['ok']} ok, {counts['failed']} failed; {counts['strides']} strides; "
        f"{counts['flags']} flags. Tables in {out}/" + (f", report {out}/index.html" if not no_report else ""))
    if run.failed:
        _list_failed(run.failed)
        raise typer.Exit(EXIT_TRIALS_FAILED)


def _list_failed(failed: Sequence[dict]) -> None:
    say(f"failed trials ({len(failed)}):", style="bold red")
    for rec in failed:
        say(f"  {rec['file']}: [{rec.get('code', 'error')}] {_one_line(rec['reason'])}")


@app.command("timeline")
def timeline_cmd(
    root: Path = typer.Argument(..., help="Squad folder (as for `squad`)."),
    athlete: str = typer.Option(..., "--athlete", help="Athlete code, e.g. RB12 (letter case does not matter)."),
    out: Path = typer.Option(Path("reports"), "--out", help="Output folder (shares the squad cache)."),
    markers: Optional[Path] = typer.Option(None, "--markers", help="TOML marker map."),
    config: Optional[Path] = typer.Option(None, "--config", help="TOML config; see `hamstride config`."),
    jobs: Optional[int] = typer.Option(None, "--jobs", min=1, help="Worker processes (default: all cores)."),
    allow_unlisted: bool = _ALLOW_UNLISTED,
) -> None:
    """Return-to-run timeline of one athlete across sessions (CSV, PNG and HTML).

    Example: `hamstride timeline demo_trials --athlete RB12 --out reports/`

    Exit code 0 when the timeline was written, 1 when trials failed (listed), 2 on usage errors (e.g. an unknown
    athlete: the known codes are listed).
    """
    from .squad.run import run_squad
    from .squad.timeline import build_timeline
    from .report import render_timeline
    from .squadinput import match_athlete

    try:
        cfg, layout = _check_squad_inputs(root, out, markers, config, allow_unlisted)
        code = match_athlete(athlete, layout.athlete_codes(), root, layout.athletes["athlete"])
        run = run_squad(root, out, jobs=jobs, markers=markers, config=cfg, report=False, athlete_filter=code,
                        write_outputs=False, allow_unlisted=allow_unlisted)
    except HamstrideError as exc:
        _fail(exc, EXIT_USAGE)
    timeline = build_timeline(run, code)
    if timeline.empty:
        say(f"error [no_sessions] no session of athlete {code} under {root} could be analysed", style="bold red",
            err=True)
        _list_failed(run.failed)
        raise typer.Exit(EXIT_TRIALS_FAILED)
    row = run.athletes[run.athletes["athlete"] == code]
    info = row.iloc[0].to_dict() if not row.empty else None
    paths = render_timeline(out, timeline, code, info, {"configuration": cfg.as_dict()})
    say(f"timeline of {code}: {timeline['session'].nunique()} sessions; wrote " + ", ".join(str(p) for p in paths))
    if run.failed:
        _list_failed(run.failed)
        raise typer.Exit(EXIT_TRIALS_FAILED)


@app.command("config")
def config_cmd() -> None:
    """Print every key --config accepts, as TOML: what it does, type, range, default and source.

    Example: `hamstride config > my_config.toml`, edit, then `hamstride squad ROOT --config my_config.toml`
    """
    from .settings import config_toml

    typer.echo(config_toml())


def _log_unexpected(exc: BaseException) -> Path | None:
    """Write the details of an unexpected error to a log file; its path (None when even that fails)."""
    import datetime as dt
    import platform
    import tempfile
    import traceback

    folder = Path(os.environ.get("HAMSTRIDE_LOG_DIR") or Path(tempfile.gettempdir()) / "hamstride-logs")
    try:
        from .atomic import atomic_write_text

        path = folder / f"hamstride-{dt.datetime.now():%Y%m%d-%H%M%S}-{os.getpid()}.log"
        details = (f"hamstride {__version__}, Python {platform.python_version()}, {platform.platform()}\n"
                   f"command: {' '.join(sys.argv)}\n\n"
                   + "".join(traceback.format_exception(type(exc), exc, exc.__traceback__)))
        return atomic_write_text(path, details)
    except Exception:  # noqa: BLE001 - the log is a courtesy; the one-line message must still reach the user
        return None


def main(argv: Sequence[str] | None = None) -> int:
    """The `hamstride` command; returns the exit code (0 ok, 1 trials failed, 2 usage error, 3 internal error).

    Usage errors print one line (not a box), and an unexpected error prints one line and the path of a log file
    with the traceback: nothing else reaches the user. Library warnings (e.g. numpy's "Mean of empty slice") are
    not shown unless asked for with ``python -W`` / ``PYTHONWARNINGS`` (the idiom of the warnings module's docs).
    """
    if not sys.warnoptions:
        import warnings

        warnings.simplefilter("ignore")  # forked pool workers inherit it
    try:
        result = app(args=list(argv) if argv is not None else None, prog_name="hamstride", standalone_mode=False)
        return result if isinstance(result, int) else EXIT_OK
    except _UsageError as exc:
        if type(exc).__name__ == "NoArgsIsHelpError":  # `hamstride` alone: typer has printed the help text
            return EXIT_USAGE
        command = exc.ctx.command_path if exc.ctx is not None else "hamstride"
        say(f"error [usage] {command}: {_one_line(exc.format_message())} (see {command} --help)", style="bold red",
            err=True)
        return EXIT_USAGE
    except _ClickException as exc:
        say(f"error [usage] {_one_line(exc.format_message())}", style="bold red", err=True)
        return EXIT_USAGE
    except typer.Abort:
        say("aborted", err=True)
        return 130
    except OSError as exc:  # a file or folder given on the command line cannot be written or read
        where = f"{exc.filename}: " if exc.filename else ""
        say(f"error [file_access] cannot use {where}{exc.strerror or exc}; check the path and its permissions",
            style="bold red", err=True)
        return EXIT_USAGE
    except HamstrideError as exc:  # raised outside a command's own handling
        say(f"error [{exc.code}] {_one_line(exc.message)}", style="bold red", err=True)
        return exit_code_of(exc)
    except Exception as exc:  # noqa: BLE001 - a bug: one line and a log file, never a traceback
        log = _log_unexpected(exc)
        where = f"; details in {log}" if log is not None else ""
        say(f"error [internal_error] unexpected {type(exc).__name__}: {_one_line(str(exc))[:300]} (a bug in "
            f"hamstride {__version__}{where})", style="bold red", err=True)
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
