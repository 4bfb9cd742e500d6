"""``predictor demo``: every stage on a fictional memory clinic's phantom cohort.

phantoms -> prepare -> evaluate (K-fold cross-validation) -> forecast ->
trial-size, into one folder (settings in ``configs/demo.toml``)::

    OUT/cohort/      BIDS phantom cohort (scenario in the settings) with its ground truth
    OUT/work/        prepared workspace (volumes.tsv, changes.tsv)
    OUT/evaluation/  cross-validated evaluation: fold-<k>/ (network, population field,
                     forecasts.tsv), evaluation.html, forest.png, TSVs
    OUT/forecasts/   forecasts of every participant's baseline scan, each by the network
                     of the fold that held the participant out
    OUT/trial/       sample size per arm and enrichment by screening rules, from the
                     evaluation's held-out forecasts (TSV, JSON, PNG)
    OUT/prepare_accuracy.tsv   measured against true volumes (% error)
    OUT/change_accuracy.tsv    measured against true change, by registration and segmentation

A rerun regenerates the cohort, reuses prepared scans whose inputs did not
change, and starts the evaluation and the forecasts afresh.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from predictor.config import CONFIG_DIR, load_settings

STAGES = ("phantoms", "prepare", "evaluate", "forecast", "trial-size")


@dataclass(frozen=True)
class DemoSettings:
    """One demo size (a table of ``configs/demo.toml``)."""

    participants: int
    scenario: str
    template: str
    size: str
    grid_mm: float
    train_config: str
    folds: int
    epochs: int
    max_pairs_per_epoch: int
    forecast_years: tuple[float, ...]
    trial_region: str
    trial_years: float
    trial_enrich: tuple[float, ...]
    trial_costs: tuple[float, float]
    seed: int

    @classmethod
    def from_toml(cls, quick: bool, path: str | os.PathLike[str] | None = None) -> DemoSettings:
        """``[quick]`` or ``[full]`` of ``configs/demo.toml``, the file at ``path`` over it."""
        return load_settings(cls, "demo.toml", path, table="quick" if quick else "full")


def prepare_accuracy(work: Path, cohort: Path) -> pd.DataFrame:
    """Measured against true volumes per region: mean and largest absolute error (%), and
    (where the cohort has same-day rescans) the change measurement's noise floor."""
    from predictor.longitudinal import noise_floor
    from predictor.phantoms.generate import TRUTH
    from predictor.workspace import read_workspace

    workspace = read_workspace(work)
    measured = workspace.volumes
    truth = pd.read_csv(cohort / TRUTH / "true_volumes.tsv", sep="\t")
    both = measured.merge(truth, on=["participant_id", "session_id"], suffixes=("", "_true"))
    rows = []
    for region in workspace.regions.names:
        error = 100 * (both[region] - both[f"{region}_true"]) / both[f"{region}_true"]
        rows.append(
            {
                "region": region,
                "mean_error_pct": error.mean(),
                "max_abs_error_pct": error.abs().max(),
            }
        )
    table, floor = pd.DataFrame(rows), noise_floor(workspace.layout, workspace.regions)
    return table.merge(floor, on="region", how="left") if len(floor) else table


def slope_ci(x, y, participants, resamples) -> tuple[float, float]:
    """Percentile 95% CI of the least-squares slope of ``y`` on ``x`` over ``resamples``
    (rows of participant ids drawn with replacement; each brings all its pairs)."""
    import numpy as np

    nothing = np.zeros(0, dtype=int)  # a participant with no pair of this region
    members = {p: np.flatnonzero(participants == p) for p in np.unique(participants)}
    slopes = []
    for drawn in resamples:
        rows = np.concatenate([members.get(p, nothing) for p in drawn])
        xs, ys = x[rows], y[rows]
        if len(rows) > 2 and np.ptp(xs) > 0:
            centred = xs - xs.mean()
            slopes.append(float(centred @ (ys - ys.mean()) / (centred @ centred)))
    if not slopes:
        return float("nan"), float("nan")
    return float(np.quantile(slopes, 0.025)), float(np.quantile(slopes, 0.975))


