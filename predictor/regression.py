"""Volume forecasters: mixed effects, SVR, ridge, no change, population rate, trimmed refits.

Every forecaster follows scikit-learn's conventions: the constructor stores
settings, :meth:`fit` validates a wide volume table (one row per scan:
participant_id, age in years, sex, diagnosis and one column per region in
mL, and a column per covariate the ``coding`` declares) and learns attributes
ending in ``_``, and :meth:`predict` takes one
baseline row per participant and horizons in years and returns a long table

    participant_id, region, years, mean_ml, sd_ml, lower_ml, upper_ml

with a predictive standard deviation and a 90% interval. Mixed-effects
intervals come from the fitted variance components; the others are
split-conformal: the model is fitted on 75% of the training participants and
the interval half-width is the conformal quantile of the remaining
participants' absolute errors, scaled by the horizon.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

from predictor.config import CohortSettings
from predictor.covariates import Encoder
from predictor.errors import DataError

LEVEL = 0.90
Z90 = float(stats.norm.ppf(0.5 + LEVEL / 2))
CALIBRATION_SHARE = 0.25
#: horizon (years) below which conformal scores are not scaled down further
MIN_SCALE_YEARS = 0.5
#: fixed-effects designs of the mixed model, largest first (see MixedEffectsForecaster)
DESIGNS = ("age-by-time", "diagnosis-by-time", "rate")
PREDICTION_COLUMNS = (
    "participant_id",
    "region",
    "years",
    "mean_ml",
    "sd_ml",
    "lower_ml",
    "upper_ml",
)


# --- table preparation --------------------------------------------------------------
@dataclass(frozen=True)
class Pairs:
    """Baseline -> follow-up pairs of one region, arrays of shape (P,)."""

    participant: np.ndarray
    baseline_ml: np.ndarray
    followup_ml: np.ndarray
    years: np.ndarray
    age: np.ndarray  # baseline age, years
    sex: np.ndarray  # (P, S - 1) indicators of the sex codes after the reference
    diagnosis: np.ndarray  # labels
    context: np.ndarray  # (P, M) every region's baseline volume / intracranial volume
    covariates: np.ndarray  # (P, C) baseline covariates, encoded (predictor.covariates)


def baseline_context(frame: pd.DataFrame, regions: Sequence[str], icv: str | None) -> np.ndarray:
    """(N, M) baseline volumes of ``regions`` (other than ``icv``), each divided by the
    intracranial volume ``icv`` when given (head-size corrected fractions), else in mL."""
    names = [region for region in regions if region != icv]
    values = frame[names].to_numpy(float)
    return values / frame[[icv]].to_numpy(float) if icv else values


def check_table(table: pd.DataFrame, regions: Sequence[str]) -> pd.DataFrame:
    """Validate a wide volume table; return it sorted with a ``years`` column added."""
    required = ["participant_id", "age", "sex", "diagnosis", *regions]
    missing = [column for column in required if column not in table.columns]
    if missing:
        raise DataError(f"volume table lacks column(s) {', '.join(map(repr, missing))}")
    table = table.sort_values(["participant_id", "age"], kind="stable").reset_index(drop=True)
    for region in regions:
        values = pd.to_numeric(table[region], errors="coerce")
        bad = table.index[~np.isfinite(values) | (values <= 0)]
        if len(bad):
            row = table.loc[bad[0]]
            raise DataError(
                f"region '{region}' has a missing or non-positive volume for "
                f"{row.participant_id} at age {row.age}"
            )
    baseline_age = table.groupby("participant_id")["age"].transform("min")
    return table.assign(years=table["age"] - baseline_age, baseline_age=baseline_age)


def baseline_rows(table: pd.DataFrame) -> pd.DataFrame:
    """First visit of every participant (the table must be sorted by age)."""
    return table.groupby("participant_id", sort=True).head(1).reset_index(drop=True)


def make_pairs(
    table: pd.DataFrame,
    region: str,
    coding: CohortSettings,
    regions=(),
    icv: str | None = None,
    encoder: Encoder | None = None,
) -> Pairs:
    """All (first visit -> later visit) pairs of a checked table for one region; their
    context holds the baseline of every one of ``regions`` (see :func:`baseline_context`),
    their covariates the baseline's, encoded by ``encoder`` (None: no covariates)."""
    first = baseline_rows(table).set_index("participant_id")
    later = table[table["years"] > 0]
    base = first.loc[later["participant_id"]]
    return Pairs(
        participant=later["participant_id"].to_numpy(),
        baseline_ml=base[region].to_numpy(float),
        followup_ml=later[region].to_numpy(float),
        years=later["years"].to_numpy(float),
        age=base["age"].to_numpy(float),
        sex=coding.sex_indicators(base["sex"].to_numpy()),
        diagnosis=base["diagnosis"].to_numpy(),
        context=baseline_context(base, regions, icv),
        covariates=_encoded(encoder, base),
    )


