"""``predictor compare``: the network against the regression forecasters on held-out participants.

On the model's test participants (its saved split), every baseline ->
follow-up pair is forecast by

* the network: the forecast scan is measured by the same measurement as the
  real follow-up (the segmentation of ``prepare_scan``; with the observed change
  by registration, the change from the baseline visit to the forecast scan by
  registration for the regions with a boundary), with the Jacobian-integral
  volume kept beside it;
* every regression forecaster of :mod:`predictor.regression`, refitted here
  on the model's training participants only;
* on phantom cohorts, the generator's best observable forecast (its ratio
  applied to the measured baseline): the irreducible error, a floor.

Errors are forecast minus observed follow-up volume, reported in mL, as % of
the participant's total brain volume at baseline (the headline measure) and
as % of the region's observed volume. Image agreement (MAE and SSIM inside
the brain, Dice of tissue labels) is measured on the working grid, in
template space and normalised intensities, for the network and no change.
"""

from __future__ import annotations

import json
import os
import warnings
from dataclasses import dataclass, replace
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
from scipy import ndimage, stats

from predictor.config import load_settings
from predictor.errors import DataError, PredictorError
from predictor.forecast import as_ensemble, check_grid, forecast, prepare_for
from predictor.longitudinal import Visit, noise_floor, observed_by_registration, pair_change
from predictor.nifti import load_scan
from predictor.pairs import SETS, visit_pairs
from predictor.parallel import run_all
from predictor.prepare import PrepareSettings, read_prepared
from predictor.regions import TOTAL_BRAIN, RegionSet
from predictor.regression import all_forecasters, baseline_rows, check_table
from predictor.rng import seeded_rng
from predictor.workspace import Layout, ScanFiles, read_workspace

#: the network's volumes measured on its forecast scans, and its own Jacobian-integral volumes
NETWORK, JACOBIAN = "network", "network-jacobian"
FLOOR = "floor (best possible)"
#: the same network and training with the template as everyone's image input
POPULATION = "population-field"
NETWORKS = (NETWORK, JACOBIAN)
BOOTSTRAP = 2000


@dataclass(frozen=True)
class Comparison:
    """Every table of a comparison (all pandas DataFrames)."""

    errors: pd.DataFrame  # one row per pair, region and method
    summary: pd.DataFrame  # region x method: n, mean, SD, median, 95% CI (% of brain volume)
    tests: pd.DataFrame  # region x network variant x comparator, participant level
    headlines: pd.DataFrame  # region x network variant: better / worse than how many
    images: pd.DataFrame  # one row per pair and method: MAE, SSIM, Dice
    by_horizon: pd.DataFrame
    by_diagnosis: pd.DataFrame
    consistency: pd.DataFrame  # measured vs Jacobian-integral network volumes
    noise_floor: pd.DataFrame  # the change measurement's scan-rescan noise floor (or empty)
    data: dict  # counts describing the data and the split
    examples: list  # (title, baseline, follow-up, forecast) working-grid T1 (X, Y, Z)
    regions: tuple[str, ...]  # the regions compared, in report order


def check_split(split: dict) -> None:
    """Raise DataError naming any participant that is in two sets of a split."""
    for i, first in enumerate(SETS):
        for second in SETS[i + 1 :]:
            shared = sorted(set(split.get(first, [])) & set(split.get(second, [])))
            if shared:
                raise DataError(
                    f"leaked split: participant(s) {', '.join(shared)} are in both the "
                    f"{first} and {second} sets; the comparison would be biased"
                )


# --- image agreement ----------------------------------------------------------------------
def ssim_map(a: np.ndarray, b: np.ndarray, data_range: float, sigma: float = 1.5) -> np.ndarray:
    """Structural similarity map (Wang et al. 2004, IEEE TIP): Gaussian window, K1 .01, K2 .03.

    Population (not sample) covariances, window truncated at 3.5 sigma, as
    scikit-image's ``structural_similarity(gaussian_weights=True)``.
    """
    c1, c2 = (0.01 * data_range) ** 2, (0.03 * data_range) ** 2

    def blur(x):
        return ndimage.gaussian_filter(x, sigma, truncate=3.5, mode="reflect")

    a, b = a.astype(np.float64), b.astype(np.float64)
    mean_a, mean_b = blur(a), blur(b)
    var_a = blur(a * a) - mean_a**2
    var_b = blur(b * b) - mean_b**2
    covariance = blur(a * b) - mean_a * mean_b
    numerator = (2 * mean_a * mean_b + c1) * (2 * covariance + c2)
    return numerator / ((mean_a**2 + mean_b**2 + c1) * (var_a + var_b + c2))


