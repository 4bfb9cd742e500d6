"""``predictor evaluate``: participant-level K-fold cross-validation of the network.

Participants are dealt into K folds (stratified by diagnosis, seeded; the
assignment is saved in ``folds.json``). For fold k, a network and a
population-field network (the same training with the template as everyone's
image input) are trained on the other folds, with an inner validation draw
of them driving early stopping; the regression forecasters are fitted on the
same other folds. Each then forecasts fold k's baseline -> follow-up pairs, so
every participant is forecast exactly once, by models that never saw it.

Each fold lives in its own folder (``fold-<k>/network``, ``fold-<k>/population``,
``fold-<k>/forecasts.tsv``): training resumes from its last checkpoint and a
finished fold is not redone, so a killed run continues where it stopped, and
``--fold k`` lets a cluster array job run the folds apart. A run without
``--fold`` runs what is missing and then collects the folds into one
evaluation with the statistics of :mod:`predictor.compare` (participant-level
differences, cluster bootstrap, Holm), the subject-specific skill of every
method (calibration slope and R^2 of individual annualised change) and the
coverage of every interval a method gives.

With ``--members K`` each fold's network, and its population field, is an ensemble
of K members (:mod:`predictor.ensemble`); the held-out conformal scores of the
network's Jacobian volumes
go to ``conformal.tsv`` (what ``predictor calibrate`` reads), and each fold's
participants get intervals calibrated on the other folds' participants, whose
coverage is reported beside the regressions'.
"""

from __future__ import annotations

import json
import os
from dataclasses import asdict, dataclass, fields, replace
from pathlib import Path

import numpy as np
import pandas as pd

from predictor.compare import (
    FLOOR,
    JACOBIAN,
    NETWORK,
    NETWORKS,
    POPULATION,
    CompareSettings,
    baseline_pairs,
    error_table,
    grouped,
    headlines,
    horizon_bins,
    network_pairs,
    paired_tests,
    phantom_floor,
    phantom_true_follow_up,
    regression_forecasts,
    summarise,
)
from predictor.config import load_settings
from predictor.ensemble import (
    band_labels,
    band_of,
    cross_fitted,
    score_table,
    train_members,
)
from predictor.errors import DataError
from predictor.files import write_json, write_tsv
from predictor.longitudinal import noise_floor, observed_by_registration
from predictor.losses import LossSettings
from predictor.modelstore import read_model_json
from predictor.pairs import stratified_draw
from predictor.parallel import run_all
from predictor.regression import LEVEL
from predictor.rng import seeded_rng
from predictor.training import TrainConfig, train
from predictor.workspace import read_workspace

FOLDS_FILE = "folds.json"
FORECASTS = "forecasts.tsv"
TUNING = "tuning.json"
STAMP = "fold.json"
#: a fold's two trained models: the network, and the same training fed the template
MODELS = {"network": "scan", "population": "template"}
#: columns of a fold's forecasts.tsv
FORECAST_COLUMNS = (
    "participant_id", "base_key", "follow_key", "years", "region", "method",
    "forecast_ml", "lower_ml", "upper_ml", "scale_ml",
)  # fmt: skip


@dataclass(frozen=True)
class TuneSettings:
    """What ``--tune`` searches (``configs/evaluate.toml``): one [loss] weight's values."""

    tune_parameter: str
    tune_values: tuple[float, ...]

    def __post_init__(self):
        weights = [f.name for f in fields(LossSettings) if f.name.endswith("_weight")]
        if self.tune_parameter not in weights:
            raise ValueError(
                f"tune_parameter must be one of {weights}; '{self.tune_parameter}' was given"
            )
        if len(set(self.tune_values)) < 2 or min(self.tune_values) < 0:
            raise ValueError(
                f"tune_values must hold 2 or more weights >= 0, got {self.tune_values}"
            )

    @classmethod
    def from_toml(cls, path: str | os.PathLike[str] | None = None) -> TuneSettings:
        return load_settings(cls, "evaluate.toml", path)


