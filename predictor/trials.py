"""``predictor trial-size``: participants per arm, and enrichment by screening rules,
from held-out forecasts and observed rates.

The trial's outcome is each participant's annualised change of a region (% per
year): the least-squares slope of its observed % change from baseline over
every visit within the trial's duration ``years`` (plus ``window``). Only a
participant with a visit within ``window`` years of the duration counts, so
rates over shorter or longer follow-ups do not enter a fixed-duration design.
Observed changes and forecasts come from the held-out forecasts of ``predictor
evaluate`` (or ``compare``): no participant is ranked by a model that saw it.

Per arm (two arms, two-sided), to detect a slowing by the fraction ``effect``:

* normal approximation ``n = 2 (z_{1-alpha/2} + z_{1-beta})^2 sigma^2 / delta^2``;
* exact two-sample t-test: the smallest ``n`` whose noncentral-t power reaches
  the target, solved continuously (Cohen 1988, chapter 2).

``sigma`` is the SD of the enrolled participants' *observed* rates, so the
measurement noise and every unexplained difference are in it. ``delta`` is
``effect`` times the mean rate (the total rate), or times the mean
disease-related rate: the rate minus the cognitively normal participants' rate
at the same age (a least-squares line in baseline age over the cognitively
normal participants; a common trial design choice). The same sum from the
spread of *forecast* rates has neither noise nor unexplained variance in it and
is reported only as "apparent".

Enrichment: a screening rule orders the screened participants and the first
fraction ``q`` are enrolled, so ``1 / q`` are screened per enrolled. Rules
compared at equal ``q``: a random order (negative control), diagnosis (most
advanced first), baseline hippocampal volume (smallest share of the brain
first), and every held-out forecast of the region's rate. Total cost =
screened x screen cost + enrolled x enrolment cost, both arms. Bootstrap CIs
resample participants (the screened population) and re-apply every rule to
each resample, the same resamples for every rule (paired); the models are not
refitted, since their forecasts are held out already.
"""

from __future__ import annotations

import os
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import optimize, stats

from predictor.cautions import CAUTION
from predictor.compare import FLOOR, JACOBIAN, NETWORK, NETWORKS, POPULATION
from predictor.config import CohortSettings
from predictor.errors import DataError
from predictor.files import write_json, write_tsv
from predictor.modelstore import member_folders, read_model_json
from predictor.regions import TOTAL_BRAIN, RegionSet
from predictor.rng import seeded_rng

MIN_PARTICIPANTS = 10
BOOTSTRAP = 2000
HELD_OUT = "errors.tsv"
TRIAL_CAUTION = (
    "Planning aid only: the trial's statisticians and protocol decide the sample size. " + CAUTION
)
APPARENT_WARNING = (
    "apparent n uses the spread of forecast rates, which holds no measurement noise and no "
    "unexplained variance: it understates the participants needed; plan with the observed n"
)
RANDOM, DIAGNOSIS, HIPPOCAMPUS = "random order (control)", "diagnosis", "baseline hippocampus"
#: a forecast rule's name is this prefix and the forecast method
FORECAST = "forecast: "
#: forecasts that order nobody (the same change for everyone) or that read the phantom truth
NOT_RULES = ("no-change", FLOOR)
EFFECTS = ("total", "disease")


@dataclass(frozen=True)
class Design:
    """What the trial must detect: fractional slowing, two-sided alpha, power, duration
    (years), and how far (years) a participant's last visit may lie from the duration."""

    effect: float = 0.25
    power: float = 0.8
    alpha: float = 0.05
    years: float = 2.0
    window: float = 0.5

    def __post_init__(self):
        if not 0 < self.effect <= 1:
            raise DataError(
                f"effect must be within (0, 1] (a fraction of the rate), got {self.effect}"
            )
        if not 0 < self.power < 1:
            raise DataError(f"power must be within (0, 1), got {self.power}")
        if not 0 < self.alpha <= 0.5:
            raise DataError(f"alpha must be within (0, 0.5], got {self.alpha}")
        if not self.years > 0:
            raise DataError(f"years must be > 0, got {self.years}")
        if not 0 <= self.window < self.years:
            raise DataError(f"window must be within [0, years), got {self.window}")


