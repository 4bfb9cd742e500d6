"""``predictor trial-size``: sample size per arm, and enrichment, from forecast atrophy.

A two-arm trial whose outcome is each participant's annualised change of a
region (% per year) wants to detect a treatment that slows the mean rate by
the fraction ``effect``: the difference to detect is ``effect * |mean rate|``
against the between-participant SD of the rates. Per arm (equal arms,
two-sided test):

* normal approximation: ``n = 2 (z_{1-alpha/2} + z_{1-beta})^2 sigma^2 / delta^2``;
* exact two-sample t-test: the smallest ``n`` whose power under the
  noncentral t distribution (``n - 1`` ... ``2n - 2`` degrees of freedom)
  reaches the target, solved continuously (Cohen 1988, chapter 2).

Rates come from forecasts (the network's or the prior's) or, where follow-ups
were observed, from the observed changes. Enrichment keeps the participants
whose forecast atrophy is in the top fraction ``q``; then ``1 / q``
participants are screened per participant enrolled, and ``n`` on the
selected participants' *observed* changes is the honest estimate.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import optimize, stats

from predictor.cautions import CAUTION
from predictor.errors import DataError
from predictor.files import write_json, write_tsv
from predictor.regions import RegionSet
from predictor.rng import seeded_rng
from predictor.workspace import Layout

MIN_PARTICIPANTS = 10
BOOTSTRAP = 2000
TRIAL_CAUTION = (
    "Planning aid only: the trial's statisticians and protocol decide the sample size. " + CAUTION
)


@dataclass(frozen=True)
class Design:
    """What the trial must detect: fractional slowing, two-sided alpha, power, duration (years)."""

    effect: float = 0.25
    power: float = 0.8
    alpha: float = 0.05
    years: float = 2.0

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
    start = n_normal(mean_rate, sd_rate, design)
    return float(
        optimize.brentq(
            lambda n: t_power(n, d, design.alpha) - design.power, 2.0 + 1e-9, 10 * start + 10
        )
    )


def bootstrap_n(rates: np.ndarray, design: Design, seed: int = 0) -> tuple[float, float]:
    """Percentile bootstrap 95% CI of the per-arm n, resampling participants.

    Each resample's n uses Guenther's (1981) closed-form t correction of the
    normal formula, ``n + z_{1-alpha/2}^2 / 4``, which stays within a fraction
    of a participant of the exact t root and avoids 2000 root searches.
    """
    rng = seeded_rng(seed, 23)
    draws = rng.integers(0, len(rates), size=(BOOTSTRAP, len(rates)))
    samples = rates[draws]
    means, sds = samples.mean(axis=1), samples.std(axis=1, ddof=1)
    z_alpha = stats.norm.ppf(1 - design.alpha / 2)
    z = z_alpha + stats.norm.ppf(design.power)
    with np.errstate(divide="ignore"):
        ns = 2 * z**2 * sds**2 / (design.effect * np.abs(means)) ** 2 + z_alpha**2 / 4
    low, high = np.quantile(ns, [0.025, 0.975])
    return float(low), float(high)


def sample_size(rates: np.ndarray, design: Design, seed: int = 0) -> dict:
    """n per arm (exact t, normal, bootstrap CI) from participants' annual rates (% per year)."""
    rates = np.asarray(rates, dtype=float)
    mean, sd = float(rates.mean()), float(rates.std(ddof=1))
    if mean == 0 or sd == 0:
        raise DataError("the rates have zero mean or zero spread; no sample size follows")
    low, high = bootstrap_n(rates, design, seed)
    return {
        "participants": len(rates),
        "mean_rate_pct_per_year": mean,
        "sd_rate_pct_per_year": sd,
        "n_per_arm": int(np.ceil(n_t(mean, sd, design))),
        "n_per_arm_exact": n_t(mean, sd, design),
        "n_per_arm_normal": n_normal(mean, sd, design),
        "n_ci_low": low,
        "n_ci_high": high,
    }