@dataclass(frozen=True)
class Evaluation:
    """Every table of a cross-validated evaluation (pandas DataFrames)."""

    errors: pd.DataFrame  # one row per pair, region and method
    summary: pd.DataFrame  # region x method: mean |error| (% TBV) and its CI
    tests: pd.DataFrame  # region x network variant x comparator, participant level
    headlines: pd.DataFrame  # region x network variant: verdicts and subject-specific skill
    skill: pd.DataFrame  # region x method: calibration slope and R^2 of individual change
    coverage: pd.DataFrame  # method x region x group: share of pairs inside the interval
    conformal: pd.DataFrame  # the network's held-out conformal scores (empty: one member)
    by_horizon: pd.DataFrame
    by_diagnosis: pd.DataFrame
    # phantom cohorts: mean |error| and paired tests against the *true* change (else empty)
    truth_summary: pd.DataFrame
    truth_tests: pd.DataFrame
    # the change measurement's scan-rescan noise floor per region (empty without rescans)
    noise_floor: pd.DataFrame
    data: dict  # counts, folds, settings, forecasters not fitted
    regions: tuple[str, ...]


# --- folds ---------------------------------------------------------------------------------
def assign_folds(volumes: pd.DataFrame, folds: int, seed: int) -> dict[str, int]:
    """Participant -> fold (1..K), stratified by diagnosis.

    Within each diagnosis (in sorted order) participants are shuffled by the seed and
    dealt in turn, the deal continuing across diagnoses, so fold sizes differ by at most
    one and every diagnosis is spread as evenly as its count allows.
    """
    diagnosis = volumes.groupby("participant_id")["diagnosis"].first()
    if folds < 2:
        raise DataError(f"--folds must be 2 or more, got {folds}")
    if len(diagnosis) < 2 * folds:
        raise DataError(
            f"{len(diagnosis)} participants are too few for {folds} folds "
            f"(at least {2 * folds} are needed: two per fold)"
        )
    rng = seeded_rng(seed, 29)
    assignment, dealt = {}, 0
    for label in sorted(set(diagnosis)):
        members = sorted(diagnosis.index[diagnosis == label])
        for participant in rng.permutation(np.asarray(members, dtype=object)):
            assignment[str(participant)] = dealt % folds + 1
            dealt += 1
    return dict(sorted(assignment.items()))


def fold_split(
    volumes: pd.DataFrame, assignment: dict[str, int], fold: int, share: float, seed: int
) -> dict[str, list[str]]:
    """Train / validation / test participants of one fold.

    Test: the fold. Validation: ``share`` of the other folds' participants with a
    follow-up (at least one), drawn from them stratified by diagnosis; train: the rest.
    """
    test = sorted(p for p, k in assignment.items() if k == fold)
    pool = sorted(p for p, k in assignment.items() if k != fold)
    span = volumes.groupby("participant_id")["age"].agg(lambda a: a.max() - a.min())
    diagnosis = volumes.groupby("participant_id")["diagnosis"].first()
    followed = [p for p in pool if span[p] > 0]
    size = max(1, int(round(share * len(followed)))) if share > 0 and followed else 0
    validation = stratified_draw(followed, diagnosis, size, seeded_rng(seed, 31, fold))
    train_set = sorted(set(pool) - set(validation))
    return {"train": train_set, "validation": validation, "test": test}


def start_folds(volumes: pd.DataFrame, out: Path, folds: int, seed: int) -> dict:
    """Write ``folds.json`` (participant -> fold), or read it back and check it matches."""
    path = out / FOLDS_FILE
    participants = sorted(set(volumes["participant_id"]))
    if path.is_file():
        saved = read_folds(out)
        if saved["folds"] != folds or saved["seed"] != seed:
            raise DataError(
                f"{path}: holds {saved['folds']} folds with seed {saved['seed']}; "
                f"rerun with --folds {saved['folds']} --seed {saved['seed']} or use another OUT"
            )
        if sorted(saved["assignment"]) != participants:
            raise DataError(f"{path}: was made for other participants than the workspace's")
        return saved
    saved = {"folds": folds, "seed": seed, "assignment": assign_folds(volumes, folds, seed)}
    out.mkdir(parents=True, exist_ok=True)
    write_json(path, saved)
    return saved