@dataclass(frozen=True)
class Costs:
    """Cost of screening one participant and of enrolling one (any one currency)."""

    screen: float
    enrol: float

    def __post_init__(self):
        finite = np.isfinite([self.screen, self.enrol]).all()
        if not finite or min(self.screen, self.enrol) < 0 or self.screen + self.enrol == 0:
            raise DataError(
                f"costs must be finite, >= 0 and not both 0, got screen {self.screen}, enrol "
                f"{self.enrol}"
            )

    def total(self, n_per_arm, screened_per_enrolled: float):
        """Cost of a two-arm trial with ``n_per_arm`` enrolled per arm (whole participants)
        and ``screened_per_enrolled`` screened for each."""
        enrolled = np.ceil(np.asarray(n_per_arm, float))
        return 2 * enrolled * (self.enrol + self.screen * screened_per_enrolled)


# --- sample size -------------------------------------------------------------------------
def n_normal(mean_rate: float, sd_rate: float, design: Design) -> float:
    """Per-arm n by the normal approximation (unrounded)."""
    delta = design.effect * abs(mean_rate)
    z = stats.norm.ppf(1 - design.alpha / 2) + stats.norm.ppf(design.power)
    return float(2 * z**2 * sd_rate**2 / delta**2)


def t_power(n: float, d: float, alpha: float) -> float:
    """Power of the two-sided two-sample t-test, ``n`` per arm, standardised effect ``d``."""
    df = 2 * n - 2
    critical = stats.t.ppf(1 - alpha / 2, df)
    noncentrality = d * np.sqrt(n / 2)
    upper = stats.nct.sf(critical, df, noncentrality)
    # the opposite tail underflows (scipy may return NaN there) once the effect is large
    lower = np.nan_to_num(stats.nct.cdf(-critical, df, noncentrality), nan=0.0)
    return float(upper + lower)


def n_t(mean_rate: float, sd_rate: float, design: Design) -> float:
    """Per-arm n of the exact two-sample t-test (unrounded; noncentral t, root of the power)."""
    d = design.effect * abs(mean_rate) / sd_rate
    # the smallest trial already has the power (a huge effect or no spread; scipy's
    # noncentral t returns NaN for d far beyond 50, where the power is 1 to machine precision)
    if d > 50 or t_power(2.0 + 1e-9, d, design.alpha) >= design.power:
        return 2.0
    start = n_normal(mean_rate, sd_rate, design)
    return float(
        optimize.brentq(
            lambda n: t_power(n, d, design.alpha) - design.power, 2.0 + 1e-9, 10 * start + 10
        )
    )


def n_per_arm(change: float, sd: float, design: Design) -> float:
    """Exact-t n for a mean ``change`` in the direction of progression (NaN when there is
    none to slow: ``change <= 0`` or no spread)."""
    if not change > 0 or not sd > 0:
        return float("nan")
    return n_t(change, sd, design)


def n_guenther(changes: np.ndarray, sds: np.ndarray, design: Design) -> np.ndarray:
    """Per-arm n of many (change, SD) at once: the normal formula plus Guenther's (1981)
    t correction ``z_{1-alpha/2}^2 / 4``, within a fraction of a participant of the exact
    root; infinite where there is no change to slow."""
    z_alpha = stats.norm.ppf(1 - design.alpha / 2)
    z = z_alpha + stats.norm.ppf(design.power)
    with np.errstate(divide="ignore", invalid="ignore"):
        n = 2 * z**2 * sds**2 / (design.effect * changes) ** 2 + z_alpha**2 / 4
    return np.where(changes > 0, n, np.inf)


# --- rates ----------------------------------------------------------------------------------
def rate_slope(years, percent) -> float:
    """Least-squares slope (% per year) of % change against years (``numpy.polyfit``, deg 1)."""
    years, percent = np.asarray(years, float), np.asarray(percent, float)
    centred = years - years.mean()
    return float((centred * (percent - percent.mean())).sum() / (centred**2).sum())


