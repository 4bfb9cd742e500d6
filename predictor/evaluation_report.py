"""The cross-validation report: TSVs, a forest plot and one self-contained HTML page.

The page leads with the forest plot (per region, the network minus each
comparator, with its participant-cluster CI) and one table of regions by
methods; the plain-words verdicts follow, and the long tables sit in
collapsed sections and in the TSVs beside the page. Numbers on the page are
read back from the TSVs and tagged with the cell they show, as in the
comparison report (:mod:`predictor.report`).
"""

from __future__ import annotations

import base64
import html
import json
from pathlib import Path

import numpy as np
import pandas as pd

from predictor.cautions import CAUTION
from predictor.compare import FLOOR, NETWORKS, POPULATION
from predictor.evaluate import Evaluation
from predictor.figures import pyplot, save_figure
from predictor.files import write_json, write_text, write_tsv
from predictor.report import (
    STYLE,
    VARIANT_WORDS,
    method_colours,
    observed_note,
    rescan_section,
    table_html,
)

TABLES = (
    "summary", "headlines", "tests", "skill", "coverage", "errors", "by_horizon", "by_diagnosis",
    "truth_summary", "truth_tests", "noise_floor", "conformal",
)  # fmt: skip
NO_CHANGE = "no-change"
DETAILS = {
    "tests": "Network minus each comparator, per participant (% of total brain volume)",
    "skill": "Subject-specific skill: calibration slope and R^2 of individual annualised change",
    "coverage": "Coverage of the 90% intervals, overall, by horizon and by diagnosis (the "
    "regressions' intervals are calibrated on segmentation volumes; where the observed "
    "change is measured by registration they are scored against another measurement)",
    "by_horizon": "Mean |error| by horizon",
    "by_diagnosis": "Mean |error| by diagnosis",
    "truth_tests": "Phantoms only: network minus each comparator against the true change",
}


def write_evaluation(evaluation: Evaluation, out: str | Path) -> Path:
    """Write the TSVs, ``evaluation.json``, ``forest.png`` and ``evaluation.html``."""
    out = Path(out)
    for name in TABLES:
        write_tsv(out / f"{name}.tsv", getattr(evaluation, name))
    write_json(out / "evaluation.json", evaluation.data)
    tables = {name: _read(out / f"{name}.tsv") for name in TABLES}
    save_figure(figure_forest(tables["tests"]), out / "forest.png")
    glance = pivot_summary(tables["summary"], evaluation.regions)
    write_tsv(out / "at_a_glance.tsv", glance)
    tables["at_a_glance"] = pd.read_csv(out / "at_a_glance.tsv", sep="\t")
    if len(tables["truth_summary"]):
        truth = pivot_summary(tables["truth_summary"], evaluation.regions)
        write_tsv(out / "against_truth.tsv", truth)
        tables["against_truth"] = pd.read_csv(out / "against_truth.tsv", sep="\t")
    return write_text(out / "evaluation.html", render(tables, evaluation.data, out))


def _read(path: Path) -> pd.DataFrame:
    """A TSV as written; an empty table (no columns) as an empty frame."""
    try:
        return pd.read_csv(path, sep="\t")
    except pd.errors.EmptyDataError:
        return pd.DataFrame()


def pivot_summary(summary: pd.DataFrame, regions) -> pd.DataFrame:
    """Regions (rows) by methods (columns): mean |error| in % of total brain volume, and a
    last row counting the participants each method forecast (a forecaster not fitted on
    some folds forecast fewer, so its means cover fewer participants)."""
    table = summary.pivot(index="region", columns="method", values="mean_pct_tbv")
    methods = list(dict.fromkeys(summary["method"]))
    table = table.reindex(index=list(regions), columns=methods)
    table.loc["participants forecast"] = summary.groupby("method")["participants"].max()
    return table.reset_index()