def read_folds(out: Path) -> dict:
    """The saved fold assignment; a malformed file raises DataError naming it."""
    path = Path(out) / FOLDS_FILE
    try:
        saved = json.loads(path.read_text())
        saved = {
            "folds": int(saved["folds"]),
            "seed": int(saved["seed"]),
            "assignment": {str(p): int(k) for p, k in saved["assignment"].items()},
        }
    except (OSError, ValueError, KeyError, TypeError, AttributeError) as error:
        raise DataError(f"{path}: not a fold assignment ({error})") from error
    return saved


# --- one fold ------------------------------------------------------------------------------
def fold_folder(out: Path, fold: int) -> Path:
    return Path(out) / f"fold-{fold}"


def run_fold(
    work, out: Path, fold: int, config: TrainConfig, seed: int, jobs: int,
    measure: bool = True, progress=None, tune: TuneSettings | None = None,
    observed_change: str = "segmentation", members: int = 1,
):  # fmt: skip
    """Train fold ``fold``'s two models (resuming) and forecast its participants' pairs.

    ``members``: the network and the population field are ensembles of this many members
    (the comparator gets what the network gets).
    ``measure``: also measure the network's forecast scans like real ones (slowest step),
    by ``observed_change`` (the observed change's measurement, :func:`network_pairs`).
    ``tune``: choose a loss weight per model on the fold's inner validation participants
    (``fold-<k>/tuning.json``). Writes ``fold-<k>/forecasts.tsv`` last, atomically; a
    fold that has it is done.
    """
    folder = fold_folder(out, fold)
    check_stamp(folder, fold_stamp(config, seed, measure, tune, observed_change, members))
    if (folder / FORECASTS).is_file():
        return folder / FORECASTS
    workspace = read_workspace(work)
    volumes, names = workspace.volumes, workspace.regions.names
    saved = read_folds(out)
    fractions = config.training.split
    share = fractions[1] / max(fractions[0] + fractions[1], 1e-9)
    split = fold_split(volumes, saved["assignment"], fold, share, seed)
    chosen = {}
    for name, image_input in MODELS.items():
        settings = replace(config, training=replace(config.training, image_input=image_input))
        chosen[name] = train_model(work, folder, name, settings, seed, split, tune, members)
    if tune is not None:
        write_json(folder / TUNING, chosen)
    pairs = baseline_pairs(
        volumes, split["test"], workspace.regions, workspace.cohort.covariate_names
    )
    rows = []
    if not pairs.empty:
        groups = [frame for _, frame in pairs.groupby("participant_id", sort=True)]
        arguments = [
            (str(model_folder(folder, "network").resolve()), str(Path(work).resolve()), group,
             str(model_folder(folder, "population").resolve()), measure, observed_change)
            for group in groups
        ]  # fmt: skip
        measured = pd.DataFrame(
            [row for rows in run_all(network_pairs, arguments, jobs, progress) for row in rows]
        )
        measured = pairs.merge(measured, on=["base_key", "follow_key"], validate="one_to_one")
        for method, prefix in ((NETWORK, "measured_"), (JACOBIAN, "jacobian_"),
                               (POPULATION, "population_")):  # fmt: skip
            if f"{prefix}{names[0]}" not in measured:
                continue
            values = measured[[f"{prefix}{r}" for r in names]].to_numpy()
            scale = None
            if method == JACOBIAN:  # the scale of its conformal score (NaN: one member)
                scale = measured[[f"scale_{r}" for r in names]].to_numpy()
            rows.append(_long(measured, method, names, values, None, scale))
        regressions, not_fitted = regression_forecasts(
            volumes, split["train"] + split["validation"], pairs, workspace.regions,
            workspace.cohort, seed, jobs,
        )  # fmt: skip
        for method, values in regressions.items():
            rows.append(_long(pairs, method, names, values[..., 0], values[..., 1:]))
        write_json(folder / "not_fitted.json", not_fitted)
    table = pd.concat(rows, ignore_index=True) if rows else pd.DataFrame(columns=FORECAST_COLUMNS)
    return write_tsv(folder / FORECASTS, table[list(FORECAST_COLUMNS)])