def held_out_errors(folder: Path) -> tuple[pd.DataFrame, str]:
    """The held-out forecasts and observed changes of an ``evaluate`` (or ``compare``)
    folder, and a description of them. Forecasts of ``predictor forecast`` are refused:
    their participants may be the model's own training participants."""
    if (folder / HELD_OUT).is_file():
        errors = pd.read_csv(folder / HELD_OUT, sep="\t")
        if "age" not in errors:
            raise DataError(
                f"{folder / HELD_OUT} has no baseline age column; rerun `predictor evaluate` "
                "(or compare) with this version"
            )
        if (folder / "evaluation.json").is_file():
            return errors, f"held-out forecasts of cross-validation ({folder.name})"
        return errors, f"held-out test participants of one split ({folder.name})"
    if (folder / "forecasts.tsv").is_file():
        raise DataError(
            f"{folder}: forecasts of `predictor forecast` may include the model's own training "
            "participants; sample sizes need held-out forecasts: give a `predictor evaluate` "
            "folder"
        )
    raise DataError(f"{folder}: not a `predictor evaluate` or `compare` folder (no {HELD_OUT})")


def declared_direction(folder: Path, region: str) -> float:
    """+1 where ``region`` grows with disease, -1 where it shrinks: its declared change in
    the regions the evaluation's models were trained with (fold 1's network), or in the
    shipped regions for a compare report. A region declared not to change is refused."""
    networks = sorted(path for path in folder.glob("fold-*/network") if path.is_dir())
    if networks:  # a plain model folder, or an ensemble's first member
        regions = read_model_json(member_folders(networks[0])[0]).region_set
    else:
        regions = RegionSet.from_toml()
    if region not in regions.names:
        raise DataError(f"region '{region}' is not one of {', '.join(regions.names)}")
    direction = regions.get(region).direction
    if direction == 0:
        raise DataError(
            f"region '{region}' has change = \"none\" in its regions file; a trial outcome "
            "needs a direction (shrinks or grows)"
        )
    return float(direction)


def participant_rates(errors: pd.DataFrame, region: str, design: Design) -> pd.DataFrame:
    """One row per participant with a visit within ``design.window`` years of the duration.

    Columns: participant_id, diagnosis, age (baseline, years), visits (follow-ups used),
    last_years, observed (least-squares rate over baseline and every follow-up up to
    ``years + window``, % per year), hippocampus_pct_brain (baseline), and
    ``forecast: <method>`` (each method's forecast rate over the same follow-ups, a
    slope through the baseline, % per year).
    """
    if region not in set(errors["region"]):
        raise DataError(
            f"region '{region}' is not one of {', '.join(sorted(set(errors['region'])))}"
        )
    own = errors[(errors["region"] == region) & (errors["years"] <= design.years + design.window)]
    methods = [m for m in dict.fromkeys(own["method"]) if m not in NOT_RULES]
    baseline = errors.drop_duplicates(["participant_id", "region"]).pivot(
        index="participant_id", columns="region", values="baseline_ml"
    )
    hippocampi = [r for r in baseline if r.startswith("hippocampus")]
    share = (
        100 * baseline[hippocampi].sum(axis=1) / baseline[TOTAL_BRAIN]
        if hippocampi and TOTAL_BRAIN in baseline
        else pd.Series(np.nan, index=baseline.index)
    )
    rows = []
    for participant, visits in own.groupby("participant_id", sort=True):
        follow = visits.drop_duplicates("session_id").dropna(subset=["observed_ml"])
        follow = follow.sort_values("years")
        if not (follow["years"] - design.years).abs().le(design.window).any():
            continue
        percent = 100 * (follow["observed_ml"] / follow["baseline_ml"] - 1)
        row = {
            "participant_id": participant,
            "diagnosis": follow["diagnosis"].iloc[0],
            "age": float(follow["age"].iloc[0]),
            "visits": len(follow),
            "last_years": float(follow["years"].max()),
            "observed": rate_slope([0.0, *follow["years"]], [0.0, *percent]),
            "hippocampus_pct_brain": float(share.loc[participant]),
        }
        for method in methods:
            one = visits[visits["method"] == method]
            years = one["years"].to_numpy()
            forecast = 100 * (one["forecast_ml"] / one["baseline_ml"] - 1).to_numpy()
            row[FORECAST + method] = (years * forecast).sum() / (years**2).sum()
        rows.append(row)
    return pd.DataFrame(rows)