def image_agreement(
    forecast_t1, forecast_tissue, observed_t1, observed_tissue, mask
) -> dict[str, float]:
    """MAE and mean SSIM inside ``mask``, and Dice of the most likely tissue (GM, WM, CSF).

    Arrays are on the working grid: T1 (X, Y, Z) normalised (white matter
    = 1), tissue (X, Y, Z, 3) probabilities, mask boolean.
    """
    mae = float(np.abs(forecast_t1 - observed_t1)[mask].mean())
    ssim = float(ssim_map(forecast_t1, observed_t1, data_range=1.5)[mask].mean())
    labels_a = np.argmax(forecast_tissue, axis=-1)
    labels_b = np.argmax(observed_tissue, axis=-1)
    scores = {"mae": mae, "ssim": ssim}
    for index, tissue in enumerate(("gm", "wm", "csf")):
        a, b = (labels_a == index) & mask, (labels_b == index) & mask
        scores[f"dice_{tissue}"] = float(2 * (a & b).sum() / max(a.sum() + b.sum(), 1))
    return scores


# --- the network's forecasts of one test participant -----------------------------------
def _grid_arrays(files: ScanFiles):
    t1 = np.asarray(nib.load(files.t1).dataobj, dtype=np.float32)
    mask = np.asarray(nib.load(files.mask).dataobj) > 0
    tissue = np.asarray(nib.load(files.tissue).dataobj, dtype=np.float32)
    return t1, mask, tissue