def fold_stamp(
    config: TrainConfig, seed: int, measure: bool, tune, observed_change, members: int = 1
) -> dict:
    """What a fold's results depend on besides the workspace (``fold-<k>/fold.json``)."""
    stamp = {"config": config.to_dict(), "seed": seed, "measure": measure,
             "tune": None if tune is None else asdict(tune)}  # fmt: skip
    if members > 1:  # a single-member fold keeps the stamp it always had
        stamp["members"] = members
    if measure:  # how the forecast scans are measured; nothing else depends on it
        stamp["observed_change"] = observed_change
    return json.loads(json.dumps(stamp))


def check_stamp(folder: Path, stamp: dict) -> None:
    """Write the fold's stamp, or raise DataError if the fold was run with other settings."""
    path = folder / STAMP
    if path.is_file():
        if json.loads(path.read_text()) != stamp:
            raise DataError(
                f"{folder}: was run with other settings (training config, seed, --tune, "
                "--members, --no-scan-volumes or the observed change of configs/compare.toml); "
                "rerun "
                "with those settings or use another OUT"
            )
        return
    folder.mkdir(parents=True, exist_ok=True)
    write_json(path, stamp)


def train_model(
    work, folder: Path, name: str, config: TrainConfig, seed, split, tune, members: int = 1
) -> dict:
    """Train one of a fold's models (resuming; ``members`` > 1: an ensemble); with ``tune``,
    one per value of the tuned weight, keeping the lowest inner-validation figure. Returns
    what was chosen."""
    if tune is None:
        train_members(work, folder / name, config, members, seed, split, resume=True)
        return {"folder": name}
    scores = {}
    for value in tune.tune_values:
        candidate = f"{name}-{tune.tune_parameter}-{value:g}"
        loss = replace(config.loss, **{tune.tune_parameter: value})
        train(work, folder / candidate, replace(config, loss=loss), resume=True, seed=seed,
              split=split)  # fmt: skip
        scores[candidate] = validation_score(folder / candidate, config.training.monitor)
    best = min(scores, key=scores.get)
    return {"folder": best, "parameter": tune.tune_parameter, "validation": scores}


def validation_score(model_dir: Path, monitor: str) -> float:
    """The best (lowest) monitored validation figure of a trained model's log."""
    log = pd.read_csv(model_dir / "log.tsv", sep="\t")
    if monitor not in log or log[monitor].isna().all():
        raise DataError(f"{model_dir}: its log has no validation '{monitor}' to tune on")
    return float(log[monitor].min())


def model_folder(folder: Path, name: str) -> Path:
    """The model a fold forecasts with: ``name``, or the candidate tuning chose."""
    if (folder / TUNING).is_file():
        return folder / json.loads((folder / TUNING).read_text())[name]["folder"]
    return folder / name


def _long(pairs: pd.DataFrame, method: str, names, values, bounds, scale=None) -> pd.DataFrame:
    """One method's (P, R) forecasts (and (P, R, 2) bounds, (P, R) conformal scales, or
    None) as forecasts.tsv rows."""
    frames = []
    for j, region in enumerate(names):
        frames.append(
            pd.DataFrame(
                {
                    "participant_id": pairs["participant_id"].to_numpy(),
                    "base_key": pairs["base_key"].to_numpy(),
                    "follow_key": pairs["follow_key"].to_numpy(),
                    "years": pairs["years"].to_numpy(),
                    "region": region,
                    "method": method,
                    "forecast_ml": values[:, j],
                    "lower_ml": np.nan if bounds is None else bounds[:, j, 0],
                    "upper_ml": np.nan if bounds is None else bounds[:, j, 1],
                    "scale_ml": np.nan if scale is None else scale[:, j],
                }
            )
        )
    return pd.concat(frames, ignore_index=True)


