"""Command line: a thin typer layer over the library functions.

Heavy imports happen inside the commands so that ``predictor --help`` is
instant. Domain errors (:class:`~predictor.errors.PredictorError`) become one
line on stderr and exit code 2; anything else is a bug and keeps its traceback.
"""

from __future__ import annotations

import functools
from pathlib import Path
from typing import Annotated

import typer

from predictor.cautions import CAUTION
from predictor.errors import DataError, PredictorError

app = typer.Typer(
    help="Forecast longitudinal brain-MRI change on a CPU. " + CAUTION,
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


@app.callback()
def root() -> None:
    """Forecast longitudinal brain-MRI change on a CPU (research use only)."""


def reports_errors(command):
    """Turn domain errors raised by ``command`` into one line on stderr and exit code 2."""

    @functools.wraps(command)
    def wrapper(*args, **kwargs):
        try:
            return command(*args, **kwargs)
        except PredictorError as error:
            typer.echo(f"predictor: error: {error}", err=True)
            raise typer.Exit(2) from None

    return wrapper


def progress_bar(description: str, total: int):
    """A rich progress bar on stderr; use as a context manager, call ``advance(n)``."""
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeElapsedColumn

    progress = Progress(
        "[progress.description]{task.description}",
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        console=Console(stderr=True),
        transient=False,
    )
    task = progress.add_task(description, total=total)
    return progress, lambda n=1: progress.advance(task, n)


def later_line(progress, description: str):
    """A count on a new line of ``progress`` for a later stage: the line appears at the
    first call of the returned ``advance(n)``, and the lines of the stages before it are
    finished then (:func:`finish_lines`)."""
    task = []

    def advance(n=1):
        if not task:
            finish_lines(progress)
            task.append(progress.add_task(description, total=None))
        progress.advance(task[0], n)

    return advance


def finish_lines(progress) -> None:
    """Mark every line of ``progress`` without a total as done (its count becomes its
    total; its clock stops)."""
    for task in progress.tasks:
        if task.total is None:
            progress.update(task.id, total=task.completed)


@app.command()
@reports_errors
def phantoms(
    out: Annotated[Path, typer.Argument(help="Folder for the BIDS phantom cohort (new or empty).")],
    participants: Annotated[
        int | None,
        typer.Option(min=1, help="Number of participants [default: the scenario's, 40]."),
    ] = None,
    size: Annotated[
        str,
        typer.Option(help="'tiny' (4 mm voxels, for tests) or 'demo' (2 mm, adult volumes in mL)."),
    ] = "tiny",
    seed: Annotated[int, typer.Option(help="Seed; the same seed gives the same bytes.")] = 0,
    scenario: Annotated[
        str | None,
        typer.Option(
            help="A shipped scenario (memory_clinic, no_individual_signal) or a scenario "
            "TOML file [default: memory_clinic]."
        ),
    ] = None,
    jobs: Annotated[int, typer.Option(min=1, help="Parallel worker processes.")] = 1,
    force: Annotated[bool, typer.Option(help="Write into a non-empty folder.")] = False,
) -> None:
    """Generate a synthetic BIDS cohort of T1w phantoms with ground truth.

    Ages in years, visits about yearly for 2-5 years, volumes in mL. Ground
    truth (label maps, true volumes, each participant's annual rates in % per
    year, and the best forecast from baseline) goes to OUT/derivatives/.
    """
    from predictor.phantoms.generate import generate_cohort
    from predictor.phantoms.scenario import Scenario

    count = participants or int(Scenario.from_toml(scenario).cohort["participants"])
    progress, advance = progress_bar("phantom participants", count)
    with progress:
        generate_cohort(out, count, size, seed, scenario, jobs, force, progress=advance)
    typer.echo(f"wrote {count} participants to {out}; ground truth in {out / 'derivatives'}")
    typer.echo("Synthetic phantoms: invented anatomy, not images of any person.")


AllowOutsideOption = Annotated[
    bool, typer.Option(help="Accept image paths outside the cohort folder.")
]
TemplateOption = Annotated[
    str,
    typer.Option(
        help="'mni152' (nilearn's MNI152 2009a, offline) or a template folder, "
        "e.g. a phantom cohort's derivatives/phantom-template."
    ),
]
RegionsOption = Annotated[
    Path | None,
    typer.Option(
        help="Regions TOML laid over configs/regions.toml (new regions are added; "
        "volumes in mL)."
    ),
]
SettingsOption = Annotated[
    Path | None,
    typer.Option(
        "--settings",
        help="Comparison TOML laid over configs/compare.toml: primary endpoint, CI level, "
        "observed change, conformal horizon bands (years).",
    ),
]
CohortConfigOption = Annotated[
    Path | None,
    typer.Option(help="Cohort coding TOML (diagnosis labels, sex codes, ages in years) laid "
                 "over configs/cohort.toml."),
]


@app.command()
@reports_errors
def prepare(
    cohort: Annotated[Path, typer.Argument(help="BIDS folder or TSV/CSV cohort table.")],
    work: Annotated[Path, typer.Argument(help="Workspace folder (created; reused as a cache).")],
    jobs: Annotated[int, typer.Option(min=1, help="Scans prepared in parallel.")] = 1,
    grid_mm: Annotated[
        float | None, typer.Option(help="Working-grid voxel side in mm (2-4) [default: 3].")
    ] = None,
    template: TemplateOption = "mni152",
    shard: Annotated[
        str | None,
        typer.Option(help="Prepare only part K of N (e.g. 3/10), for cluster array jobs."),
    ] = None,
    allow_outside: AllowOutsideOption = False,
    config: Annotated[
        Path | None, typer.Option(help="Settings TOML laid over configs/prepare.toml.")
    ] = None,
    regions: RegionsOption = None,
    cohort_config: CohortConfigOption = None,
    covariates: Annotated[
        Path | None,
        typer.Option(
            help="TOML of [covariates.NAME] tables (kind numeric with unit and range, or "
            "categorical with levels; missing = true/false) read from the cohort's columns, "
            "laid over the cohort coding's."
        ),
    ] = None,
) -> None:
    """Preprocess, segment and measure every scan of a cohort into WORK.

    Per scan: N4 bias correction, affine registration to the template, brain
    mask, intensity normalisation (white matter = 1), GM/WM/CSF segmentation in
    the scan's own space, regional volumes in mL and % of total brain volume,
    and the scan resampled onto the working grid (mm) for training. Unchanged
    scans are taken from the cache. Failed scans are listed in WORK/failures.tsv.
    A same-day rescan (BIDS run-2, or a table's 'rescan' column) is measured
    against its scan: the change measurement's noise floor (WORK/rescans.tsv).
    """
    from predictor.cohort import read_cohort
    from predictor.config import CohortSettings
    from predictor.prepare import PrepareSettings, parse_shard, prepare_cohort, scan_count
    from predictor.regions import RegionSet

    coding = CohortSettings.from_toml(cohort_config, covariates)
    region_set = RegionSet.from_toml(regions)
    table = read_cohort(cohort, settings=coding, allow_outside=allow_outside)
    settings = PrepareSettings.from_toml(config, grid_mm=grid_mm)
    part = parse_shard(shard)
    total = scan_count(table) if part[1] == 1 else None
    progress, advance = progress_bar("preparing scans", total)
    with progress:
        summary = prepare_cohort(
            table, work, template, settings, jobs, part, advance, region_set, coding,
            progress_pairs=later_line(progress, "measuring change (visit pairs, rescans)"),
            progress_subjects=later_line(progress, "participants in one space"),
        )
        finish_lines(progress)
    typer.echo(
        f"{summary['prepared']} prepared, {summary['cached']} from cache, "
        f"{summary['failed']} failed; volumes in {work / 'volumes.tsv'}"
    )
    if summary.get("rescans"):
        from predictor.longitudinal import noise_floor
        from predictor.workspace import Layout

        floor = noise_floor(Layout(work), region_set)
        typer.echo(
            f"scan-rescan noise floor, median change and |change| (% of the region) over "
            f"{summary['rescans']} same-day rescan(s) ({work / 'rescans.tsv'}):"
        )
        shown = ["region", "median_pct_registration", "median_abs_pct_registration",
                 "median_abs_pct_segmentation"]  # fmt: skip
        typer.echo(floor[shown].round(3).to_string(index=False))
    if summary["failed"]:
        typer.echo(
            f"predictor: {summary['failed']} scan(s) failed; reasons in {work / 'failures.tsv'}",
            err=True,
        )
        raise typer.Exit(1)


@app.command()
@reports_errors
def volumes(
    source: Annotated[Path, typer.Argument(help="A prepared WORK folder or one NIfTI scan.")],
    template: TemplateOption = "mni152",
    regions: RegionsOption = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print JSON instead of a table.")] = False,
) -> None:
    """Regional volumes: one row per scan, each region in mL and as % of total brain volume."""
    import json

    import pandas as pd

    from predictor.prepare import PrepareSettings, cached_template, prepare_scan, workspace_volumes
    from predictor.preprocess import single_threaded_itk
    from predictor.regions import RegionSet
    from predictor.volumes import percent_of_brain

    if source.is_dir():
        table = workspace_volumes(source)
    else:
        from predictor.nifti import load_scan

        scan = load_scan(source)
        single_threaded_itk()
        loaded = cached_template(template, RegionSet.from_toml(regions))
        measured = prepare_scan(scan, loaded, PrepareSettings.from_toml())
        table = pd.DataFrame(
            [{"image": scan.name} | measured.volumes | percent_of_brain(measured.volumes)]
        )
    if as_json:
        typer.echo(json.dumps(json_records(table), indent=2))
    else:
        typer.echo(table.round(3).to_string(index=False))


@app.command()
@reports_errors
def train(
    work: Annotated[Path, typer.Argument(help="A prepared workspace (predictor prepare).")],
    model: Annotated[Path, typer.Argument(help="Model folder to write (weights, model.json).")],
    config: Annotated[
        Path | None,
        typer.Option(help="Training TOML [configs/train.toml]; configs/train-tiny.toml for tests."),
    ] = None,
    epochs: Annotated[
        int | None, typer.Option(min=1, help="Total epochs [default: the config's].")
    ] = None,
    resume: Annotated[
        bool, typer.Option(help="Continue from MODEL's last checkpoint (same seed, same result).")
    ] = False,
    seed: Annotated[int | None, typer.Option(help="Seed [default: the config's].")] = None,
    force: Annotated[bool, typer.Option(help="Start over in a MODEL folder holding one.")] = False,
    members: Annotated[
        int,
        typer.Option(min=1, help="Ensemble members K (seeds S..S+K-1, each on a bootstrap of "
                     "the training participants); K > 1 gives forecasts a spread."),
    ] = 1,
    member: Annotated[
        int | None,
        typer.Option(min=1, help="Train only member k of --members K (a cluster array task)."),
    ] = None,
) -> None:
    """Train the conditional velocity-field network on a CPU.

    Participants are split 80/10/10 (train/validation/test, seeded; every test
    participant has a follow-up 2 years or more after baseline). Every
    earlier -> later visit pair of the training participants is a sample; the
    network predicts an annualised velocity field (working-grid voxels per
    year) whose exponential over the interval (years) warps the baseline.
    A checkpoint is written every epoch; the best epoch's weights are kept.
    Under torchrun (gloo backend) the work is shared by the processes. With
    --members K, MODEL holds K members (member-1 ... member-K) that share the
    validation and test participants; calibrate their intervals with
    predictor calibrate.
    """
    from predictor.ensemble import train_members
    from predictor.training import TrainConfig

    settings = TrainConfig.from_toml(config)
    total = epochs or settings.training.epochs
    progress, _ = progress_bar("training", None)
    task = progress.task_ids[0]

    def on_step(epoch, step, steps, terms):
        progress.update(
            task,
            total=total * steps,
            completed=epoch * steps + step,
            description=f"epoch {epoch + 1}/{total} loss {terms['total']:.3g} "
            f"(sim {terms['similarity']:.2g}, prior {terms['prior']:.2g})",
        )

    def on_epoch(row):
        if "val_volume_error" in row:
            progress.console.print(
                f"epoch {row['epoch']}: validation loss {row['val_total']:.4g}, volume error "
                f"{row['val_volume_error']:.3f} % of brain (no change: "
                f"{row['val_volume_error_no_change']:.3f}), {row['seconds']:.0f} s"
            )

    with progress:
        last = train_members(work, model, settings, members, seed, None, resume, force, member,
                             epochs, on_step=on_step, on_epoch=on_epoch)  # fmt: skip
    held = "member-k/" if members > 1 else ""
    typer.echo(f"model in {model} ({held}weights.pt, model.json, log.tsv, loss_curves.png)")
    if last:
        typer.echo(f"last epoch {last['epoch']}: training loss {last['train_total']:.4g}")
    typer.echo(CAUTION)


YearsOption = Annotated[
    list[float],
    typer.Option(help="Forecast horizons in years after the baseline scan, e.g. --years 1 2 5."),
]


@app.command()
@reports_errors
def forecast(
    model: Annotated[Path, typer.Argument(help="A trained model folder (predictor train).")],
    scan: Annotated[
        Path | None, typer.Argument(help="One baseline T1w NIfTI (or use --cohort).")
    ] = None,
    out: Annotated[Path, typer.Option(help="Output folder (BIDS derivatives layout).")] = Path(
        "forecasts"
    ),
    years: YearsOption = [1.0, 2.0, 5.0],  # noqa: B006 (typer needs a list default)
    age: Annotated[float | None, typer.Option(help="Age at the scan, years.")] = None,
    sex: Annotated[str | None, typer.Option(help="Sex code (configs/cohort.toml).")] = None,
    diagnosis: Annotated[
        str | None, typer.Option(help="Diagnosis label (configs/cohort.toml), e.g. CN, MCI, AD.")
    ] = None,
    covariate: Annotated[
        list[str] | None,
        typer.Option(
            help="NAME=VALUE of a covariate the model was trained with, at the scan (in its "
            "declared unit or level; n/a where it may be missing). Repeat for each."
        ),
    ] = None,
    cohort: Annotated[
        Path | None, typer.Option(help="BIDS folder or cohort table: forecast every participant.")
    ] = None,
    session: Annotated[
        str | None, typer.Option(help="With --cohort: this session instead of each baseline.")
    ] = None,
    jobs: Annotated[int, typer.Option(min=1, help="Scans forecast in parallel.")] = 1,
    allow_outside: AllowOutsideOption = False,
    as_json: Annotated[bool, typer.Option("--json", help="Print the volumes as JSON.")] = False,
) -> None:
    """Forecast follow-up scans, log-Jacobian atrophy maps and regional volumes (mL).

    For each horizon (years): the forecast scan in the input's own space and
    resolution, its log-Jacobian map (log volume ratio, < 0 = shrinkage), the
    displacement field (RAS mm), an overview PNG, and a table of regional
    volumes (mL; change in mL and % per year) from the network and from the
    mixed-effects prior with its 90% interval. A model trained with covariates needs
    each as --covariate NAME=VALUE (or a column of the --cohort table). A rerun skips
    complete scans.
    """
    import json

    import pandas as pd

    from predictor.forecast_io import VOLUMES, forecast_cohort, forecast_one, scan_stem
    from predictor.modelstore import member_folders, read_model_json

    # the codes and covariates the model (its first member) was trained with
    coding = read_model_json(member_folders(model)[0]).coding
    if cohort is not None:
        from predictor.cohort import read_cohort

        if covariate:
            raise typer.BadParameter("with --cohort, covariates come from the cohort's columns")
        table = read_cohort(cohort, settings=coding, allow_outside=allow_outside)
        count = table["participant_id"].nunique() if session is None else None
        progress, advance = progress_bar("forecasting", count)
        with progress:
            summary = forecast_cohort(model, table, out, years, session, jobs, advance)
        typer.echo(
            f"{summary['forecast']} forecast, {summary['skipped']} already complete, "
            f"{summary['failed']} failed; volumes of all in {out / 'forecasts.tsv'}"
        )
        typer.echo(CAUTION)
        if summary["failed"]:
            typer.echo(
                f"predictor: {summary['failed']} scan(s) failed; reasons in "
                f"{out / 'failures.tsv'}",
                err=True,
            )
            raise typer.Exit(1)
        return
    missing = [name for name, v in (("--age", age), ("--sex", sex), ("--diagnosis", diagnosis))
               if v is None]  # fmt: skip
    if scan is None or missing:
        raise typer.BadParameter(
            "give SCAN with --age, --sex and --diagnosis, or --cohort"
            + (f" (missing {', '.join(missing)})" if scan is not None else "")
        )
    from predictor.covariates import assignments

    values = assignments(covariate or [])
    provenance, skipped = forecast_one(
        model, scan, age, sex, diagnosis, years, out, covariates=values
    )
    table = pd.read_csv(out / f"{scan_stem(scan.name)}_{VOLUMES}", sep="\t")
    if as_json:
        typer.echo(json.dumps(json_records(table), indent=2))
    else:
        shown = table[table["years"] > 0][
            ["region", "years", "baseline_ml", "network_ml", "network_percent_per_year",
             "prior_lower_ml", "prior_upper_ml"]
        ]  # fmt: skip
        typer.echo(shown.round(2).to_string(index=False))
        typer.echo(f"{'already complete; ' if skipped else ''}outputs in {out}")
    for warning in provenance["warnings"]:
        typer.echo(f"warning: {warning}", err=True)
    typer.echo(CAUTION, err=as_json)


@app.command()
@reports_errors
def compare(
    model: Annotated[Path, typer.Argument(help="A trained model folder (predictor train).")],
    work: Annotated[Path, typer.Argument(help="The prepared workspace the model was trained on.")],
    out: Annotated[Path, typer.Argument(help="Report folder (HTML, TSV, PNG).")],
    jobs: Annotated[int, typer.Option(min=1, help="Participants processed in parallel.")] = 1,
    seed: Annotated[int, typer.Option(help="Seed of the bootstrap and conformal splits.")] = 0,
    population: Annotated[
        Path | None,
        typer.Option(
            help="A population-field model (trained with image_input = \"template\" on the "
            "same workspace and seed): the comparator for subject-specific skill."
        ),
    ] = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print the verdicts as JSON.")] = False,
    settings: SettingsOption = None,
) -> None:
    """Compare the network with the regression forecasters on held-out participants.

    The model's test participants (its saved split) are forecast from their
    baseline to every follow-up; the regressions are refitted on the training
    participants only. Errors are in % of total brain volume (headline), % of
    the region and mL; the report (report.html, TSVs, PNGs) goes to OUT.
    """
    import json

    from predictor.compare import CompareSettings
    from predictor.compare import compare as run_comparison
    from predictor.report import write_report

    judged = CompareSettings.from_toml(settings)
    progress, advance = progress_bar("test participants", None)
    with progress:
        comparison = run_comparison(
            model, work, jobs, seed, advance, settings=judged, population=population
        )
    page = write_report(comparison, out)
    if as_json:
        typer.echo(json.dumps(comparison.tests.to_dict("records"), indent=2))
        return
    typer.echo(headline_text(comparison))
    typer.echo(f"report: {page}")
    typer.echo(CAUTION)


@app.command()
@reports_errors
def evaluate(
    work: Annotated[Path, typer.Argument(help="A prepared workspace (predictor prepare).")],
    out: Annotated[Path, typer.Argument(help="Evaluation folder: one folder per fold, report.")],
    folds: Annotated[int, typer.Option(min=2, help="Folds K (participants, by diagnosis).")] = 5,
    config: Annotated[
        Path | None, typer.Option(help="Training TOML (default: configs/train.toml).")
    ] = None,
    fold: Annotated[
        int | None,
        typer.Option(min=1, help="Run only this fold (a cluster array task); then collect "
                     "with a run without --fold."),
    ] = None,
    jobs: Annotated[int, typer.Option(min=1, help="Participants forecast in parallel.")] = 1,
    seed: Annotated[int, typer.Option(help="Seed of the folds, training and bootstrap.")] = 0,
    scan_volumes: Annotated[
        bool,
        typer.Option(help="Also measure the network's forecast scans like real follow-ups "
                     "(the slowest step); its own Jacobian-integral volumes are always scored."),
    ] = True,
    tune: Annotated[
        bool,
        typer.Option(help="Choose a loss weight per fold on inner validation participants "
                     "only (grid in configs/evaluate.toml; one training per value)."),
    ] = False,
    members: Annotated[
        int,
        typer.Option(min=1, help="Ensemble members of each fold's network and population "
                     "field (2K trainings per fold); 2 or more gives conformal intervals and "
                     "conformal.tsv."),
    ] = 1,
    settings: SettingsOption = None,
) -> None:
    """Cross-validate the network against the population field and the regressions.

    Participants are dealt into K folds (stratified by diagnosis; folds.json).
    Each fold trains the network and a population-field network (template as
    image input) on the other folds, with an inner validation draw for early
    stopping, fits every regression on the same folds, and forecasts its own
    participants' pairs. Rerunning continues a killed run. Errors are in % of
    total brain volume; statistics are per participant (cluster bootstrap CIs,
    sign tests, Holm); the primary endpoint is named in configs/compare.toml
    (or --settings).
    """
    from predictor.compare import CompareSettings
    from predictor.evaluate import TuneSettings
    from predictor.evaluate import evaluate as run_evaluation
    from predictor.evaluation_report import write_evaluation
    from predictor.training import TrainConfig

    judged = CompareSettings.from_toml(settings)
    progress, advance = progress_bar("held-out participants", None)
    with progress:
        evaluation = run_evaluation(
            work, out, folds, TrainConfig.from_toml(config), fold, jobs, seed,
            settings=judged, measure=scan_volumes, progress=advance,
            tune=TuneSettings.from_toml() if tune else None, members=members,
        )  # fmt: skip
    if evaluation is None:
        typer.echo(f"fold {fold} done in {out}; run without --fold to collect")
        return
    page = write_evaluation(evaluation, out)
    typer.echo(evaluation_text(evaluation))
    typer.echo(f"report: {page}")
    typer.echo(CAUTION)


@app.command()
@reports_errors
def calibrate(
    model: Annotated[Path, typer.Argument(help="An ensemble model folder (train --members K).")],
    source: Annotated[
        Path,
        typer.Option("--from", help="A `predictor evaluate --members K` folder (conformal.tsv)."),
    ],
    level: Annotated[float, typer.Option(help="Interval level, within (0, 1).")] = 0.9,
    seed: Annotated[int, typer.Option(help="Seed of the one-pair-per-participant draw.")] = 0,
) -> None:
    """Calibrate an ensemble's regional intervals on held-out forecasts.

    Normalised split-conformal (Lei et al. 2018): each held-out pair's score is
    |observed - forecast| / sqrt(member SD^2 + prior residual variance) (mL / mL),
    one pair per participant; the interval is the forecast +- the scores'
    conformal quantile times that scale, the quantile taken apart in each horizon
    band (the evaluation's: interval_bands_years of its comparison settings; by
    default <1.5, 1.5-2.5, 2.5-3.5, >=3.5 years). Writes MODEL/calibration.json;
    forecasts then carry network_lower_ml and network_upper_ml.
    """
    from predictor.ensemble import band_label
    from predictor.ensemble import calibrate as run_calibration

    payload = run_calibration(source, model, level, seed)
    for region, qs in payload["quantiles"].items():
        each = zip(qs, payload["participants"][region], strict=True)
        bands = "; ".join(
            f"{band_label(b, payload['bands_years'])} q = {'none' if q is None else f'{q:.3g}'} "
            f"(n {n})"
            for b, (q, n) in enumerate(each)
        )
        typer.echo(f"{region}: {bands}")
    if "note" in payload:
        typer.echo(f"note: {payload['note']}")
    typer.echo(f"calibration at {level:g} in {model / 'calibration.json'}")
    typer.echo(CAUTION)


def evaluation_text(evaluation) -> str:
    """One line per target region: the verdict and subject-specific skill of the network's
    own (Jacobian-integral) volumes."""
    lines = []
    rows = evaluation.headlines[evaluation.headlines["network"] == "network-jacobian"]
    for row in rows.itertuples(index=False):
        if row.role != "check":
            lines.append(
                f"{row.region}: {row.verdict}; subject-specific skill {row.subject_specific_skill}"
            )
    return "\n".join(lines)


@app.command()
@reports_errors
def view(
    folder: Annotated[Path, typer.Argument(help="A forecast output folder (searched through).")],
    scan: Annotated[
        Path,
        typer.Option(exists=True, dir_okay=False,
                     help="The baseline T1w NIfTI the forecast was made from (the forecast "
                     "folder does not keep it)."),
    ],
) -> None:
    """Write the progression viewer of an earlier forecast: one HTML page that opens offline
    (three movable planes, a slider over horizons in years, scan / difference /
    log-Jacobian / uncertainty with colour bars, the regional trajectories) and a GIF of
    the mid-planes for slides, beside the forecast's files. Forecasts write both already.
    """
    from predictor.forecast_io import view_forecast

    page = view_forecast(folder, scan)
    typer.echo(f"viewer: {page}")
    typer.echo(CAUTION)


study_app = typer.Typer(
    help="A blinded reader study of forecast realism: build the page, score the answers.",
    no_args_is_help=True,
)
app.add_typer(study_app, name="reader-study")


@study_app.command("build")
@reports_errors
def study_build(
    model: Annotated[Path, typer.Argument(help="A trained model folder; its test participants.")],
    work: Annotated[Path, typer.Argument(help="The prepared workspace the model was trained on.")],
    out: Annotated[Path, typer.Argument(help="A new folder for the study.")],
    cases: Annotated[int, typer.Option(min=1, help="Number of cases (visit pairs).")] = 20,
    seed: Annotated[
        int, typer.Option(min=0, help="Seed of the case draw and the A/B order.")
    ] = 0,
    match: Annotated[
        str,
        typer.Option(
            help="Reduce known tells: 'none', 'denoise' (the same light smoothing of every "
            "image) or 'noise' (fresh noise added to the forecast up to the real scan's level)."
        ),
    ] = "none",
) -> None:
    """Build a blinded two-alternative study: each case shows a held-out participant's baseline
    and two follow-ups at the same interval (years), the real scan and the forecast, as A and
    B in a balanced random order. OUT gets reader_study.html (send to readers; answers stay
    in their browser and are exported as JSON), reader_key.json (keep apart; checksummed)
    and reader_settings.json (the known tells and how they were matched).
    """
    from predictor.reader_study import KEY, PAGE, build_study

    progress, advance = progress_bar("study cases", cases)
    with progress:
        settings = build_study(model, work, out, cases, seed, match, advance)
    typer.echo(f"{settings['cases']} cases in {out / PAGE}; answer key in {out / KEY} "
               "(do not send it to readers)")  # fmt: skip
    typer.echo(CAUTION)


@study_app.command("score")
@reports_errors
def study_score(
    out: Annotated[Path, typer.Argument(help="The study folder (reader-study build).")],
    answers: Annotated[list[Path], typer.Argument(help="Exported answers, one file per reader.")],
) -> None:
    """Score readers' answers: identification accuracy per reader and pooled (exact binomial
    95% CI, test against chance 0.5), Fleiss' kappa between readers, artefact scores real
    against forecast (Wilcoxon signed-rank), diagnosis agreement. Writes reader_scores.tsv,
    .json and .html into OUT.
    """
    from predictor.reader_study import SCORES, score_study

    summary = score_study(out, answers)
    for row in summary["accuracy"]:
        typer.echo(f"{row['rater']}: {row['correct']}/{row['cases']} forecasts identified "
                   f"(95% CI {row['ci_low']:.2f}-{row['ci_high']:.2f}, p vs chance "
                   f"{row['p_chance']:.3g})")  # fmt: skip
    typer.echo(f"scores in {out / SCORES}.html")


@app.command("trial-size")
@reports_errors
def trial_size(
    source: Annotated[
        Path,
        typer.Option("--from", help="A `predictor evaluate` folder (or a compare report)."),
    ],
    region: Annotated[str, typer.Option(help="Region, e.g. hippocampus_left, ventricles.")],
    effect: Annotated[
        float, typer.Option(help="Fractional slowing of the mean annual rate to detect (0-1].")
    ] = 0.25,
    power: Annotated[float, typer.Option(help="Power, within (0, 1).")] = 0.8,
    alpha: Annotated[float, typer.Option(help="Two-sided significance level, (0, 0.5].")] = 0.05,
    years: Annotated[float, typer.Option(help="Trial duration (rates over it), years.")] = 2.0,
    window: Annotated[
        float,
        typer.Option(help="A participant needs a visit within this many years of --years."),
    ] = 0.5,
    enrich: Annotated[
        list[float],
        typer.Option(help="Enrolled fractions q compared (1 is always), e.g. --enrich 0.5 0.3."),
    ] = [0.5, 0.3],  # noqa: B006 (typer needs a list default)
    screen_cost: Annotated[
        float | None, typer.Option(help="Cost of screening one participant (with --enrol-cost).")
    ] = None,
    enrol_cost: Annotated[
        float | None, typer.Option(help="Cost of enrolling one participant (same currency).")
    ] = None,
    seed: Annotated[int, typer.Option(help="Seed of the bootstrap and the random order.")] = 0,
    out: Annotated[
        Path | None, typer.Option(help="Output folder [default: FROM/trial-size].")
    ] = None,
    as_json: Annotated[bool, typer.Option("--json", help="Print the result as JSON.")] = False,
) -> None:
    """Participants per arm to detect a slowing of atrophy, and enrichment by screening rules.

    Rates are each held-out participant's observed annualised change (% per
    year, least squares over the visits within the trial's duration); n per arm
    is for a two-arm, two-sided exact t-test, for a slowing of the total rate and
    of the disease-related rate (minus cognitively normal ageing), with participant
    bootstrap 95% CIs. Screening rules (random order, diagnosis, baseline
    hippocampus, every held-out forecast) are compared at equal enrolled
    fractions q; 1/q are screened per enrolled.
    """
    import json

    from predictor.trials import Costs, Design, trial_report

    design = Design(effect=effect, power=power, alpha=alpha, years=years, window=window)
    if (screen_cost is None) != (enrol_cost is None):
        raise DataError("give both --screen-cost and --enrol-cost, or neither")
    costs = None if screen_cost is None else Costs(screen_cost, enrol_cost)
    summary = trial_report(
        source, out or source / "trial-size", region, design, enrich, costs, seed
    )
    if as_json:
        typer.echo(json.dumps(summary, indent=2))
        return
    import pandas as pd

    table = pd.DataFrame(summary["enrichment"])
    wanted = ("rule", "fraction", "total_n_per_arm", "total_n_per_arm_ci_low",
              "total_n_per_arm_ci_high", "disease_n_per_arm", "apparent_n_per_arm",
              "total_cost")  # fmt: skip
    columns = [c for c in wanted if c in table]
    typer.echo(f"{region}, {summary['source']}, {summary['participants']} participants:")
    typer.echo(table[columns].round(1).to_string(index=False))
    for line in summary["verdicts"]:
        typer.echo(line)
    typer.echo(f"Note: {summary['apparent_warning']}.")
    typer.echo(summary["caution"])


@app.command()
@reports_errors
def demo(
    out: Annotated[Path, typer.Argument(help="Folder for everything the demo writes.")] = Path(
        "demo-output"
    ),
    quick: Annotated[
        bool, typer.Option(help="15 geometric phantoms, the tiny network: under 4 minutes.")
    ] = False,
    jobs: Annotated[int, typer.Option(min=1, help="Parallel worker processes.")] = 2,
) -> None:
    """Run every stage on a fictional memory clinic's phantom cohort.

    Phantom cohort (BIDS with ground truth) -> prepare (volumes in mL) ->
    evaluate (5-fold cross-validation: network, population field, regressions;
    report) -> forecast (every baseline, by the fold model that held it out;
    years in configs/demo.toml) -> trial-size (participants per arm). At most
    25 minutes on 2 cores (60 participants, 4 mm); --quick under 4 minutes.
    """
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeElapsedColumn

    from predictor.demo import STAGES, run_demo

    progress = Progress(
        "[progress.description]{task.description}",
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
        console=Console(stderr=True),
    )
    overall = progress.add_task("demo", total=len(STAGES))
    current = {}

    def on_stage(name, items):
        if current:
            progress.update(current["task"], completed=progress.tasks[current["task"]].total)
            progress.advance(overall)
        current["task"] = progress.add_task(f"  {name}", total=items)
        progress.update(overall, description=f"demo: {name}")
        return lambda: progress.advance(current["task"])

    with progress:
        result = run_demo(out, quick, jobs, on_stage)
        progress.advance(overall)
    typer.echo("Prepare: measured against true volumes (% error):")
    typer.echo(result["prepare_accuracy"].round(2).to_string(index=False))
    typer.echo(
        f"Cross-validated ({result['evaluation'].data['folds']} folds, each participant "
        "forecast once while held out), the network's own volumes:"
    )
    typer.echo(evaluation_text(result["evaluation"]))
    trial = result["trial"]
    typer.echo(f"Trial size ({trial['region']}, {trial['participants']} held-out participants):")
    for line in trial["verdicts"]:
        typer.echo(f"  {line}")
    for key, folder in result["folders"].items():
        typer.echo(f"{key:>10}: {folder}")
    typer.echo(f"report: {result['report']}")
    typer.echo("Synthetic phantoms: invented anatomy, not images of any person. " + CAUTION)


def json_records(table) -> list[dict]:
    """A table's rows for JSON, which has no NaN: a missing value is null."""
    return table.astype(object).where(table.notna(), None).to_dict("records")


def headline_text(comparison) -> str:
    """The comparison's verdict per region and network variant, as a terminal table."""
    headlines = comparison.headlines[
        ["region", "network", "role", "verdict", "subject_specific_skill"]
    ]
    return (
        f"Held-out test participants ({comparison.data['participants']['test']}), each counted "
        "once; better or worse only where the 95% CI of the error difference excludes 0:\n"
        + headlines.to_string(index=False)
    )


#: options that take several values after one flag (``--years 1 2 5``)
LIST_OPTIONS = ("--years", "--enrich")


def expand_lists(args: list[str]) -> list[str]:
    """Rewrite ``--years 1 2 5`` as ``--years 1 --years 2 --years 5`` (what typer reads)."""
    expanded, index = [], 0
    while index < len(args):
        token = args[index]
        expanded.append(token)
        index += 1
        if token in LIST_OPTIONS:
            values = []
            while index < len(args) and _is_number(args[index]):
                values.append(args[index])
                index += 1
            for position, value in enumerate(values):
                expanded += [value] if position == 0 else [token, value]
    return expanded


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def main(args: list[str] | None = None) -> None:
    """Console-script entry point."""
    import sys

    app(args=expand_lists(sys.argv[1:] if args is None else list(args)))


if __name__ == "__main__":
    main()