def network_pairs(
    model_dir: str,
    work: str,
    pairs: pd.DataFrame,
    population_dir: str | None = None,
    measure: bool = True,
    observed_change: str = "segmentation",
) -> list[dict]:
    """Network forecasts of one participant's pairs (same baseline), measured like real scans.

    Returns one dict per pair: measured and Jacobian volumes (mL) and the
    image agreement of the forecast and of no change with the real follow-up
    (without ``measure``, only the Jacobian volumes: the forecast scans are not
    measured, the slowest step). With ``observed_change="registration"`` the
    regions that the observed change takes from registration (those with a
    boundary, :func:`~predictor.longitudinal.observed_by_registration`) are
    measured the same way on the forecast: its baseline volume times the change
    from the baseline visit to the forecast scan by
    :func:`~predictor.longitudinal.pair_change`;
    with ``population_dir``, the population-field model's Jacobian volumes of
    the participant's own regions (``population_<region>``); with an ensemble, the
    scale of the conformal score of each Jacobian volume (``scale_<region>``, mL); the
    longest-horizon pair also carries its working-grid images (``example``).
    """
    ensemble = as_ensemble(model_dir)
    model = ensemble.lead
    first = pairs.iloc[0]
    layout = Layout(Path(work))
    image = layout.read_cohort().set_index("key").loc[first.base_key, "image"]
    scan = load_scan(image)
    if prepared_like(layout, model):  # the workspace's cached preparation is the model's
        prepared = read_prepared(layout.scan(first.base_key), scan, model.info.region_set)
        check_grid(model, prepared)
    else:
        prepared = prepare_for(model, scan)
    horizons = pairs["years"].tolist()
    absent = [name for name in model.info.coding.covariate_names if name not in pairs.columns]
    if absent:
        raise DataError(f"{work}: prepared without covariate '{absent[0]}' the model needs")
    covariates = {name: first[name] for name in model.info.coding.covariate_names}
    result = forecast(ensemble, scan, first.age, first.sex, first.diagnosis, horizons,
                      prepared=prepared, covariates=covariates)  # fmt: skip
    table = result.volumes.set_index(["region", "years"])
    jacobian, scale = table["network_ml"], table["network_scale_ml"]
    population = None
    if population_dir is not None:
        field = forecast(as_ensemble(population_dir), scan, first.age, first.sex, first.diagnosis,
                         horizons, prepared=prepared, interpolation="linear",
                         covariates=covariates)  # fmt: skip
        population = field.volumes.set_index(["region", "years"])["network_ml"]
    base_t1, base_mask, base_tissue = _grid_arrays(layout.scan(first.base_key))
    rows = []
    for horizon, pair in zip(result.horizons, pairs.itertuples(index=False), strict=True):
        row = {"base_key": pair.base_key, "follow_key": pair.follow_key}
        for region in model.info.region_set.names:
            row[f"jacobian_{region}"] = float(jacobian.loc[(region, horizon.years)])
            row[f"scale_{region}"] = float(scale.loc[(region, horizon.years)])
            if population is not None:
                row[f"population_{region}"] = float(population.loc[(region, horizon.years)])
        if not measure:
            rows.append(row)
            continue
        measured = prepare_for(model, replace(scan, data=horizon.image))
        follow_t1, follow_mask, follow_tissue = _grid_arrays(layout.scan(pair.follow_key))
        mask = base_mask | follow_mask
        for region in model.info.region_set.names:
            row[f"measured_{region}"] = measured.volumes[region]
        if observed_change == "registration":
            for region, ratio in registered_change(model, prepared, measured).items():
                row[f"measured_{region}"] = prepared.volumes[region] * ratio
        network = image_agreement(
            measured.grid_t1, measured.grid_tissue, follow_t1, follow_tissue, mask
        )
        still = image_agreement(base_t1, base_tissue, follow_t1, follow_tissue, mask)
        row |= {f"network_{k}": v for k, v in network.items()}
        row |= {f"no_change_{k}": v for k, v in still.items()}
        if horizon.years == max(horizons):
            title = f"{first.participant_id} ({first.diagnosis}), +{horizon.years:.1f} y"
            row["example"] = (title, base_t1, follow_t1, measured.grid_t1)
        rows.append(row)
    return rows


def prepared_like(layout: Layout, model) -> bool:
    """Whether the workspace was prepared as the model prepares a scan (template, settings,
    regions), so that its cached preparations are what the model would compute."""
    stored = json.loads(layout.prepare_json.read_text())
    info = model.info
    return (stored["template"], stored["settings"], stored["regions"]) == (
        info.template, info.prepare_settings, info.regions
    )


def registered_change(model, baseline, forecast) -> dict[str, float]:
    """Volume ratio forecast / baseline of each region with a boundary, by registration of
    the two prepared scans (the observed change's measurement); {} where it fails, so the
    forecast keeps its segmentation volumes, as an observed pair without a change does."""
    regions = model.info.region_set
    # only the boundary regions' ratios are kept: their boundary shift needs no demons
    settings = replace(PrepareSettings.from_dict(model.info.prepare_settings).longitudinal,
                       demons=False)  # fmt: skip
    try:
        ratio = pair_change(Visit.of(baseline), Visit.of(forecast), regions, settings)["ratio"]
    except (PredictorError, RuntimeError):
        return {}
    return {
        r.name: ratio[r.name] for r in regions.regions if r.boundary is not None and r.name in ratio
    }


# --- the comparison ------------------------------------------------------------------------
def baseline_pairs(volumes: pd.DataFrame, participants, regions, covariates=()) -> pd.DataFrame:
    """Pairs from each participant's first visit to every later visit, with the
    ``covariates`` columns of the first visit."""
    pairs = visit_pairs(volumes, participants, regions, tuple(covariates))
    first = volumes.groupby("participant_id")["key"].first()
    pairs = pairs[pairs["base_key"].to_numpy() == first.loc[pairs["participant_id"]].to_numpy()]
    sessions = volumes.set_index("key")["session_id"]
    return pairs.assign(session_id=sessions.loc[pairs["follow_key"]].to_numpy()).reset_index(
        drop=True
    )