# --- collecting the folds ------------------------------------------------------------------
def check_folds(out: Path, saved: dict) -> pd.DataFrame:
    """Every fold's forecasts, checked: each participant forecast once, never by a model
    that saw it (from the saved assignment and each model's own split). Raises DataError
    naming a missing fold or the leaked participants."""
    assignment, frames, stamps = saved["assignment"], [], set()
    for fold in range(1, saved["folds"] + 1):
        folder = fold_folder(out, fold)
        members = {p for p, k in assignment.items() if k == fold}
        if not (folder / FORECASTS).is_file():
            raise DataError(
                f"{folder}: fold {fold} is not finished; run `predictor evaluate` without "
                f"--fold (or with --fold {fold}) to finish it"
            )
        stamps.add((folder / STAMP).read_text() if (folder / STAMP).is_file() else "")
        if len(stamps) > 1:
            raise DataError(
                f"{folder}: fold {fold} was run with other settings than fold 1 (fold.json); "
                "every fold must use the same training config, seed, --tune, "
                "--no-scan-volumes and (with scan volumes) observed change"
            )
        for model in sorted(path.parent for path in folder.glob("**/model.json")):
            split = read_model_json(model).split
            seen = (set(split["train"]) | set(split["validation"])) & members
            if seen:
                raise DataError(
                    f"leaked fold: {model} was trained on participant(s) "
                    f"{', '.join(sorted(seen)[:5])} of fold {fold}, which it forecasts"
                )
        frame = pd.read_csv(folder / FORECASTS, sep="\t")
        outside = sorted(set(frame["participant_id"]) - members)
        if outside:
            raise DataError(
                f"leaked fold: {folder / FORECASTS} forecasts participant(s) "
                f"{', '.join(outside[:5])} that are not in fold {fold}"
            )
        frames.append(frame.assign(fold=fold))
    return pd.concat(frames, ignore_index=True)


def collect(work, out: Path, settings: CompareSettings, seed: int) -> Evaluation:
    """The evaluation of every finished fold (see :func:`check_folds`)."""
    out = Path(out)
    saved = read_folds(out)
    forecasts = check_folds(out, saved)
    workspace = read_workspace(work)
    volumes, names = workspace.volumes, workspace.regions.names
    pairs = baseline_pairs(
        volumes, sorted(saved["assignment"]), workspace.regions, workspace.cohort.covariate_names
    )
    if pairs.empty:
        raise DataError(f"{work}: no participant has a follow-up visit to forecast")
    if settings.observed_change == "registration":
        pairs = observed_by_registration(pairs, volumes, workspace.layout, workspace.regions)
    keys = pairs.set_index(["base_key", "follow_key"]).index
    methods, bounds = {}, {}
    for method, frame in forecasts.groupby("method", sort=False):
        wide = frame.pivot(index=["base_key", "follow_key"], columns="region")
        methods[method] = wide["forecast_ml"].reindex(index=keys, columns=names).to_numpy()
        if frame["lower_ml"].notna().any():
            bounds[method] = np.stack(
                [wide[c].reindex(index=keys, columns=names).to_numpy()
                 for c in ("lower_ml", "upper_ml")], -1,
            )  # fmt: skip
    edges = settings.interval_bands_years
    conformal = conformal_scores(forecasts, pairs, names, seed, edges)
    if not conformal.empty:
        wide = conformal.pivot(index=["base_key", "follow_key"], columns="region")
        bounds[JACOBIAN] = np.stack(
            [wide[c].reindex(index=keys, columns=names).to_numpy()
             for c in ("lower_ml", "upper_ml")], -1,
        )  # fmt: skip
    missing = int(np.isnan(methods[JACOBIAN]).any(axis=1).sum())
    if missing:
        raise DataError(f"{out}: {missing} pair(s) have no network forecast in any fold")
    floor = phantom_floor(Path(work), pairs, names)
    if floor is not None:
        methods[FLOOR] = floor
    errors = error_table(pairs, methods, names).dropna(subset=["forecast_ml"])
    tests = paired_tests(errors, names, workspace.regions.checks, settings, seed)
    truth_summary, truth_tests = pd.DataFrame(), pd.DataFrame()
    true_follow_up = phantom_true_follow_up(Path(work), pairs, names)
    if true_follow_up is not None:
        columns = {f"{r}_follow": true_follow_up[:, j] for j, r in enumerate(names)}
        against = error_table(pairs.assign(**columns), methods, names)
        against = against.dropna(subset=["forecast_ml", "observed_ml"])
        truth_summary = summarise(against, seed)
        known = [r for r in names if r in set(against["region"])]  # the truth's regions
        if settings.primary_region in known:
            checks = workspace.regions.checks
            truth_tests = paired_tests(against, known, checks, settings, seed)
    skill = skill_table(errors, workspace.regions.checks, settings, seed)
    run = run_summary(out, workspace)
    not_fitted, tuning = {}, {}
    for fold in range(1, saved["folds"] + 1):
        if (fold_folder(out, fold) / TUNING).is_file():
            tuning[fold] = json.loads((fold_folder(out, fold) / TUNING).read_text())
        path = fold_folder(out, fold) / "not_fitted.json"
        if path.is_file():
            for method, why in json.loads(path.read_text()).items():
                not_fitted.setdefault(method, []).append(f"fold {fold}: {why}")
    return Evaluation(
        errors=errors,
        summary=summarise(errors, seed),
        tests=tests,
        headlines=with_skill(headlines(tests), skill),
        skill=skill,
        coverage=coverage_table(pairs, bounds, names, edges),
        conformal=conformal,
        by_horizon=grouped(errors.assign(horizon=horizon_bins(errors["years"])), "horizon"),
        by_diagnosis=grouped(errors, "diagnosis"),
        truth_summary=truth_summary,
        truth_tests=truth_tests,
        noise_floor=noise_floor(workspace.layout, workspace.regions),
        data={
            "folds": saved["folds"],
            "fold_seed": saved["seed"],
            "participants": len(saved["assignment"]),
            "forecast_participants": int(pairs["participant_id"].nunique()),
            "pairs": len(pairs),
            "horizon_years": [float(pairs["years"].min()), float(pairs["years"].max())],
            "phantom_floor": floor is not None,
            "observed_change": settings.observed_change,
            "primary_region": settings.primary_region,
            "level": settings.level,
            "not_fitted": not_fitted,
            "tuning": tuning,
            "members": run["members"],
            "bands_years": list(edges),
            "network_interval": (
                "conformal, each fold calibrated on the other folds' participants, a quantile "
                f"per horizon band ({', '.join(band_labels(edges))})"
                if not conformal.empty
                else "none: single-member networks have no spread (evaluate --members 2 or more)"
            ),
            "run": run,
        },
        regions=tuple(names),
    )