def figure_forest(tests: pd.DataFrame):
    """One panel per target region (rows) and network variant (columns), each on its own
    scale: the mean participant-level difference network minus each comparator (% TBV)
    with its CI. Left of zero the network is better."""
    plt = pyplot()
    targets = tests[tests["role"] != "check"]
    regions = list(dict.fromkeys(targets["region"]))
    variants = [v for v in NETWORKS if v in set(targets["network"])]
    comparators = list(dict.fromkeys(targets["comparator"]))
    colours = comparator_colours(comparators)
    figure, axes = plt.subplots(
        len(regions), len(variants), squeeze=False, sharey=True,
        figsize=(12, 0.6 + (0.3 * len(comparators) + 0.5) * len(regions)),
    )  # fmt: skip
    y = np.arange(len(comparators))
    for row, region in enumerate(regions):
        for column, variant in enumerate(variants):
            axis = axes[row][column]
            own = targets[(targets["region"] == region) & (targets["network"] == variant)]
            own = own.set_index("comparator").reindex(comparators)
            difference = own["difference_pct_tbv"]
            low = (difference - own["ci_low_pct_tbv"]).clip(lower=0).fillna(0)
            high = (own["ci_high_pct_tbv"] - difference).clip(lower=0).fillna(0)
            for k, comparator in enumerate(comparators):
                axis.errorbar(difference.iloc[k], y[k], xerr=[[low.iloc[k]], [high.iloc[k]]],
                              fmt="o", ms=4, color=colours[comparator], capsize=2)  # fmt: skip
            axis.axvline(0.0, color="#333333", lw=0.9)
            axis.set_yticks(y, [f"minus {c}" for c in comparators], fontsize=7)
            axis.tick_params(axis="x", labelsize=7)
            axis.grid(alpha=0.3, axis="x")
            axis.set_title(f"{region.replace('_', ' ')}: {variant}", fontsize=9)
        axes[row][0].invert_yaxis()
    for axis in axes[-1]:
        axis.set_xlabel("network minus comparator, mean |error| (% TBV); < 0: network better",
                        fontsize=8)  # fmt: skip
    figure.suptitle(
        "cross-validated difference in forecast error, participant-cluster CI "
        "(research use only)", fontsize=11,
    )  # fmt: skip
    figure.tight_layout(rect=(0, 0, 1, 0.985))  # room for the title
    return figure


def comparator_colours(comparators) -> dict[str, str]:
    """The population field and no change get colours of their own; regressions the
    comparison report's palette."""
    regressions = [c for c in comparators if c not in (POPULATION, NO_CHANGE)]
    colours = method_colours(regressions)
    return colours | {POPULATION: "#c0392b", NO_CHANGE: "#7f7f7f"}


def region_words(tests: pd.DataFrame, headlines: pd.DataFrame, skill: pd.DataFrame) -> str:
    """Per target region and network variant, in plain words: skill beyond the population
    field, and standing against the regressions, with the CIs."""
    items = []
    for region, rows in headlines.groupby("region", sort=False):
        if rows["role"].iloc[0] == "check":
            items.append(f"<li><b>{_name(region)}</b>: a check, not a region to win.</li>")
            continue
        parts = []
        for row in rows.itertuples(index=False):
            own = tests[(tests["region"] == region) & (tests["network"] == row.network)]
            words = f"{VARIANT_WORDS[row.network]}: "
            population = own[own["comparator"] == POPULATION]
            if len(population):
                gain = skill[(skill["region"] == region) & (skill["method"] == row.network)]
                words += (
                    f"subject-specific skill {row.subject_specific_skill} (error minus the "
                    f"population field's {_difference(population.iloc[0])}"
                    + (f"; R^2 gain {_gain(gain.iloc[0])}" if len(gain) else "")
                    + "); "
                )
            regressions = own[~own["comparator"].isin([POPULATION, NO_CHANGE])]
            better = regressions[regressions["verdict"] == "network better"]["comparator"]
            worse = regressions[regressions["verdict"] == "comparator better"]["comparator"]
            if len(worse):
                words += "worse than " + ", ".join(worse)
            elif len(better) == len(regressions) and len(regressions):
                words += "better than every regression"
            else:
                words += f"better than {len(better)} of {len(regressions)} regressions"
            closest = regressions.loc[regressions["difference_pct_tbv"].idxmax()] if len(
                regressions) else None  # fmt: skip
            if closest is not None:
                words += f" (against {closest['comparator']}: {_difference(closest)})"
            parts.append(html.escape(words))
        role = " (primary endpoint)" if rows["role"].iloc[0] == "primary" else ""
        items.append(f"<li><b>{_name(region)}</b>{role}: " + "<br>".join(parts) + "</li>")
    return "<ul>" + "".join(items) + "</ul>"