def change_agreement(work: Path, cohort: Path) -> pd.DataFrame:
    """Measured against true % change from baseline, per region and measurement.

    From ``changes.tsv``: the change by registration and by segmentation of
    every (baseline, later visit) pair; least-squares slope of measured on true
    change (1 is unbiased) with its 95% CI from a bootstrap of whole participants
    (a participant's pairs share its anatomy and registrations; with few participants
    the percentile interval is too narrow), Pearson r and the median absolute error
    (points).
    """
    import numpy as np

    from predictor.compare import BOOTSTRAP
    from predictor.phantoms.generate import TRUTH
    from predictor.rng import seeded_rng
    from predictor.workspace import Layout, read_workspace

    regions = read_workspace(work).regions
    changes = pd.read_csv(Layout(Path(work)).changes, sep="\t")
    truth = pd.read_csv(cohort / TRUTH / "true_volumes.tsv", sep="\t").set_index(
        ["participant_id", "session_id"]
    )
    start = truth.loc[list(zip(changes.participant_id, changes.session_from, strict=True))]
    end = truth.loc[list(zip(changes.participant_id, changes.session_to, strict=True))]
    participants = changes["participant_id"].to_numpy()
    people = np.unique(participants)
    draws = seeded_rng(0, 53).integers(0, len(people), size=(BOOTSTRAP, len(people)))
    rows = []
    for region in regions.names:
        true = 100 * (end[region].to_numpy() / start[region].to_numpy() - 1)
        for method in ("registration", "segmentation"):
            measured = changes[f"{region}_pct_{method}"].to_numpy(dtype=float)
            kept = np.isfinite(measured) & np.isfinite(true)
            x, y = true[kept], measured[kept]
            enough = kept.sum() > 2 and np.ptp(x) > 0
            low, high = slope_ci(x, y, participants[kept], people[draws]) if enough else (
                np.nan, np.nan)  # fmt: skip
            rows.append(
                {
                    "region": region,
                    "method": method,
                    "pairs": int(kept.sum()),
                    "participants": len(set(participants[kept])),
                    "slope": float(np.polyfit(x, y, 1)[0]) if enough else np.nan,
                    "slope_ci_low": low,
                    "slope_ci_high": high,
                    "pearson_r": float(np.corrcoef(x, y)[0, 1]) if enough else np.nan,
                    "median_abs_error_pts": float(np.median(np.abs(y - x)))
                    if kept.any()
                    else np.nan,
                }
            )
    return pd.DataFrame(rows)


def run_demo(
    out: str | os.PathLike[str],
    quick: bool = False,
    jobs: int = 2,
    on_stage: Callable[[str, int | None], Callable[[], None]] | None = None,
) -> dict:
    """Run every stage into ``out``; returns paths and the stages' main tables.

    ``on_stage(name, items)`` is called as each stage starts and returns a
    function called after each item of that stage (participant, scan, fold).
    """
    import shutil
    from dataclasses import replace

    from predictor.cohort import read_cohort
    from predictor.evaluate import evaluate, fold_folder, model_folder, read_folds
    from predictor.evaluation_report import write_evaluation
    from predictor.files import write_tsv
    from predictor.forecast_io import forecast_cohort
    from predictor.phantoms.generate import TEMPLATE, generate_cohort
    from predictor.prepare import PrepareSettings, prepare_cohort, scan_count
    from predictor.training import TrainConfig
    from predictor.trials import Costs, Design, trial_report

    settings = DemoSettings.from_toml(quick)
    out = Path(out)
    folders = {name: out / name for name in ("cohort", "work", "evaluation", "forecasts", "trial")}

    def stage(name, items):
        return on_stage(name, items) if on_stage else None

    generate_cohort(
        folders["cohort"],
        settings.participants,
        settings.size,
        settings.seed,
        scenario_path=settings.scenario,
        jobs=jobs,
        force=True,
        progress=stage("phantoms", settings.participants),
    )
    table = read_cohort(folders["cohort"])
    template = folders["cohort"] / TEMPLATE if settings.template == "phantom" else settings.template
    prepare_cohort(
        table,
        folders["work"],
        template,
        PrepareSettings.from_toml(grid_mm=settings.grid_mm),
        jobs,
        progress=stage("prepare", scan_count(table)),
    )
    accuracy = prepare_accuracy(folders["work"], folders["cohort"])
    write_tsv(out / "prepare_accuracy.tsv", accuracy)
    write_tsv(out / "change_accuracy.tsv", change_agreement(folders["work"], folders["cohort"]))

    config = TrainConfig.from_toml(CONFIG_DIR / settings.train_config)
    config = replace(config, training=replace(
        config.training, epochs=settings.epochs, max_pairs_per_epoch=settings.max_pairs_per_epoch
    ))  # fmt: skip
    for folder in (folders["evaluation"], folders["forecasts"]):
        shutil.rmtree(folder, ignore_errors=True)  # the demo's own outputs of an earlier run
    fold_done = stage("evaluate", settings.folds)
    # scan volumes are not measured (the slowest step): the network's own volumes are scored
    for fold in range(1, settings.folds + 1):
        evaluate(folders["work"], folders["evaluation"], settings.folds, config, fold, jobs,
                 settings.seed, measure=False)  # fmt: skip
        if fold_done:
            fold_done()
    evaluation = evaluate(folders["work"], folders["evaluation"], settings.folds, config,
                          jobs=jobs, seed=settings.seed, measure=False)  # fmt: skip
    page = write_evaluation(evaluation, folders["evaluation"])

    assignment = read_folds(folders["evaluation"])["assignment"]
    models = {
        participant: model_folder(fold_folder(folders["evaluation"], fold), "network")
        for participant, fold in assignment.items()
    }
    forecast_cohort(
        models,
        table[table["participant_id"].isin(models)],
        folders["forecasts"],
        settings.forecast_years,
        jobs=jobs,
        progress=stage("forecast", len(models)),
    )
    trial_done = stage("trial-size", 1)
    trial = trial_report(
        folders["evaluation"],
        folders["trial"],
        settings.trial_region,
        Design(years=settings.trial_years),
        settings.trial_enrich,
        Costs(*settings.trial_costs),
        settings.seed,
    )
    if trial_done:
        trial_done()
    return {
        "folders": folders,
        "report": page,
        "prepare_accuracy": accuracy,
        "evaluation": evaluation,
        "trial": trial,
    }