def regression_forecasts(
    volumes, train, pairs, regions: RegionSet, coding, seed: int, jobs: int
) -> tuple[dict[str, np.ndarray], dict[str, str]]:
    """Every regression forecaster fitted on ``train`` participants, on every region of
    ``regions`` (ridge and SVR see every baseline volume over the intracranial volume).

    Returns ({method: (P, R, 3) mean, lower and upper 90% bound in mL}, {method: why it
    could not be fitted}): a forecaster that cannot be fitted on these participants (too
    few for its parameters) is left out with its reason, and never stops the comparison.
    """
    names = regions.names
    table = volumes[volumes["participant_id"].isin(set(train))]
    starts = baseline_rows(check_table(volumes[volumes["key"].isin(pairs["base_key"])], names))
    horizons = sorted(set(pairs["years"]))
    keys = list(zip(pairs["participant_id"], pairs["years"], strict=True))
    out, not_fitted = {}, {}
    forecasters = all_forecasters(seed, regions.head_size, jobs, coding)
    for name, forecaster in forecasters.items():
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)
                forecaster.fit(table, list(names))
        except (DataError, np.linalg.LinAlgError, ValueError) as error:
            not_fitted[name] = str(error)
            continue
        predicted = forecaster.predict(starts, horizons).set_index(
            ["region", "participant_id", "years"]
        )[["mean_ml", "lower_ml", "upper_ml"]]
        out[name] = np.stack([predicted.loc[region].loc[keys].to_numpy() for region in names], 1)
    return out, not_fitted


def phantom_floor(work: Path, pairs: pd.DataFrame, names) -> np.ndarray | None:
    """The generator's best forecast ratio applied to the measured baseline, (P, R) mL.

    None unless the cohort is a phantom cohort with its ground truth beside it.
    """
    return _phantom_ratio(work, pairs, names, "best_forecast_volumes.tsv")


def phantom_true_follow_up(work: Path, pairs: pd.DataFrame, names) -> np.ndarray | None:
    """The measured baseline times the phantom's *true* change to each follow-up, (P, R) mL:
    the follow-up a perfect change measurement would report (None unless a phantom cohort)."""
    return _phantom_ratio(work, pairs, names, "true_volumes.tsv")


def _phantom_ratio(work: Path, pairs: pd.DataFrame, names, table: str) -> np.ndarray | None:
    """The measured baseline times a phantom truth table's volume at the follow-up over the
    true baseline volume; NaN for a region the truth does not have."""
    cohort = Layout(work).read_cohort()
    truth_folder = _phantom_truth(Path(cohort["image"].iloc[0]))
    if truth_folder is None:
        return None
    truth = pd.read_csv(truth_folder / "true_volumes.tsv", sep="\t")
    later = pd.read_csv(truth_folder / table, sep="\t")
    truth = truth.set_index(["participant_id", "session_id"])
    later = later.set_index(["participant_id", "session_id"])
    first = truth.groupby(level="participant_id").head(1).droplevel("session_id")
    known = [name for name in names if name in later.columns]  # a region of the user's own: NaN
    rows = []
    for pair in pairs.itertuples(index=False):
        ratio = later.loc[(pair.participant_id, pair.session_id), known].to_numpy(float)
        ratio = ratio / first.loc[pair.participant_id, known].to_numpy(float)
        row = dict(zip(known, ratio * np.array([getattr(pair, r) for r in known]), strict=True))
        rows.append([row.get(name, np.nan) for name in names])
    return np.array(rows)


def _population(folder, model) -> str:
    """The population-field model folder, checked against the model it is compared with."""
    population = as_ensemble(folder).lead  # members share the split and the input
    if population.info.config["training"]["image_input"] != "template":
        raise DataError(f"{folder}: not a population-field model (image_input is not template)")
    if population.info.split != model.info.split:  # an ensemble's members share the split
        raise DataError(f"{folder}: trained on another participant split than the model")
    return str(Path(folder).resolve())


def _phantom_truth(image: Path) -> Path | None:
    for folder in image.parents:
        candidate = folder / "derivatives" / "phantom-truth"
        if (candidate / "best_forecast_volumes.tsv").is_file():
            return candidate
    return None