def at_baseline(frame: pd.DataFrame, names) -> pd.DataFrame:
    """``frame`` (sorted by age within participant) with each of the covariates ``names``
    replaced by the participant's first row's value: models read covariates at baseline."""
    if not names:
        return frame
    first = frame.groupby("participant_id", sort=False)[list(names)].transform(
        lambda column: column.iloc[0]
    )
    return frame.assign(**{name: first[name] for name in names})


def _encoded(encoder: Encoder | None, frame: pd.DataFrame) -> np.ndarray:
    return np.zeros((len(frame), 0)) if encoder is None else encoder.encode(frame)


def check_request(
    baseline: pd.DataFrame, years: Sequence[float], labels: Sequence[str], regions: Sequence[str]
) -> np.ndarray:
    """Validate a predict() request; return the horizons as an array (years)."""
    horizons = np.asarray(list(years), dtype=float)
    if horizons.size == 0 or not np.all(np.isfinite(horizons)) or np.any(horizons < 0):
        raise DataError(f"horizons must be finite and >= 0 years, got {list(years)}")
    for column in ("participant_id", "age", "sex", "diagnosis", *regions):
        if column not in baseline.columns:
            raise DataError(f"baseline rows lack column '{column}'")
    unseen = sorted(set(baseline["diagnosis"]) - set(labels))
    if unseen:
        raise DataError(
            f"diagnosis {', '.join(map(repr, unseen))} was never seen in training "
            f"(seen: {', '.join(labels)})"
        )
    if baseline["participant_id"].duplicated().any():
        raise DataError("baseline rows must hold one row per participant")
    return horizons


def _long(participants, region, years, mean, sd, lower, upper) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "participant_id": participants,
            "region": region,
            "years": years,
            "mean_ml": mean,
            "sd_ml": sd,
            "lower_ml": lower,
            "upper_ml": upper,
        }
    )


def _grid(baseline: pd.DataFrame, horizons: np.ndarray) -> pd.DataFrame:
    """Every participant crossed with every horizon."""
    index = np.repeat(np.arange(len(baseline)), len(horizons))
    grid = baseline.iloc[index].reset_index(drop=True)
    return grid.assign(years=np.tile(horizons, len(baseline)))


def split_participants(participants: np.ndarray, share: float, seed: int):
    """Seeded split of unique participant ids into (fit, calibration) sets."""
    unique = np.unique(participants)
    rng = np.random.default_rng(seed)
    calibration = set(
        rng.choice(unique, size=max(1, int(round(share * len(unique)))), replace=False)
    )
    return set(unique) - calibration, calibration


def conformal_quantile(scores: np.ndarray, level: float = LEVEL) -> float:
    """Split-conformal quantile: the ceil((n + 1) level)-th smallest score."""
    scores = np.sort(np.asarray(scores, dtype=float))
    rank = _conformal_rank(len(scores), level)
    if rank > len(scores):
        return float("inf")
    return float(scores[rank - 1])


def _conformal_rank(n: int, level: float) -> int:
    return int(np.ceil((n + 1) * level))


def fewest_scores(level: float = LEVEL) -> int:
    """The fewest scores whose :func:`conformal_quantile` is finite at ``level``."""
    n = 1
    while _conformal_rank(n, level) > n:
        n += 1
    return n