def run_summary(out: Path, workspace) -> dict:
    """How the folds were run (from fold 1's stamp; :func:`check_folds` holds every fold to
    it): working grid (mm), epochs, training pairs drawn per epoch (0: all), network
    channels, whether the network's forecast scans were measured, and the declared
    covariates every model conditioned on."""
    stamp = json.loads((fold_folder(out, 1) / STAMP).read_text())
    training, network = stamp["config"]["training"], stamp["config"]["network"]
    spacing = np.linalg.norm(workspace.grid_affine[:3, :3], axis=0)
    return {
        "grid_mm": [round(float(v), 3) for v in spacing],
        "epochs": training["epochs"],
        "max_pairs_per_epoch": training["max_pairs_per_epoch"],
        "channels": network["channels"],
        "scan_volumes": stamp["measure"],
        "members": stamp.get("members", 1),
        "covariates": list(workspace.cohort.covariate_names),
    }


def conformal_scores(forecasts: pd.DataFrame, pairs: pd.DataFrame, names, seed: int, edges):
    """The network's held-out conformal scores (its Jacobian volumes against the observed
    follow-ups) with each fold's cross-fitted interval (:func:`predictor.ensemble.cross_fitted`);
    empty where the folds' networks had one member (no scale)."""
    if "scale_ml" not in forecasts:
        return pd.DataFrame()
    rows = forecasts[(forecasts["method"] == JACOBIAN) & forecasts["scale_ml"].notna()]
    if rows.empty:
        return pd.DataFrame()
    observed = pairs.melt(
        id_vars=["base_key", "follow_key", "diagnosis"], value_vars=[f"{r}_follow" for r in names],
        var_name="region", value_name="observed_ml",
    )  # fmt: skip
    observed["region"] = observed["region"].str.removesuffix("_follow")
    table = rows.merge(observed, on=["base_key", "follow_key", "region"], validate="one_to_one")
    columns = ["participant_id", "fold", "diagnosis", "base_key", "follow_key", "years",
               "region", "forecast_ml", "observed_ml", "scale_ml"]  # fmt: skip
    return cross_fitted(score_table(table[columns]), LEVEL, seed, edges).reset_index(drop=True)