def rule_scores(rates: pd.DataFrame, direction: float, coding: CohortSettings, seed: int):
    """({rule: (P,) score}, {rule left out: why}); a higher score is enrolled first.
    ``direction`` is +1 where the region grows with disease, -1 where it shrinks."""
    order = {code: rank for rank, code in enumerate(coding.diagnosis_labels)}
    unknown = sorted(set(rates["diagnosis"]) - set(order))
    if unknown:
        raise DataError(f"diagnosis {unknown[0]!r} is not one of {', '.join(order)}")
    scores = {
        RANDOM: seeded_rng(seed, 31).random(len(rates)),
        DIAGNOSIS: rates["diagnosis"].map(order).to_numpy(float),
    }
    left_out = {}
    if rates["hippocampus_pct_brain"].notna().all():
        scores[HIPPOCAMPUS] = -rates["hippocampus_pct_brain"].to_numpy()
    else:
        left_out[HIPPOCAMPUS] = "no hippocampus regions or no whole-brain volume in the table"
    for column in (c for c in rates if c.startswith(FORECAST)):
        missing = int(rates[column].isna().sum())
        if missing:  # a forecaster not fitted in some fold cannot rank everyone
            left_out[column] = f"no forecast for {missing} participant(s)"
        else:
            scores[column] = direction * rates[column].to_numpy()
    return scores, left_out