# --- rates from forecast or comparison folders ---------------------------------------------
def rates_from_folder(
    folder: Path,
    region: str,
    years: float,
    method: str | None = None,
    observed: Path | None = None,
) -> tuple[pd.DataFrame, str]:
    """Per-participant annual rates (% per year): ``forecast`` and, where known, ``observed``.

    ``folder`` is a ``compare`` report (errors.tsv: test participants, observed
    follow-ups; ``method`` default 'network-jacobian') or a ``forecast
    --cohort`` folder (forecasts.tsv; ``method`` 'network' or 'prior'), with
    ``observed`` an optional prepared workspace to take observed changes from.
    Returns the table and a description of the source.
    """
    names = RegionSet.from_toml().names
    if region not in names:
        raise DataError(f"region '{region}' is not one of {', '.join(names)}")
    if (folder / "errors.tsv").is_file():
        return _rates_from_comparison(folder, region, years, method or "network-jacobian")
    if (folder / "forecasts.tsv").is_file():
        rates = _rates_from_forecasts(folder, region, years, method or "network")
        if observed is not None:
            rates = rates.merge(_observed_rates(observed, region, years), how="left",
                                on="participant_id")  # fmt: skip
        return rates, f"forecasts in {folder.name} ({method or 'network'})"
    raise DataError(
        f"{folder}: neither a compare report (errors.tsv) nor forecasts (forecasts.tsv)"
    )


def _rates_from_comparison(folder: Path, region: str, years: float, method: str):
    errors = pd.read_csv(folder / "errors.tsv", sep="\t")
    errors = errors[errors["region"] == region]
    if method not in set(errors["method"]):
        raise DataError(
            f"method '{method}' is not one of {', '.join(sorted(set(errors['method'])))}"
        )
    chosen = errors[errors["method"] == method].copy()
    chosen["distance"] = (chosen["years"] - years).abs()
    chosen = chosen.sort_values(["participant_id", "distance"]).groupby("participant_id").head(1)
    scale = 100 / chosen["years"] / chosen["baseline_ml"]
    table = pd.DataFrame(
        {
            "participant_id": chosen["participant_id"],
            "diagnosis": chosen["diagnosis"],
            "years": chosen["years"],
            "forecast": (chosen["forecast_ml"] - chosen["baseline_ml"]) * scale,
            "observed": (chosen["observed_ml"] - chosen["baseline_ml"]) * scale,
        }
    )
    return table.reset_index(drop=True), f"held-out test participants in {folder.name} ({method})"


def _rates_from_forecasts(folder: Path, region: str, years: float, method: str) -> pd.DataFrame:
    table = pd.read_csv(folder / "forecasts.tsv", sep="\t")
    column = {"network": "network_percent_per_year", "prior": "prior_percent_per_year"}.get(method)
    if column is None:
        raise DataError(f"method '{method}' is not one of network, prior for forecast folders")
    own = table[(table["region"] == region) & ((table["years"] - years).abs() < 0.01)]
    if own.empty:
        available = sorted(set(table.loc[table["years"] > 0, "years"]))
        raise DataError(f"no forecasts at {years:g} years; available horizons {available}")
    return pd.DataFrame(
        {
            "participant_id": own["participant_id"],
            "diagnosis": own["diagnosis"],
            "years": own["years"],
            "forecast": own[column],
        }
    ).reset_index(drop=True)


def _observed_rates(work: Path, region: str, years: float) -> pd.DataFrame:
    """Observed annual rates: baseline to the follow-up nearest ``years`` (within a year)."""
    volumes = pd.read_csv(Layout(work).volumes, sep="\t").sort_values(["participant_id", "age"])
    rows = []
    for participant, visits in volumes.groupby("participant_id"):
        first = visits.iloc[0]
        later = visits.iloc[1:].assign(years=visits["age"].iloc[1:] - first["age"])
        later = later[(later["years"] - years).abs() <= 1.0]
        if later.empty:
            continue
        follow = later.loc[(later["years"] - years).abs().idxmin()]
        rate = 100 * (follow[region] / first[region] - 1) / follow["years"]
        rows.append({"participant_id": participant, "observed": rate})
    return pd.DataFrame(rows, columns=["participant_id", "observed"])