def _name(region: str) -> str:
    return html.escape(region.replace("_", " "))


def _difference(row) -> str:
    return (
        f"{row['difference_pct_tbv']:+.3f} % TBV [{row['ci_low_pct_tbv']:+.3f}, "
        f"{row['ci_high_pct_tbv']:+.3f}]"
    )


def _gain(row) -> str:
    return (
        f"{row['r2_gain_over_population']:+.2f} [{row['gain_ci_low']:+.2f}, "
        f"{row['gain_ci_high']:+.2f}]"
    )


def truth_section(tables: dict[str, pd.DataFrame]) -> list[str]:
    """Phantom cohorts: the same errors against the generator's true change, where a
    measured change that misses part of the truth cannot flatter any method."""
    if "against_truth" not in tables:
        return []
    return [
        "<h2>Against the phantom's true change (% of total brain volume)</h2><p>The "
        "observed change above is measured, and a measurement that misses part of the "
        "true change favours forecasts of little change (no change itself, and any method "
        "that learned the measurement's shortfall). Here the same forecasts are scored "
        "against the measured baseline times the phantom's true change; a method below "
        "the floor above but not here was rewarded for the measurement's error.</p>",
        table_html(tables["against_truth"], "against_truth.tsv"),
    ]


def run_note(run: dict) -> str:
    """One paragraph on how the folds were trained and scored (a coarse or short run, such
    as the demo's, says so here)."""
    grid = " x ".join(f"{v:g}" for v in run["grid_mm"])
    pairs = run["max_pairs_per_epoch"] or "all"
    scans = (
        "The network's forecast scans were also measured like real follow-ups."
        if run["scan_volumes"]
        else "The network's forecast scans were not measured (--no-scan-volumes): only its "
        "own Jacobian-integral volumes are scored."
    )
    covariates = run.get("covariates") or []
    given = (
        f" Every model (network, population field and regressions) was also given the "
        f"covariates {', '.join(covariates)}."
        if covariates
        else ""
    )
    return (
        f"<p>Each fold's models were trained on a {grid} mm working grid for at most "
        f"{run['epochs']} epochs of {pairs} training pairs (network channels "
        f"{', '.join(str(c) for c in run['channels'])}); a coarser grid or fewer epochs "
        f"than a study would use may understate what the network can do. {scans}{given}</p>"
    )