def ageing_lines(age: np.ndarray, rate: np.ndarray, normal: np.ndarray):
    """Least-squares lines rate ~ age over the rows where ``normal`` (each of B resamples,
    arrays (B, P)): (intercepts, slopes), NaN where fewer than MIN_PARTICIPANTS."""
    count = normal.sum(axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_age = (normal * age).sum(axis=-1) / count
        mean_rate = (normal * rate).sum(axis=-1) / count
        centred = age - mean_age[..., None]
        slope = (normal * centred * rate).sum(axis=-1) / (normal * centred**2).sum(axis=-1)
    enough = count >= MIN_PARTICIPANTS
    return np.where(enough, mean_rate - slope * mean_age, np.nan), np.where(enough, slope, np.nan)


# --- enrichment -----------------------------------------------------------------------------
def enrichment_table(
    rates: pd.DataFrame,
    scores: dict[str, np.ndarray],
    design: Design,
    fractions,
    coding: CohortSettings,
    direction: float,
    costs: Costs | None = None,
    seed: int = 0,
) -> tuple[pd.DataFrame, dict]:
    """n per arm (observed rates; total and disease-related effect) for every rule and
    enrolled fraction, with bootstrap 95% CIs and, for forecast rules, the apparent n.

    ``direction``: +1 where the region grows with disease, -1 where it shrinks. Returns
    the table and {(rule, fraction, effect): (B,) bootstrap n} for paired contrasts.
    """
    observed, age = rates["observed"].to_numpy(), rates["age"].to_numpy()
    normal = (rates["diagnosis"] == coding.diagnosis_labels[0]).to_numpy()
    rng = seeded_rng(seed, 29)
    count = len(rates)
    draws = rng.integers(0, count, size=(BOOTSTRAP, count))
    ties, tie = rng.random((BOOTSTRAP, count)), rng.random(count)
    intercept, slope = ageing_lines(age, observed, normal)
    intercepts, slopes = ageing_lines(age[draws], observed[draws], normal[draws])
    ageing = intercept + slope * age  # the cognitively normal rate at each one's age
    rows, samples = [], {}
    for rule, score in scores.items():
        point = np.lexsort((tie, -score))
        resampled = np.take_along_axis(draws, np.lexsort((ties, -score[draws]), axis=-1), -1)
        for fraction in fractions:
            if not 0 < fraction <= 1:
                raise DataError(f"enrolled fractions must be within (0, 1], got {fraction:g}")
            enrolled = int(np.ceil(fraction * count))
            if enrolled < MIN_PARTICIPANTS:
                raise DataError(
                    f"enrolled fraction {fraction:g} keeps {enrolled} of {count} participants; "
                    f"at least {MIN_PARTICIPANTS} are needed"
                )
            chosen, chosen_b = point[:enrolled], resampled[:, :enrolled]
            row = {
                "rule": rule,
                "fraction": fraction,
                "screened_per_enrolled": count / enrolled,
                "enrolled": enrolled,
                "mean_rate_pct_per_year": float(observed[chosen].mean()),
                "sd_rate_pct_per_year": float(observed[chosen].std(ddof=1)),
            }
            sds = observed[chosen_b].std(axis=1, ddof=1)
            for effect in EFFECTS:
                if effect == "total":
                    change = observed[chosen].mean()
                    changes = observed[chosen_b].mean(axis=1)
                else:
                    change = (observed[chosen] - ageing[chosen]).mean()
                    ageing_b = intercepts[:, None] + slopes[:, None] * age[chosen_b]
                    changes = (observed[chosen_b] - ageing_b).mean(axis=1)
                n = n_per_arm(direction * change, row["sd_rate_pct_per_year"], design)
                boot = n_guenther(direction * changes, sds, design)
                samples[(rule, fraction, effect)] = boot
                row |= _with_ci(f"{effect}_n_per_arm", n, boot)
                if costs is not None:
                    ratio = row["screened_per_enrolled"]
                    row |= _with_ci(
                        f"{effect}_cost", costs.total(n, ratio), costs.total(boot, ratio)
                    )
            if rule.startswith(FORECAST):
                forecast = rates[rule].to_numpy()[chosen]
                row["apparent_n_per_arm"] = n_per_arm(
                    direction * forecast.mean(), forecast.std(ddof=1), design
                )
            rows.append(row)
    return pd.DataFrame(rows), samples


def _with_ci(name: str, value: float, boot: np.ndarray) -> dict:
    """``name``, ``name_ci_low`` and ``name_ci_high`` (percentile bootstrap 95%; NaN where
    more than 2.5% of the resamples had no change to slow)."""
    with np.errstate(invalid="ignore"):  # interpolating between two infinite resamples
        quantiles = np.quantile(boot, [0.025, 0.975])
    low, high = (q if np.isfinite(q) else np.nan for q in quantiles)
    return {name: value, f"{name}_ci_low": low, f"{name}_ci_high": high}


def network_rule(scores) -> str | None:
    """The rule of the network's forecast: its own (Jacobian-integral) volumes, the
    evaluation's headline, else its forecast scans' measured volumes."""
    for method in (JACOBIAN, NETWORK):
        if FORECAST + method in scores:
            return FORECAST + method
    return None


def verdicts(table: pd.DataFrame, samples: dict, scores, costs: Costs | None) -> list[str]:
    """Plain statements (n in whole participants, 95% CIs): the unenriched n; at each enrolled
    fraction the non-network rule with the fewest per arm (picked on these participants,
    which favours it) beside the network's forecast (paired bootstrap CI of the difference);
    with costs, the cheapest design (no enrichment, or a rule at a fraction below 1)."""
    lines, network = [], network_rule(scores)
    unenriched = table[(table["rule"] == RANDOM) & (table["fraction"] == 1.0)]
    lines.append(f"no enrichment: {_n(unenriched.iloc[0], 'total_n_per_arm')} per arm")
    networks = {FORECAST + method for method in NETWORKS}
    enriched = table[(table["rule"] != RANDOM) & (table["fraction"] < 1.0)]
    for fraction, rows in enriched.groupby("fraction", sort=False):
        others = rows[~rows["rule"].isin(networks)].dropna(subset=["total_n_per_arm"])
        if others.empty:
            continue
        best = others.loc[others["total_n_per_arm"].idxmin()]
        text = (
            f"enrolling {fraction:g}: fewest per arm among the non-network rules "
            f"{best['rule']}, {_n(best, 'total_n_per_arm')}"
        )
        if network in set(rows["rule"]):
            own = rows[rows["rule"] == network].iloc[0]
            low, high = _difference(samples, network, best["rule"], fraction)
            text += (
                f"; the network {_n(own, 'total_n_per_arm')}, difference "
                f"{own['total_n_per_arm'] - best['total_n_per_arm']:+.0f} [{low:+.0f}, {high:+.0f}]"
            )
        lines.append(text)
    if costs is not None:
        candidates = pd.concat([unenriched.assign(rule="no enrichment"), enriched])
        candidates = candidates.dropna(subset=["total_cost"])
        best = candidates.loc[candidates["total_cost"].idxmin()]
        where = "" if best["rule"] == "no enrichment" else f" enrolling {best['fraction']:g}"
        lines.append(f"cheapest design: {best['rule']}{where}, cost {_n(best, 'total_cost')}")
    return lines


def _n(row, column: str) -> str:
    """``column`` of ``row`` rounded up, with its 95% CI (or 'not estimable')."""
    value = row[column]
    if not np.isfinite(value):
        return "not estimable"
    bounds = [row[f"{column}_ci_{side}"] for side in ("low", "high")]
    low, high = (f"{b:.0f}" if np.isfinite(b) else "unbounded" for b in bounds)
    return f"{np.ceil(value):.0f} [{low}, {high}]"


def _difference(samples, rule: str, other: str, fraction: float) -> tuple[float, float]:
    """Paired bootstrap 95% CI of n(rule) - n(other) at one fraction (total effect; a bound
    is +-inf where more than 2.5% of the resamples left one rule nothing to slow)."""
    with np.errstate(invalid="ignore"):
        difference = samples[(rule, fraction, "total")] - samples[(other, fraction, "total")]
    # a resample where both had no change to slow is a tie; one where only one had keeps its
    # infinite difference, so a bound is infinite where more than 2.5% are
    difference = np.where(np.isnan(difference), 0.0, difference)
    with np.errstate(invalid="ignore"):
        low, high = np.quantile(difference, [0.025, 0.975])
    return float(low), float(high)


def trial_report(
    folder: str | os.PathLike[str],
    out: str | os.PathLike[str],
    region: str,
    design: Design | None = None,
    fractions=(0.5, 0.3),
    costs: Costs | None = None,
    seed: int = 0,
    coding: CohortSettings | None = None,
) -> dict:
    """Sample sizes and enrichment for ``region`` from an ``evaluate`` (or ``compare``)
    folder; writes rates.tsv, enrichment.tsv, trial_size.json and enrichment.png."""
    from predictor.figures import save_figure

    design = design or Design()
    coding = coding or CohortSettings.from_toml()
    folder, out = Path(folder), Path(out)
    errors, source = held_out_errors(folder)
    rates = participant_rates(errors, region, design)
    if len(rates) < MIN_PARTICIPANTS:
        raise DataError(
            f"{source}: {len(rates)} participants have a visit within {design.window:g} years "
            f"of {design.years:g} years; at least {MIN_PARTICIPANTS} are needed"
        )
    direction = declared_direction(folder, region)
    warnings = []
    if direction * rates["observed"].mean() <= 0:
        warnings.append(
            f"{region} is declared to {'grow' if direction > 0 else 'shrink'} with disease, "
            f"but its mean observed rate is {rates['observed'].mean():+.2f} % per year"
        )
    scores, left_out = rule_scores(rates, direction, coding, seed)
    fractions = sorted({1.0, *map(float, fractions)}, reverse=True)
    table, samples = enrichment_table(
        rates, scores, design, fractions, coding, direction, costs, seed
    )
    write_tsv(out / "rates.tsv", rates)
    write_tsv(out / "enrichment.tsv", table)
    summary = {
        "region": region,
        "design": asdict(design),
        "costs": None if costs is None else asdict(costs),
        "source": source,
        "participants": len(rates),
        "excluded": int(errors["participant_id"].nunique() - len(rates)),
        "network_rule": network_rule(scores),
        "rules_left_out": left_out,
        "warnings": warnings,
        "verdicts": verdicts(table, samples, scores, costs),
        "apparent_warning": APPARENT_WARNING,
        "caution": TRIAL_CAUTION,
        "enrichment": [
            {k: (v if not isinstance(v, float) or np.isfinite(v) else None) for k, v in r.items()}
            for r in table.to_dict("records")
        ],
    }
    write_json(out / "trial_size.json", summary)
    save_figure(enrichment_figure(table, region, design, costs), out / "enrichment.png")
    return summary


def enrichment_figure(table: pd.DataFrame, region: str, design: Design, costs: Costs | None):
    """Participants per arm (observed rates, total effect, 95% CI) and total cost (or
    participants screened) against the enrolled fraction, one line per rule."""
    from matplotlib.ticker import FuncFormatter

    from predictor.cautions import CAPTION
    from predictor.figures import NETWORK_COLOUR, PRIOR_COLOUR, pyplot

    plt = pyplot()
    figure, (left, right) = plt.subplots(1, 2, figsize=(11, 4.8))
    others = iter(["#6a5a9c", "#8c8c3a", "#a33b5c", "#3a6f9c", "#5c8f4a", "#9c6a3a", "#4a4a4a",
                   "#b07aa1", "#7a9cb0", "#c2a03a"])  # fmt: skip
    second = table.assign(screened=2 * table["total_n_per_arm"] * table["screened_per_enrolled"])
    column = "total_cost" if costs is not None else "screened"
    for rule, rows in second.groupby("rule", sort=False):
        colour = (
            NETWORK_COLOUR if rule.startswith(FORECAST + "network")
            else PRIOR_COLOUR if rule == FORECAST + POPULATION
            else "#9a9a9a" if rule == RANDOM else next(others, "#333333")
        )  # fmt: skip
        style = {"color": colour, "marker": "o", "label": rule,
                 "linestyle": ":" if rule == RANDOM else "-"}  # fmt: skip
        low = (rows["total_n_per_arm"] - rows["total_n_per_arm_ci_low"]).clip(lower=0)
        high = (rows["total_n_per_arm_ci_high"] - rows["total_n_per_arm"]).clip(lower=0)
        left.errorbar(rows["fraction"], rows["total_n_per_arm"], yerr=[low, high.fillna(0)],
                      capsize=2, **style)  # fmt: skip
        open_ended = rows[rows["total_n_per_arm_ci_high"].isna()]
        left.scatter(open_ended["fraction"], open_ended["total_n_per_arm"], marker="^", s=60,
                     color=colour, zorder=3)  # fmt: skip
        right.plot(rows["fraction"], rows[column], **style)
    left.set_ylabel("participants per arm (observed rates)")
    right.set_ylabel("total cost (both arms)" if costs is not None else
                     "participants screened (both arms)")  # fmt: skip
    for axis in (left, right):
        axis.set_xlabel("fraction enrolled (1 = no enrichment)")
        axis.set_yscale("log")
        for ticks in (axis.yaxis.set_major_formatter, axis.yaxis.set_minor_formatter):
            ticks(FuncFormatter(lambda value, _: f"{value:g}"))
        axis.invert_xaxis()
        axis.grid(alpha=0.3)
    left.legend(fontsize=7)
    figure.suptitle(
        f"{region.replace('_', ' ')}: {100 * design.effect:g}% slowing of the total rate, "
        f"power {design.power:g}, alpha {design.alpha:g}, {design.years:g} years; bars: 95% "
        "bootstrap CI (^: no upper bound)",
        fontsize=10,
    )
    figure.text(0.5, 0.01, CAPTION, ha="center", va="bottom", fontsize=7, color="#8a1c1c")
    figure.tight_layout(rect=(0, 0.06, 1, 0.95))
    return figure