def horizon_scale(years) -> np.ndarray:
    """Conformal score scale: errors grow with the horizon (years)."""
    return np.maximum(np.asarray(years, dtype=float), MIN_SCALE_YEARS)


def trim_mask(residuals: np.ndarray, groups: np.ndarray, share: float = 0.2) -> np.ndarray:
    """Keep-mask that drops exactly ``round(share * n)`` items with the largest |residual|.

    An item is skipped (kept) when dropping it would leave its group with
    fewer than half of its items, so no diagnosis group is ever removed.
    """
    residuals, groups = np.asarray(residuals, dtype=float), np.asarray(groups)
    keep = np.ones(len(residuals), dtype=bool)
    to_drop = int(round(share * len(residuals)))
    floor = {group: int(np.ceil((groups == group).sum() / 2)) for group in np.unique(groups)}
    left = {group: int((groups == group).sum()) for group in floor}
    for index in np.argsort(-np.abs(residuals), kind="stable"):
        if to_drop == 0:
            break
        if left[groups[index]] - 1 < floor[groups[index]]:
            continue
        keep[index] = False
        left[groups[index]] -= 1
        to_drop -= 1
    return keep


def ordered_labels(values, coding: CohortSettings) -> list[str]:
    """Diagnosis labels present in ``values``, in the configured severity order first."""
    present = set(values)
    configured = [label for label in coding.diagnosis_labels if label in present]
    return configured + sorted(present - set(configured))


# --- split-conformal forecasters ---------------------------------------------------------
class ConformalForecaster:
    """Base: a point model of each region's change with split-conformal 90% intervals.

    ``icv_column``: the intracranial volume that divides every baseline regional volume
    in the pairs' context (the features of the feature forecasters)."""

    name = "base"

    def __init__(
        self,
        seed: int = 0,
        trim: float = 0.0,
        coding: CohortSettings | None = None,
        icv_column: str | None = None,
    ):
        self.seed = seed
        self.trim = trim
        self.coding = coding
        self.icv_column = icv_column

    # subclasses implement these two on Pairs
    def _fit_point(self, pairs: Pairs):
        raise NotImplementedError

    def _predict_point(self, model, pairs: Pairs) -> np.ndarray:
        raise NotImplementedError

    def fit(self, table: pd.DataFrame, regions: Sequence[str]) -> ConformalForecaster:
        if self.icv_column and self.icv_column not in regions:
            regions = [*regions, self.icv_column]
        table = check_table(table, regions)
        self.coding_ = self.coding or CohortSettings.from_toml()
        self.regions_ = list(regions)
        self.labels_ = ordered_labels(table["diagnosis"], self.coding_)
        self.covariates_ = Encoder.fit(self.coding_.covariates, baseline_rows(table))
        self.models_, self.quantiles_ = {}, {}
        for region in self.regions_:
            pairs = make_pairs(
                table, region, self.coding_, self.regions_, self.icv_column, self.covariates_
            )
            if len(np.unique(pairs.participant)) < 4:
                raise DataError(
                    f"region '{region}': fewer than 4 participants with a follow-up visit"
                )
            fit_ids, calibration_ids = split_participants(
                pairs.participant, CALIBRATION_SHARE, self.seed
            )
            fit = _subset(pairs, np.isin(pairs.participant, list(fit_ids)))
            calibration = _subset(pairs, np.isin(pairs.participant, list(calibration_ids)))
            model = self._fit_point(fit)
            if self.trim:
                residual = fit.followup_ml - self._predict_point(model, fit)
                model = self._fit_point(_subset(fit, trim_mask(residual, fit.diagnosis, self.trim)))
            errors = np.abs(calibration.followup_ml - self._predict_point(model, calibration))
            self.models_[region] = model
            self.quantiles_[region] = conformal_quantile(errors / horizon_scale(calibration.years))
        return self

    def predict(self, baseline: pd.DataFrame, years: Sequence[float]) -> pd.DataFrame:
        horizons = check_request(baseline, years, self.labels_, self.regions_)
        grid = _grid(baseline.reset_index(drop=True), horizons)
        frames = []
        for region in self.regions_:
            request = Pairs(
                participant=grid["participant_id"].to_numpy(),
                baseline_ml=grid[region].to_numpy(float),
                followup_ml=np.full(len(grid), np.nan),
                years=grid["years"].to_numpy(float),
                age=grid["age"].to_numpy(float),
                sex=self.coding_.sex_indicators(grid["sex"].to_numpy()),
                diagnosis=grid["diagnosis"].to_numpy(),
                context=baseline_context(grid, self.regions_, self.icv_column),
                covariates=self.covariates_.encode(grid),
            )
            mean = np.where(
                request.years == 0,
                request.baseline_ml,
                self._predict_point(self.models_[region], request),
            )
            half = self.quantiles_[region] * horizon_scale(request.years)
            frames.append(
                _long(
                    request.participant,
                    region,
                    request.years,
                    mean,
                    half / Z90,
                    mean - half,
                    mean + half,
                )
            )
        return pd.concat(frames, ignore_index=True)