def compare(
    model_dir: str | os.PathLike[str],
    work: str | os.PathLike[str],
    jobs: int = 1,
    seed: int = 0,
    progress=None,
    settings: CompareSettings | None = None,
    population: str | os.PathLike[str] | None = None,
) -> Comparison:
    """Compare the model with every regression forecaster on its test participants.

    ``settings`` (primary region, CI level, resamples) default to ``configs/compare.toml``.
    ``population`` is a population-field model folder (``image_input = "template"``,
    trained on the same workspace and split): the comparator that shows whether the
    network's use of the participant's own scan adds anything to age, sex and diagnosis.
    """
    settings = settings or CompareSettings.from_toml()
    model = as_ensemble(model_dir).lead  # every member shares the test participants
    split = model.info.split
    check_split(split)
    workspace = read_workspace(work)
    volumes, names = workspace.volumes, workspace.regions.names
    known = set(volumes["participant_id"])
    missing = sorted((set(split["test"]) | set(split["train"])) - known)
    if missing:
        raise DataError(f"{work}: the model's participants {', '.join(missing[:5])} are not here")
    pairs = baseline_pairs(
        volumes, split["test"], workspace.regions, workspace.cohort.covariate_names
    )
    if pairs.empty:
        raise DataError("the test participants have no follow-up visits to compare")
    if settings.observed_change == "registration":
        pairs = observed_by_registration(pairs, volumes, workspace.layout, workspace.regions)
    groups = [frame for _, frame in pairs.groupby("participant_id", sort=True)]
    population_dir = _population(population, model) if population is not None else None
    arguments = [
        (str(Path(model_dir).resolve()), str(Path(work).resolve()), group, population_dir,
         True, settings.observed_change)
        for group in groups
    ]  # fmt: skip
    measured = [row for rows in run_all(network_pairs, arguments, jobs, progress) for row in rows]
    examples = [row.pop("example") for row in measured if "example" in row][:3]
    measured = pd.DataFrame(measured)
    pairs = pairs.merge(measured, on=["base_key", "follow_key"], validate="one_to_one")
    methods = {
        NETWORK: pairs[[f"measured_{r}" for r in names]].to_numpy(),
        JACOBIAN: pairs[[f"jacobian_{r}" for r in names]].to_numpy(),
    }
    if population_dir is not None:
        methods[POPULATION] = pairs[[f"population_{r}" for r in names]].to_numpy()
    regressions, not_fitted = regression_forecasts(
        volumes, split["train"], pairs, workspace.regions, workspace.cohort, seed, jobs
    )
    methods |= {name: values[..., 0] for name, values in regressions.items()}
    floor = phantom_floor(Path(work), pairs, names)
    if floor is not None:
        methods[FLOOR] = floor
    errors = error_table(pairs, methods, names)
    summary = summarise(errors, seed)
    checks = workspace.regions.checks
    tests = paired_tests(errors, names, checks, settings, seed)
    return Comparison(
        errors=errors,
        summary=summary,
        tests=tests,
        headlines=headlines(tests),
        images=image_table(pairs),
        by_horizon=grouped(errors.assign(horizon=horizon_bins(errors["years"])), "horizon"),
        by_diagnosis=grouped(errors, "diagnosis"),
        consistency=consistency_table(pairs, names),
        noise_floor=noise_floor(workspace.layout, workspace.regions),
        data={
            "participants": {name: len(split[name]) for name in SETS},
            "test_pairs": len(pairs),
            "scans": len(volumes),
            "horizon_years": [float(pairs["years"].min()), float(pairs["years"].max())],
            "phantom_floor": floor is not None,
            "observed_change": settings.observed_change,
            "model": Path(model_dir).name,
            "not_fitted": not_fitted,
        },
        examples=examples,
        regions=tuple(names),
    )