# --- enrichment ----------------------------------------------------------------------------
def enrichment_table(
    rates: pd.DataFrame, region: str, design: Design, fractions, seed: int = 0
) -> pd.DataFrame:
    """n per arm for each enrichment fraction q (1 = no enrichment), forecast and observed."""
    grows = RegionSet.from_toml().get(region).direction > 0  # its "atrophy" is expansion
    atrophy = rates["forecast"] if grows else -rates["forecast"]
    order = np.argsort(-atrophy.to_numpy(), kind="stable")
    rows = []
    for fraction in fractions:
        if not 0 < fraction <= 1:
            raise DataError(f"enrichment fractions must be within (0, 1], got {fraction}")
        keep = int(np.ceil(fraction * len(rates)))
        if keep < MIN_PARTICIPANTS:
            raise DataError(
                f"enrichment {fraction:g} keeps {keep} of {len(rates)} participants; at least "
                f"{MIN_PARTICIPANTS} are needed"
            )
        selected = rates.iloc[order[:keep]]
        row = {
            "fraction": fraction,
            "screened_per_enrolled": len(rates) / keep,
        }
        row |= {
            f"forecast_{k}": v for k, v in sample_size(selected["forecast"], design, seed).items()
        }
        if "observed" in selected and selected["observed"].notna().sum() >= MIN_PARTICIPANTS:
            observed = selected["observed"].dropna().to_numpy()
            row |= {f"observed_{k}": v for k, v in sample_size(observed, design, seed).items()}
        rows.append(row)
    return pd.DataFrame(rows)


def trial_report(
    folder: str | os.PathLike[str],
    out: str | os.PathLike[str],
    region: str,
    design: Design | None = None,
    fractions=(1.0, 0.5, 0.3),
    method: str | None = None,
    observed: str | os.PathLike[str] | None = None,
    seed: int = 0,
) -> dict:
    """Sample sizes and enrichment for ``region``; writes TSV, JSON and PNG into ``out``."""
    from predictor.figures import save_figure

    design = design or Design()
    folder, out = Path(folder), Path(out)
    rates, source = rates_from_folder(
        folder, region, design.years, method, Path(observed) if observed else None
    )
    if len(rates) < MIN_PARTICIPANTS:
        raise DataError(
            f"{source}: {len(rates)} participants; at least {MIN_PARTICIPANTS} are needed"
        )
    fractions = sorted({1.0, *map(float, fractions)}, reverse=True)
    table = enrichment_table(rates, region, design, fractions, seed)
    write_tsv(out / "rates.tsv", rates)
    write_tsv(out / "enrichment.tsv", table)
    summary = {
        "region": region,
        "design": design.__dict__,
        "source": source,
        "caution": TRIAL_CAUTION,
        "enrichment": table.to_dict("records"),
    }
    write_json(out / "trial_size.json", summary)
    save_figure(enrichment_figure(table, region, design), out / "enrichment.png")
    return summary


def enrichment_figure(table: pd.DataFrame, region: str, design: Design):
    """n per arm against the enrichment fraction, forecast and observed, with 95% CIs."""
    from predictor.cautions import CAPTION
    from predictor.figures import NETWORK_COLOUR, PRIOR_COLOUR, pyplot

    plt = pyplot()
    figure, axis = plt.subplots(figsize=(7, 4.8))
    for prefix, colour, label in (
        ("forecast", NETWORK_COLOUR, "rates from forecasts"),
        ("observed", PRIOR_COLOUR, "rates observed (honest estimate)"),
    ):
        if f"{prefix}_n_per_arm" not in table:
            continue
        rows = table.dropna(subset=[f"{prefix}_n_per_arm"])
        low = (rows[f"{prefix}_n_per_arm_exact"] - rows[f"{prefix}_n_ci_low"]).clip(lower=0)
        high = (rows[f"{prefix}_n_ci_high"] - rows[f"{prefix}_n_per_arm_exact"]).clip(lower=0)
        axis.errorbar(rows["fraction"], rows[f"{prefix}_n_per_arm_exact"], yerr=[low, high],
                      fmt="o-", color=colour, capsize=3, label=label)  # fmt: skip
    axis.set_xlabel("fraction enrolled (top forecast atrophy; 1 = no enrichment)")
    axis.set_ylabel("participants per arm")
    axis.set_yscale("log")
    axis.invert_xaxis()
    axis.grid(alpha=0.3)
    axis.legend(fontsize=8)
    axis.set_title(
        f"{region.replace('_', ' ')}: {100 * design.effect:g}% slowing, power "
        f"{design.power:g}, alpha {design.alpha:g}, {design.years:g} years",
        fontsize=10,
    )
    figure.text(0.5, 0.01, CAPTION, ha="center", va="bottom", fontsize=7, color="#8a1c1c")
    figure.tight_layout(rect=(0, 0.07, 1, 1))
    return figure