def _subset(pairs: Pairs, mask: np.ndarray) -> Pairs:
    return Pairs(*(getattr(pairs, name)[mask] for name in Pairs.__dataclass_fields__))


class NoChangeForecaster(ConformalForecaster):
    """Forecast = baseline volume."""

    name = "no-change"

    def _fit_point(self, pairs):
        return None

    def _predict_point(self, model, pairs):
        return pairs.baseline_ml.copy()


class PopulationRateForecaster(ConformalForecaster):
    """Baseline times (1 + mean annualised rate of the diagnosis group * years)."""

    name = "population-rate"

    def _fit_point(self, pairs):
        annual = (pairs.followup_ml / pairs.baseline_ml - 1.0) / pairs.years
        frame = pd.DataFrame(
            {
                "participant": pairs.participant,
                "group": pairs.diagnosis,
                "years": pairs.years,
                "annual": annual,
            }
        )
        longest = frame.sort_values("years").groupby("participant").tail(1)
        return longest.groupby("group")["annual"].mean().to_dict()

    def _predict_point(self, model, pairs):
        rate = np.array([model.get(group, np.nan) for group in pairs.diagnosis])
        if np.any(np.isnan(rate)):
            missing = sorted({g for g, r in zip(pairs.diagnosis, rate, strict=True) if np.isnan(r)})
            raise DataError(f"no follow-up in training for diagnosis {', '.join(missing)}")
        return pairs.baseline_ml * (1.0 + rate * pairs.years)


class _FeatureForecaster(ConformalForecaster):
    """Learns the relative change from the baseline volumes of every region (divided by the
    intracranial volume when ``icv_column`` is given), age, sex, diagnosis, the encoded
    covariates and horizon."""

    def _estimator(self):
        raise NotImplementedError

    def _features(self, pairs: Pairs) -> np.ndarray:
        groups = np.stack([(pairs.diagnosis == label).astype(float) for label in self.labels_], 1)
        static = np.column_stack(
            [pairs.baseline_ml, pairs.context, pairs.age, pairs.sex, groups, pairs.covariates]
        )
        return np.column_stack([static, static * pairs.years[:, None], pairs.years])

    def _fit_point(self, pairs):
        target = (pairs.followup_ml - pairs.baseline_ml) / pairs.baseline_ml
        return self._estimator().fit(self._features(pairs), target)

    def _predict_point(self, model, pairs):
        return pairs.baseline_ml * (1.0 + model.predict(self._features(pairs)))


class RidgeForecaster(_FeatureForecaster):
    """Ridge regression (scikit-learn) of the relative change; features interact with years."""

    name = "ridge"

    def _estimator(self):
        from sklearn.linear_model import Ridge
        from sklearn.pipeline import make_pipeline
        from sklearn.preprocessing import StandardScaler

        return make_pipeline(StandardScaler(), Ridge(alpha=1.0))