def error_table(pairs: pd.DataFrame, methods: dict[str, np.ndarray], names) -> pd.DataFrame:
    """Long table of forecast errors: pair x region x method (mL and percentages; ``age``
    is the baseline's, ``years`` the interval)."""
    frames = []
    observed = pairs[[f"{r}_follow" for r in names]].to_numpy()
    baseline = pairs[list(names)].to_numpy()
    brain = pairs[TOTAL_BRAIN].to_numpy()[:, None]
    for method, values in methods.items():
        error = values - observed
        for j, region in enumerate(names):
            frames.append(
                pd.DataFrame(
                    {
                        "participant_id": pairs["participant_id"],
                        "session_id": pairs["session_id"],
                        "diagnosis": pairs["diagnosis"],
                        "age": pairs["age"],
                        "years": pairs["years"],
                        "region": region,
                        "method": method,
                        "baseline_ml": baseline[:, j],
                        "observed_ml": observed[:, j],
                        "forecast_ml": values[:, j],
                        "error_ml": error[:, j],
                        "abs_error_pct_tbv": 100 * np.abs(error[:, j]) / brain[:, 0],
                        "abs_error_pct_region": 100 * np.abs(error[:, j]) / observed[:, j],
                    }
                )
            )
    return pd.concat(frames, ignore_index=True)


def bootstrap_ci(values: np.ndarray, clusters: np.ndarray, rng, level: float = 0.95):
    """Percentile bootstrap CI of the mean, resampling whole participants (clusters)."""
    unique = np.unique(clusters)
    if len(unique) < 2:
        return float("nan"), float("nan")
    groups = [values[clusters == c] for c in unique]
    sums = np.array([g.sum() for g in groups])
    counts = np.array([len(g) for g in groups])
    draws = rng.integers(0, len(unique), size=(BOOTSTRAP, len(unique)))
    means = sums[draws].sum(axis=1) / counts[draws].sum(axis=1)
    tail = (1 - level) / 2
    return float(np.quantile(means, tail)), float(np.quantile(means, 1 - tail))


def summarise(errors: pd.DataFrame, seed: int) -> pd.DataFrame:
    """Per region and method: pairs (n), participants, mean, SD, median and bootstrap 95% CI
    of |error| (% TBV)."""
    rng = seeded_rng(seed, 17)
    rows = []
    for (region, method), group in errors.groupby(["region", "method"], sort=False):
        values = group["abs_error_pct_tbv"].to_numpy()
        low, high = bootstrap_ci(values, group["participant_id"].to_numpy(), rng)
        rows.append(
            {
                "region": region,
                "method": method,
                "n": len(values),
                "participants": group["participant_id"].nunique(),
                "mean_pct_tbv": values.mean(),
                "sd_pct_tbv": values.std(ddof=1) if len(values) > 1 else float("nan"),
                "median_pct_tbv": float(np.median(values)),
                "ci_low_pct_tbv": low,
                "ci_high_pct_tbv": high,
                "mean_pct_region": group["abs_error_pct_region"].mean(),
                "mean_abs_ml": group["error_ml"].abs().mean(),
            }
        )
    return pd.DataFrame(rows)


@dataclass(frozen=True)
class CompareSettings:
    """How forecasts are judged (``configs/compare.toml``)."""

    primary_region: str
    level: float
    bootstrap: int
    observed_change: str  # "registration" (changes.tsv) or "segmentation" (volumes.tsv)
    interval_bands_years: tuple[float, ...]  # upper edges of the conformal horizon bands

    def __post_init__(self):
        edges = np.asarray(self.interval_bands_years, dtype=float)
        if not len(edges) or not np.isfinite(edges).all() or (edges <= 0).any() or (
            np.diff(edges) <= 0
        ).any():
            raise ValueError(
                "'interval_bands_years' must be positive and increasing, got "
                f"{list(self.interval_bands_years)}"
            )
        if self.observed_change not in ("registration", "segmentation"):
            raise ValueError(
                f"'observed_change' must be 'registration' or 'segmentation', "
                f"got {self.observed_change!r}"
            )
        if not 0.5 < self.level < 1.0:
            raise ValueError(f"'level' must be within (0.5, 1), got {self.level}")
        if self.bootstrap < 100:
            raise ValueError(f"'bootstrap' must be at least 100, got {self.bootstrap}")

    @classmethod
    def from_toml(cls, path: str | os.PathLike[str] | None = None) -> CompareSettings:
        return load_settings(cls, "compare.toml", path)