# --- subject-specific skill and coverage ---------------------------------------------------
def annual_change(errors: pd.DataFrame) -> pd.DataFrame:
    """Per participant, region and method: forecast and observed annualised change (% of
    the baseline volume per year), each the least-squares slope through the origin of the
    participant's relative changes on their horizons, sum(c t) / sum(t^2): long horizons,
    whose change is least swamped by measurement noise, weigh the most."""
    years = errors["years"]
    frame = errors.assign(
        predicted=100 * (errors["forecast_ml"] / errors["baseline_ml"] - 1) * years,
        observed=100 * (errors["observed_ml"] / errors["baseline_ml"] - 1) * years,
        weight=years**2,
    )
    keys = ["region", "method", "participant_id"]
    sums = frame.groupby(keys, sort=False)[["predicted", "observed", "weight"]].sum()
    sums[["predicted", "observed"]] = sums[["predicted", "observed"]].div(sums["weight"], axis=0)
    return sums[["predicted", "observed"]].reset_index()


def fit_quality(predicted: np.ndarray, observed: np.ndarray) -> tuple[float, float]:
    """(calibration slope of observed on predicted, R^2 = 1 - SS_error / SS_observed).

    R^2 is out of sample: it is negative when the forecasts are worse than the observed
    mean, and the slope is NaN when the forecasts do not vary (no change)."""
    spread = np.sum((observed - observed.mean()) ** 2)
    r2 = 1.0 - np.sum((observed - predicted) ** 2) / spread if spread > 0 else np.nan
    centred = predicted - predicted.mean()
    scale = np.sum(centred**2)
    slope = (
        float(np.sum(centred * (observed - observed.mean())) / scale) if scale > 1e-12 else np.nan
    )
    return slope, float(r2)


def skill_table(errors: pd.DataFrame, checks, settings: CompareSettings, seed: int):
    """Per region and method: calibration slope and R^2 of individual annualised change,
    and for each network variant its R^2 gain over the population field with a
    participant-cluster bootstrap CI (resampling participants, both R^2 recomputed)."""
    change = annual_change(errors)
    rng = seeded_rng(seed, 37)
    rows = []
    for (region, method), group in change.groupby(["region", "method"], sort=False):
        slope, r2 = fit_quality(group["predicted"].to_numpy(), group["observed"].to_numpy())
        row = {"region": region, "method": method, "participants": len(group),
               "calibration_slope": slope, "r2": r2, "r2_gain_over_population": np.nan,
               "gain_ci_low": np.nan, "gain_ci_high": np.nan}  # fmt: skip
        population = change[(change["region"] == region) & (change["method"] == POPULATION)]
        if method in NETWORKS and len(population) and region not in checks:
            both = group.merge(population, on="participant_id", suffixes=("", "_pop"))
            gain, low, high = r2_gain(both, rng, settings)
            row |= {"r2_gain_over_population": gain, "gain_ci_low": low, "gain_ci_high": high}
        rows.append(row)
    return pd.DataFrame(rows)


def r2_gain(both: pd.DataFrame, rng, settings: CompareSettings) -> tuple[float, float, float]:
    """R^2 of a network minus the population field's on the same participants, with its
    percentile bootstrap CI over participants."""
    observed = both["observed"].to_numpy()
    mine, theirs = both["predicted"].to_numpy(), both["predicted_pop"].to_numpy()

    def gain(index):
        return (
            fit_quality(mine[index], observed[index])[1]
            - fit_quality(theirs[index], observed[index])[1]
        )

    estimate = gain(np.arange(len(observed)))
    if len(observed) < 3:
        return estimate, np.nan, np.nan
    draws = [gain(rng.integers(0, len(observed), len(observed))) for _ in range(settings.bootstrap)]
    tail = (1 - settings.level) / 2
    low, high = np.nanquantile(draws, [tail, 1 - tail])
    return estimate, float(low), float(high)