class SVRForecaster(_FeatureForecaster):
    """Support vector regression (scikit-learn, RBF kernel) of the relative change."""

    name = "svr"

    def _estimator(self):
        from sklearn.compose import TransformedTargetRegressor
        from sklearn.pipeline import make_pipeline
        from sklearn.preprocessing import StandardScaler
        from sklearn.svm import SVR

        return TransformedTargetRegressor(
            regressor=make_pipeline(StandardScaler(), SVR(C=3.0, epsilon=0.05)),
            transformer=StandardScaler(),
        )


# --- linear mixed effects ---------------------------------------------------------------------
@dataclass(frozen=True)
class MixedFit:
    """One region's fitted mixed model: all that prediction needs (JSON-serialisable)."""

    beta: np.ndarray  # fixed effects (K,)
    cov_beta: np.ndarray  # (K, K)
    cov_re: np.ndarray  # random intercept/slope covariance G (2, 2), mL^2 and mL^2/yr^2
    residual_var: float  # sigma^2, mL^2
    converged: bool
    visits_used: int  # visits in the final fit (fewer after trimming)

    def to_dict(self) -> dict:
        return {
            "beta": self.beta.tolist(),
            "cov_beta": self.cov_beta.tolist(),
            "cov_re": self.cov_re.tolist(),
            "residual_var": self.residual_var,
            "converged": self.converged,
            "visits_used": self.visits_used,
        }

    @classmethod
    def from_dict(cls, raw: dict) -> MixedFit:
        return cls(
            np.asarray(raw["beta"]),
            np.asarray(raw["cov_beta"]),
            np.asarray(raw["cov_re"]),
            float(raw["residual_var"]),
            bool(raw["converged"]),
            int(raw["visits_used"]),
        )


#: optimiser tried when the chosen one stops at a degenerate point
RESCUE_METHOD = "bfgs"


def fit_mixed(volume, exog, participants, years, diagnosis, trim, method) -> MixedFit:
    """REML fit of one region (random intercept and slope); with ``trim``, drop and refit.

    Arrays have one entry (row) per visit: volume (N,) mL, exog (N, K),
    participants (N,), years since baseline (N,), diagnosis (N,). A fit whose
    fixed-effects covariance is not finite and positive definite (Powell's method
    can report convergence at such a point, with a spurious slope) is refitted with
    BFGS; one that stays degenerate is marked not converged.
    """
    import statsmodels.api as sm

    k = exog.shape[1]
    keep = np.ones(len(volume), dtype=bool)
    for _ in range(2 if trim else 1):
        model = sm.MixedLM(
            volume[keep],
            exog[keep],
            groups=participants[keep],
            exog_re=np.column_stack([np.ones(keep.sum()), years[keep]]),
        )
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            result = model.fit(reml=True, method=[method])
            if not _usable(result, k) and method != RESCUE_METHOD:
                rescue = model.fit(reml=True, method=[RESCUE_METHOD])
                result = rescue if _usable(rescue, k) else result
        if trim and keep.all():
            keep = trim_mask(volume - result.fittedvalues, diagnosis, trim)
    return MixedFit(
        np.asarray(result.fe_params),
        np.asarray(result.cov_params())[:k, :k],
        np.asarray(result.cov_re),
        float(result.scale),
        _usable(result, k),
        int(keep.sum()),
    )


def _usable(result, k: int) -> bool:
    """Converged, with a finite, positive definite fixed-effects covariance (K, K)."""
    cov = np.asarray(result.cov_params())[:k, :k]
    if not (result.converged and np.isfinite(cov).all()):
        return False
    return bool(np.linalg.eigvalsh((cov + cov.T) / 2).min() > 0)