def participant_means(errors: pd.DataFrame) -> pd.DataFrame:
    """Mean |error| (% TBV) of each participant over its pairs: rows participants,
    columns (region, method). Each participant then counts once."""
    return errors.pivot_table(
        index="participant_id", columns=["region", "method"], values="abs_error_pct_tbv",
        aggfunc="mean", sort=False,
    )  # fmt: skip


def cluster_bootstrap_ci(values: np.ndarray, rng, resamples: int, level: float):
    """Percentile bootstrap CI of the mean of one value per participant (resampled whole)."""
    values = np.asarray(values, dtype=float)
    if len(values) < 2:
        return float("nan"), float("nan")
    draws = rng.integers(0, len(values), size=(resamples, len(values)))
    means = values[draws].mean(axis=1)
    tail = (1 - level) / 2
    return float(np.quantile(means, tail)), float(np.quantile(means, 1 - tail))


def holm(p_values) -> np.ndarray:
    """Holm's (1979) step-down adjusted p-values: the i-th smallest of m times (m - i + 1),
    running maximum, capped at 1 (statsmodels' ``multipletests(method="holm")`` gives the
    same, but collects garbage on every call)."""
    raw = np.asarray(p_values, dtype=float)
    order = np.argsort(raw, kind="stable")
    stepped = np.maximum.accumulate(raw[order] * (len(raw) - np.arange(len(raw))))
    adjusted = np.empty_like(raw)
    adjusted[order] = np.minimum(stepped, 1.0)
    return adjusted


def paired_tests(errors: pd.DataFrame, names, checks, settings: CompareSettings, seed: int):
    """Each network variant against every comparator, region by region, per participant.

    For participant i, d_i = (network's mean |error|) - (comparator's), in % of
    total brain volume; the table gives the mean of d, its participant-cluster
    bootstrap CI, and an exact sign test on the participants (scipy's binomtest).
    The primary region is tested without correction; the other target regions
    with Holm's correction within each (variant, comparator) family; ``checks``
    (reference regions, whole brain) are reported, never won. A method is better
    only when the CI of the difference excludes zero and its sign test is significant.
    """

    if settings.primary_region not in names or settings.primary_region in checks:
        raise DataError(
            f"primary region '{settings.primary_region}' is not a target region here "
            f"({', '.join(n for n in names if n not in checks)}); set it in configs/compare.toml"
        )
    means = participant_means(errors)
    methods = list(dict.fromkeys(errors["method"]))
    comparators = [m for m in methods if m not in (*NETWORKS, FLOOR)]
    rng = seeded_rng(seed, 19)
    rows = []
    for variant in [v for v in NETWORKS if v in methods]:
        for comparator in comparators:
            family = []
            for region in names:
                both = means[[(region, variant), (region, comparator)]].dropna()
                difference = (both.iloc[:, 0] - both.iloc[:, 1]).to_numpy()
                low, high = cluster_bootstrap_ci(
                    difference, rng, settings.bootstrap, settings.level
                )
                better = int((difference < 0).sum())
                decided = int((difference != 0).sum())
                sign_p = stats.binomtest(better, decided, 0.5).pvalue if decided else 1.0
                role = (
                    "check" if region in checks
                    else "primary" if region == settings.primary_region
                    else "secondary"
                )  # fmt: skip
                family.append(
                    {
                        "region": region, "network": variant, "comparator": comparator,
                        "role": role, "participants": len(difference),
                        "network_mean_pct_tbv": float(both.iloc[:, 0].mean()),
                        "comparator_mean_pct_tbv": float(both.iloc[:, 1].mean()),
                        "difference_pct_tbv": float(difference.mean()),
                        "ci_low_pct_tbv": low, "ci_high_pct_tbv": high,
                        "participants_better": better, "sign_test_p": float(sign_p),
                    }
                )  # fmt: skip
            secondary = [row for row in family if row["role"] == "secondary"]
            if secondary:
                adjusted = holm([row["sign_test_p"] for row in secondary])
                for row, p in zip(secondary, adjusted, strict=True):
                    row["holm_p"] = float(p)
            for row in family:
                row.setdefault("holm_p", row["sign_test_p"] if row["role"] == "primary" else np.nan)
                row["verdict"] = _verdict(row, 1 - settings.level)
            rows += family
    return pd.DataFrame(rows)