def render(tables: dict[str, pd.DataFrame], data: dict, out: Path) -> str:
    level = f"{100 * data['level']:g}%"
    encoded = base64.b64encode((out / "forest.png").read_bytes()).decode("ascii")
    floor = (
        f" The column <i>{FLOOR}</i> is the phantom generator's best forecast from what is "
        "visible at baseline."
        if data["phantom_floor"]
        else ""
    )
    tuned = "".join(
        f"<li>fold {html.escape(str(fold))}: "
        + "; ".join(
            f"{html.escape(name)} {html.escape(choice['folder'])} (inner-validation figure "
            + ", ".join(f"{html.escape(k)} {v:.4g}" for k, v in choice["validation"].items())
            + ")"
            for name, choice in chosen.items()
        )
        + "</li>"
        for fold, chosen in data.get("tuning", {}).items()
    )
    not_fitted = "".join(
        f"<li>{html.escape(method)}: {html.escape('; '.join(why))}</li>"
        for method, why in data["not_fitted"].items()
    )
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<title>predictor: cross-validated evaluation</title>",
        f"<style>{STYLE}</style></head><body>",
        "<h1>Cross-validated evaluation: image forecast against its comparators</h1>",
        f"<p class='caution'><b>Caution.</b> {html.escape(CAUTION)}</p>",
        f"<p>{data['folds']}-fold cross-validation at the participant level (stratified by "
        f"diagnosis, seed {data['fold_seed']}): {data['forecast_participants']} of "
        f"{data['participants']} participants had a follow-up and were forecast once, while "
        f"held out, over {data['pairs']} baseline-to-follow-up pairs at horizons of "
        f"{data['horizon_years'][0]:.2f} to {data['horizon_years'][1]:.2f} years. Every "
        "comparator was fitted on the same training folds. The primary endpoint, named "
        f"before the run in configs/compare.toml, is <b>{_name(data['primary_region'])}</b> "
        "(all horizons, each participant's mean error). "
        f"{observed_note(data)}</p>",
        run_note(data["run"]),
        f"<figure><img alt='forest plot' src='data:image/png;base64,{encoded}'><figcaption>"
        "Network minus each comparator: the mean over participants of the difference in "
        "their mean absolute error (% of total brain volume), with its participant-cluster "
        f"bootstrap {level} CI. Left of zero the network is better.</figcaption></figure>",
        f"<h2>Mean absolute error (% of total brain volume), regions by methods</h2><p>{floor}"
        "</p>",
        table_html(tables["at_a_glance"], "at_a_glance.tsv"),
        rescan_section(tables["noise_floor"], data["observed_change"]),
        *truth_section(tables),
        "<h2>Region by region</h2>",
        "<p>A method is better or worse only where the CI of the participant-level "
        "difference excludes zero and the exact sign test over participants is below "
        f"{1 - data['level']:.2g} (Holm-adjusted except for the primary endpoint). "
        "Subject-specific skill is shown only where the network beats the population "
        "field (the same training fed the template, so it knows only age, sex, "
        "diagnosis and any declared covariates) and its R^2 of individual "
        "annualised change exceeds the population field's with a CI above zero.</p>",
        region_words(tables["tests"], tables["headlines"], tables["skill"]),
    ]
    if tuned:
        parts.append(
            "<h2>Tuned on inner validation only</h2><p>Each fold's models were trained once "
            "per value of the tuned weight and the value with the lowest figure on the "
            "fold's inner validation participants was kept, for the network and the "
            "population field separately (so the skill contrast compares two tuned models):"
            f"</p><ul>{tuned}</ul>"
        )
    if not_fitted:
        parts.append(f"<h2>Forecasters not fitted on some folds</h2><ul>{not_fitted}</ul>")
    parts.append(
        f"<p>Intervals of the network's volumes ({data['members']} member(s) per fold): "
        f"{html.escape(data['network_interval'])}. Their coverage is under "
        "<i>coverage</i> below; conformal.tsv holds every held-out score, the input of "
        "<code>predictor calibrate</code>.</p>"
    )
    for name, title in DETAILS.items():
        if tables[name].empty:
            continue
        parts.append(
            f"<details><summary>{html.escape(title)} ({name}.tsv)</summary>"
            f"{table_html(tables[name], f'{name}.tsv')}</details>"
        )
    parts.append(
        f"<p class='caution'>{html.escape(CAUTION)} Every number on this page is in the TSV "
        "files beside it; errors.tsv holds every pair's forecast and error.</p>"
    )
    parts.append(f"<script type='application/json' id='data'>{json.dumps(data)}</script>")
    parts.append("</body></html>")
    return "\n".join(parts)