class MixedEffectsForecaster:
    """Linear mixed effects (statsmodels MixedLM), one model per region.

    volume ~ baseline age * years + years * diagnosis + years * covariates + sex
    (+ intracranial volume), with a random intercept and a random slope in years per
    participant, fitted by REML with Powell's method (the "age-by-time"
    design; see :data:`DESIGNS` for the smaller ones). A new participant's
    random effects are predicted from its baseline volume (BLUP), so its
    forecast starts from its own volume, not the population mean.

    With ``fallback``, a table with too few participants for the design gets
    the next smaller design that it can carry, with a RuntimeWarning saying so
    (training priors use this); without, it raises DataError.
    """

    name = "mixed-effects"

    def __init__(
        self,
        icv_column: str | None = None,
        trim: float = 0.0,
        method: str = "powell",
        jobs: int = 1,
        coding: CohortSettings | None = None,
        design: str = "age-by-time",
        fallback: bool = False,
    ):
        if design not in DESIGNS:
            raise ValueError(f"design must be one of {list(DESIGNS)}; '{design}' was given")
        self.icv_column = icv_column
        self.trim = trim
        self.method = method
        self.jobs = jobs
        self.coding = coding
        self.design = design
        self.fallback = fallback

    def _design(self, frame: pd.DataFrame, years: np.ndarray) -> np.ndarray:
        """Fixed-effects design (N, K) of :attr:`design_`, columns named by
        :meth:`_columns`."""
        return np.column_stack([column for _, column in self._columns(frame, years)])

    def _columns(self, frame: pd.DataFrame, years: np.ndarray) -> list[tuple[str, np.ndarray]]:
        """Named design columns: 1, age, sex, dx dummies, covariates, years, years * dx,
        years * covariates, years * age [, icv] for "age-by-time"; without years * age for
        "diagnosis-by-time"; 1, years [, icv] for "rate". A covariate enters as its
        encoded columns (:class:`~predictor.covariates.Encoder`)."""
        age = frame["baseline_age"].to_numpy(float) - self.age_ref_
        dummies = [(f"diagnosis={label}", (frame["diagnosis"].to_numpy() == label).astype(float))
                   for label in self.labels_[1:]]  # fmt: skip
        sex = self.coding_.sex_indicators(frame["sex"].to_numpy())
        sexes = [(f"sex={code}", sex[:, k]) for k, code in enumerate(self.coding_.sex_codes[1:])]
        encoded = self.covariates_.encode(at_baseline(frame, self.covariates_.names))
        covariates = list(zip(self.covariates_.columns, encoded.T, strict=True))
        columns = [("intercept", np.ones(len(frame)))]
        if self.design_ != "rate":
            columns += [("age", age), *sexes, *dummies, *covariates]
        columns.append(("years", years))
        if self.design_ != "rate":
            columns += [(f"years*{name}", value * years) for name, value in dummies + covariates]
        if self.design_ == "age-by-time":
            columns.append(("years*age", age * years))
        if self.icv_column:
            icv = frame[self.icv_column].to_numpy(float) - self.icv_ref_
            columns.append((self.icv_column, icv))
        return columns

    def coefficients(self, region: str) -> pd.DataFrame:
        """A region's fixed effects: estimate and standard error (mL; per year for the
        ``years*`` terms), indexed by design column name."""
        fit = self.fits_[region]
        return pd.DataFrame(
            {"estimate": fit.beta, "se": np.sqrt(np.diag(fit.cov_beta))}, index=self.names_
        )

    def fit(self, table: pd.DataFrame, regions: Sequence[str]) -> MixedEffectsForecaster:
        table = check_table(table, [*regions] + ([self.icv_column] if self.icv_column else []))
        self.coding_ = self.coding or CohortSettings.from_toml()
        self.regions_ = list(regions)
        self.labels_ = ordered_labels(table["diagnosis"], self.coding_)
        self.age_ref_ = float(baseline_rows(table)["age"].mean())
        self.icv_ref_ = float(table[self.icv_column].mean()) if self.icv_column else 0.0
        self.covariates_ = Encoder.fit(self.coding_.covariates, baseline_rows(table))
        years = table["years"].to_numpy(float)
        count = table["participant_id"].nunique()
        for design in DESIGNS[DESIGNS.index(self.design) :]:
            self.design_ = design
            self.names_ = [name for name, _ in self._columns(table, years)]
            exog = self._design(table, years)
            if count > exog.shape[1] + 3:
                break
            if not self.fallback or design == DESIGNS[-1]:
                raise DataError(
                    f"{count} participants are too few for the {exog.shape[1]} fixed effects "
                    f"and 3 variance parameters of the mixed model ({design} design)"
                )
        if self.design_ != self.design:
            warnings.warn(
                f"mixed model: {count} participants are too few for the {self.design} "
                f"design; the {self.design_} design was fitted instead",
                RuntimeWarning,
                stacklevel=2,
            )
        participants = table["participant_id"].to_numpy()
        diagnosis = table["diagnosis"].to_numpy()
        arguments = [
            (
                table[region].to_numpy(float),
                exog,
                participants,
                years,
                diagnosis,
                self.trim,
                self.method,
            )
            for region in self.regions_
        ]
        if self.jobs > 1:
            from joblib import Parallel, delayed

            fits = Parallel(n_jobs=self.jobs)(delayed(fit_mixed)(*a) for a in arguments)
        else:
            fits = [fit_mixed(*a) for a in arguments]
        self.fits_ = dict(zip(self.regions_, fits, strict=True))
        for region, fit in self.fits_.items():
            if not fit.converged:
                warnings.warn(
                    f"mixed model for '{region}' did not converge; its forecasts and "
                    "intervals are unreliable",
                    RuntimeWarning,
                    stacklevel=2,
                )
        return self

    def random_effects(self, table: pd.DataFrame, region: str) -> pd.DataFrame:
        """BLUP b = G Z' (Z G Z' + s2 I)^-1 (y - X beta) of each participant, columns (b0, b1)."""
        table = check_table(table, [region])
        fit = self.fits_[region]
        rows = {}
        for participant, visits in table.groupby("participant_id", sort=True):
            years = visits["years"].to_numpy(float)
            x = self._design(visits, years)
            z = np.column_stack([np.ones(len(years)), years])
            v = z @ fit.cov_re @ z.T + fit.residual_var * np.eye(len(years))
            residual = visits[region].to_numpy(float) - x @ fit.beta
            rows[participant] = fit.cov_re @ z.T @ np.linalg.solve(v, residual)
        return pd.DataFrame.from_dict(rows, orient="index", columns=["intercept", "years"])

    def predict(
        self, baseline: pd.DataFrame, years: Sequence[float], noise_free: bool = False
    ) -> pd.DataFrame:
        """The common table. ``sd_ml`` and the bounds are for an observed follow-up (its
        residual noise included); with ``noise_free``, for the participant's true volume
        at the horizon (the mean of its follow-up observations), the like of a forecast."""
        horizons = check_request(baseline, years, self.labels_, self.regions_)
        return self._forecast(_grid(baseline.reset_index(drop=True), horizons), noise_free)

    def predict_each(self, rows: pd.DataFrame, noise_free: bool = False) -> pd.DataFrame:
        """:meth:`predict` for baselines that each carry their own horizon (column
        ``years``, years) and covariate values: one forecast per row and region, regions
        in turn, rows in order within each (``participant_id`` may repeat, as for the
        visit pairs of one participant)."""
        rows = rows.reset_index(drop=True)
        if "participant_id" not in rows.columns:
            raise DataError("baseline rows lack column 'participant_id'")
        if rows.empty:
            return _long([], "", [], [], [], [], [])
        # one participant per row: each row keeps its own covariates (at_baseline takes a
        # participant's first row)
        numbered = rows.assign(participant_id=np.arange(len(rows)))
        check_request(numbered, rows["years"], self.labels_, self.regions_)
        table = self._forecast(numbered, noise_free)
        ids = np.tile(rows["participant_id"].to_numpy(), len(self.regions_))
        return table.assign(participant_id=ids)

    def _forecast(self, grid: pd.DataFrame, noise_free: bool) -> pd.DataFrame:
        """The common table of checked baseline rows that carry their horizon (``years``)."""
        grid = grid.assign(baseline_age=grid["age"].to_numpy())
        t = grid["years"].to_numpy(float)
        x0 = self._design(grid, np.zeros(len(grid)))
        xt = self._design(grid, t)
        frames = []
        for region in self.regions_:
            fit = self.fits_[region]
            g, s2 = fit.cov_re, fit.residual_var
            cross = g[0, 0] + t * g[1, 0]  # Z_t G Z_0'
            weight = cross / (g[0, 0] + s2)
            y0 = grid[region].to_numpy(float)
            mean = xt @ fit.beta + weight * (y0 - x0 @ fit.beta)
            own = g[0, 0] + 2 * t * g[0, 1] + t**2 * g[1, 1] + (0.0 if noise_free else s2)
            conditional = own - cross**2 / (g[0, 0] + s2)
            d = xt - weight[:, None] * x0
            variance = conditional + np.einsum("ij,jk,ik->i", d, fit.cov_beta, d)
            sd = np.sqrt(np.maximum(variance, 0.0))
            frames.append(
                _long(
                    grid["participant_id"].to_numpy(),
                    region,
                    t,
                    mean,
                    sd,
                    mean - Z90 * sd,
                    mean + Z90 * sd,
                )
            )
        return pd.concat(frames, ignore_index=True)

    def to_dict(self) -> dict:
        """Everything prediction needs, as plain JSON types (no pickle)."""
        return {
            "icv_column": self.icv_column,
            "design": self.design_,
            "trim": self.trim,
            "method": self.method,
            "regions": self.regions_,
            "labels": self.labels_,
            "coding": self.coding_.to_dict(),
            "age_ref": self.age_ref_,
            "icv_ref": self.icv_ref_,
            "covariates": self.covariates_.to_dict(),
            "names": self.names_,
            "fits": {region: fit.to_dict() for region, fit in self.fits_.items()},
        }

    @classmethod
    def from_dict(cls, raw: dict) -> MixedEffectsForecaster:
        # models saved before the design was recorded used the diagnosis-by-time design
        design = raw.get("design", "diagnosis-by-time")
        model = cls(raw["icv_column"], raw["trim"], raw["method"], design=design)
        model.design_ = design
        model.coding_ = CohortSettings.from_dict(raw["coding"], "mixed-effects model")
        model.regions_, model.labels_ = list(raw["regions"]), list(raw["labels"])
        model.age_ref_, model.icv_ref_ = float(raw["age_ref"]), float(raw["icv_ref"])
        # priors saved before covariates have none, and no recorded column names
        model.covariates_ = Encoder.from_dict(raw.get("covariates"), "mixed-effects model")
        model.names_ = list(raw.get("names", []))
        model.fits_ = {region: MixedFit.from_dict(fit) for region, fit in raw["fits"].items()}
        return model