def _verdict(row: dict, alpha: float) -> str:
    """Better or worse only when the bootstrap CI excludes zero *and* the sign test (Holm-
    adjusted, uncorrected for the primary region) is below ``alpha``: a percentile bootstrap
    of a handful of participants excludes zero far too easily (with 3 participants all on
    one side it always does, while the exact sign test cannot go below p = 0.25)."""
    if row["role"] == "check":
        return "check"
    significant = row["holm_p"] < alpha
    if row["ci_high_pct_tbv"] < 0 and significant:
        return "network better"
    if row["ci_low_pct_tbv"] > 0 and significant:
        return "comparator better"
    return "no difference shown"


def headlines(tests: pd.DataFrame) -> pd.DataFrame:
    """Per region and network variant: against how many comparators it is better or worse.

    ``subject_specific_skill`` is "shown" only where the variant beats the population
    field (the same network fed the template), "not shown" otherwise, and "not tested"
    without a population-field model.
    """
    rows = []
    for (region, variant), group in tests.groupby(["region", "network"], sort=False):
        role = group["role"].iloc[0]
        better = group.loc[group["verdict"] == "network better", "comparator"].tolist()
        worse = group.loc[group["verdict"] == "comparator better", "comparator"].tolist()
        if role == "check":
            verdict = "check, not a region to win"
        elif worse:
            verdict = "worse than " + ", ".join(worse)
        elif len(better) == len(group):
            verdict = "better than every comparator"
        else:
            verdict = f"better than {len(better)} of {len(group)} comparators"
        skill = "not tested"
        if POPULATION in set(group["comparator"]) and role != "check":
            skill = "shown" if POPULATION in better else "not shown"
        rows.append(
            {"region": region, "network": variant, "role": role, "better_than": len(better),
             "worse_than": len(worse), "comparators": len(group), "verdict": verdict,
             "subject_specific_skill": skill}
        )  # fmt: skip
    return pd.DataFrame(rows)


def image_table(pairs: pd.DataFrame) -> pd.DataFrame:
    """Image agreement with the real follow-up: one row per pair and method."""
    rows = []
    for pair in pairs.to_dict("records"):
        for method, prefix in ((NETWORK, "network_"), ("no-change", "no_change_")):
            rows.append(
                {
                    "participant_id": pair["participant_id"],
                    "session_id": pair["session_id"],
                    "years": pair["years"],
                    "method": method,
                }
                | {k: pair[prefix + k] for k in ("mae", "ssim", "dice_gm", "dice_wm", "dice_csf")}
            )
    return pd.DataFrame(rows)


def horizon_bins(years: pd.Series) -> pd.Series:
    """Horizons rounded to whole years, as labels ('1 y', '2 y', ...)."""
    return years.round().astype(int).clip(lower=1).astype(str) + " y"


def grouped(errors: pd.DataFrame, by: str) -> pd.DataFrame:
    """Mean |error| (% TBV) and pair count per group, region and method."""
    table = errors.groupby([by, "region", "method"], sort=True)["abs_error_pct_tbv"]
    return table.agg(["count", "mean"]).reset_index().rename(
        columns={"count": "n", "mean": "mean_pct_tbv"}
    )


def consistency_table(pairs: pd.DataFrame, names) -> pd.DataFrame:
    """Network volumes measured on the forecast scan against the Jacobian integral (mL)."""
    rows = []
    for region in names:
        measured, jacobian = pairs[f"measured_{region}"], pairs[f"jacobian_{region}"]
        rows.append(
            {
                "region": region,
                "mean_measured_ml": measured.mean(),
                "mean_jacobian_ml": jacobian.mean(),
                "mean_abs_difference_pct": (100 * (measured - jacobian).abs() / jacobian).mean(),
            }
        )
    return pd.DataFrame(rows)