def with_skill(headline: pd.DataFrame, skill: pd.DataFrame) -> pd.DataFrame:
    """Subject-specific skill is "shown" only where the network variant is better than the
    population field (paired errors) *and* its R^2 gain over it has a CI above zero."""
    gains = skill.set_index(["region", "method"])["gain_ci_low"]
    out = headline.copy()
    for index, row in out.iterrows():
        if row["subject_specific_skill"] == "shown":
            low = gains.get((row["region"], row["network"]), np.nan)
            if not (np.isfinite(low) and low > 0):
                out.loc[index, "subject_specific_skill"] = "not shown (R^2 gain not above zero)"
    return out


def coverage_table(
    pairs: pd.DataFrame, bounds: dict[str, np.ndarray], names, edges
) -> pd.DataFrame:
    """Share of pairs whose observed follow-up volume lies inside each method's interval,
    overall, by horizon (whole years), by the network's calibration band (upper
    ``edges``, years) and by diagnosis; the nominal level beside it."""
    observed = pairs[[f"{r}_follow" for r in names]].to_numpy()
    horizon = horizon_bins(pairs["years"]).to_numpy()
    band = np.asarray(band_labels(edges), dtype=object)[band_of(pairs["years"], edges)]
    groups = [("all", np.full(len(pairs), "all"))]
    groups += [("horizon", horizon), ("band", band), ("diagnosis", pairs["diagnosis"].to_numpy())]
    rows = []
    for method, interval in bounds.items():
        inside = (interval[..., 0] <= observed) & (observed <= interval[..., 1])
        known = ~np.isnan(interval).any(axis=-1)  # an infinite interval covers
        for j, region in enumerate(names):
            for kind, labels in groups:
                for label in sorted(set(labels)):
                    chosen = (labels == label) & known[:, j]
                    if not chosen.any():
                        continue
                    rows.append(
                        {"method": method, "region": region, "grouping": kind, "group": label,
                         "pairs": int(chosen.sum()),
                         "participants": int(pairs.loc[chosen, "participant_id"].nunique()),
                         "coverage": float(inside[chosen, j].mean()), "nominal": LEVEL}
                    )  # fmt: skip
    return pd.DataFrame(rows)


# --- the command ---------------------------------------------------------------------------
def evaluate(
    work: str | os.PathLike[str],
    out: str | os.PathLike[str],
    folds: int = 5,
    config: TrainConfig | None = None,
    fold: int | None = None,
    jobs: int = 1,
    seed: int = 0,
    settings: CompareSettings | None = None,
    measure: bool = True,
    progress=None,
    tune: TuneSettings | None = None,
    members: int = 1,
) -> Evaluation | None:
    """Cross-validate on a prepared workspace into ``out``.

    With ``fold``, only that fold is run (None returned); without, every unfinished fold
    is run and the folds are collected. ``config`` defaults to ``configs/train.toml``,
    ``settings`` (primary region, CI level, observed change) to ``configs/compare.toml``.
    Without ``measure`` the network's forecast scans are not measured (only its own
    Jacobian-integral volumes are scored), which saves most of the forecasting time.
    ``tune`` (``configs/evaluate.toml``) chooses a loss weight per fold on inner validation.
    ``members``: each fold's network and population field are ensembles of this many
    members (see the module docstring).
    """
    out = Path(out)
    config = config or TrainConfig.from_toml()
    settings = settings or CompareSettings.from_toml()
    if tune is not None and config.training.monitor != "val_volume_error":
        raise DataError(
            '--tune needs monitor = "val_volume_error" under [training]: the validation '
            "loss is weighted by the very weight being tuned"
        )
    if tune is not None and members > 1:
        raise DataError("--tune with --members is not supported: tune with one member first")
    if members < 1:
        raise DataError(f"--members must be 1 or more, got {members}")
    saved = start_folds(read_workspace(work).volumes, out, folds, seed)
    if fold is not None and not 1 <= fold <= saved["folds"]:
        raise DataError(f"--fold must be within 1..{saved['folds']}, got {fold}")
    chosen = [fold] if fold is not None else range(1, saved["folds"] + 1)
    for k in chosen:
        run_fold(work, out, k, config, seed, jobs, measure, progress, tune,
                 settings.observed_change, members)  # fmt: skip
    if fold is not None:
        return None
    return collect(work, out, settings, seed)