def save_mixed_model(path, model: MixedEffectsForecaster):
    """Write a fitted mixed-effects model as JSON (atomic; no pickle), e.g. as a training prior."""
    from predictor.files import write_json

    return write_json(path, model.to_dict())


def load_mixed_model(path) -> MixedEffectsForecaster:
    """Read :func:`save_mixed_model` output; a malformed file raises DataError naming it."""
    import json

    try:
        return MixedEffectsForecaster.from_dict(json.loads(Path(path).read_text()))
    except (OSError, ValueError, KeyError, TypeError) as error:
        raise DataError(f"{path}: not a saved mixed-effects model ({error})") from error


def all_forecasters(
    seed: int = 0, icv_column: str | None = None, jobs: int = 1, coding=None
) -> dict[str, object]:
    """Unfitted instances of every forecaster, keyed by report name.

    ``coding`` (a :class:`~predictor.config.CohortSettings`) sets the sex and
    diagnosis codes; the shipped ``configs/cohort.toml`` when None. ``icv_column``
    names the intracranial volume, the divisor of every baseline regional volume that
    ridge and SVR see (the mixed models take it as a covariate only when built apart).
    """
    mixed = {"jobs": jobs, "coding": coding}
    conformal = {"coding": coding, "icv_column": icv_column}
    return {
        "mixed-effects": MixedEffectsForecaster(**mixed),
        "mixed-effects-trimmed": MixedEffectsForecaster(trim=0.2, **mixed),
        "svr": SVRForecaster(seed, **conformal),
        "svr-trimmed": SVRForecaster(seed, trim=0.2, **conformal),
        "ridge": RidgeForecaster(seed, **conformal),
        "population-rate": PopulationRateForecaster(seed, **conformal),
        "no-change": NoChangeForecaster(seed, **conformal),
    }
