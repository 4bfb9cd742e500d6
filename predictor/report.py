"""The comparison report: TSVs of every number, PNG figures and one self-contained HTML page.

The page is built from the TSVs as written (read back), and every number in
it carries ``data-source``, ``data-row`` and ``data-column`` attributes
naming the TSV cell it shows, so a reader (or a test) can trace it. Figures
are embedded as base64 PNG: the page opens offline and makes no request.
"""

from __future__ import annotations

import base64
import html
import json
from pathlib import Path

import numpy as np
import pandas as pd

from predictor.cautions import CAUTION
from predictor.compare import FLOOR, JACOBIAN, NETWORK, NETWORKS, Comparison
from predictor.figures import NETWORK_COLOUR, pyplot, save_figure
from predictor.files import write_json, write_text, write_tsv

TABLES = (
    "summary",
    "headlines",
    "tests",
    "errors",
    "images",
    "by_horizon",
    "by_diagnosis",
    "consistency",
    "noise_floor",
)
FIGURES = {
    "error_by_region.png": "Mean absolute forecast error by region and method (bars: bootstrap "
    "95% CI over participants).",
    "error_by_horizon.png": "Mean absolute error against the forecast horizon.",
    "forecast_vs_observed.png": "Forecast against observed volume change (mL) per pair; the "
    "diagonal is a perfect forecast.",
    "examples.png": "Example test participants on the working grid (template space, white "
    "matter = 1): baseline, real follow-up, network forecast and their difference.",
}
#: method colours: the network in teal, the floor in grey, regressions from a muted palette
PALETTE = ["#b8651b", "#6b4c9a", "#c2a83e", "#4c7fb8", "#9a4c6b", "#7a9a4c", "#5c5c5c"]


def method_colours(methods) -> dict[str, str]:
    others = [m for m in methods if m not in (*NETWORKS, FLOOR)]
    colours = {NETWORK: NETWORK_COLOUR, JACOBIAN: "#2fb3a8", FLOOR: "#a0a0a0"}
    colours |= {m: PALETTE[i % len(PALETTE)] for i, m in enumerate(others)}
    return colours


def write_report(comparison: Comparison, out: str | Path) -> Path:
    """Write TSVs, figures, ``data.json`` and ``report.html`` into ``out``; returns the page."""
    out = Path(out)
    for name in TABLES:
        write_tsv(out / f"{name}.tsv", getattr(comparison, name))
    write_json(out / "data.json", comparison.data)
    tables = {name: pd.read_csv(out / f"{name}.tsv", sep="\t") for name in TABLES}
    figures = {
        "error_by_region.png": figure_error_by_region(tables["summary"]),
        "error_by_horizon.png": figure_error_by_horizon(tables["by_horizon"]),
        "forecast_vs_observed.png": figure_forecast_vs_observed(tables["errors"]),
    }
    if comparison.examples:
        figures["examples.png"] = figure_examples(comparison.examples)
    for name, figure in figures.items():
        save_figure(figure, out / name)
    page = render_page(tables, comparison.data, [n for n in FIGURES if n in figures], out)
    return write_text(out / "report.html", page)


# --- figures ------------------------------------------------------------------------------
def region_axes(regions, height: float):
    """A figure with one panel per region, four to a row (spare panels hidden)."""
    rows = int(np.ceil(len(regions) / 4))
    figure, axes = pyplot().subplots(rows, 4, figsize=(13, height * rows), squeeze=False)
    for axis in np.ravel(axes)[len(regions) :]:
        axis.set_visible(False)
    return figure, list(zip(np.ravel(axes), regions, strict=False))


def figure_error_by_region(summary: pd.DataFrame):
    plt = pyplot()
    regions = list(dict.fromkeys(summary["region"]))
    methods = list(dict.fromkeys(summary["method"]))
    colours = method_colours(methods)
    figure, axis = plt.subplots(figsize=(12, 4.5))
    width = 0.8 / len(methods)
    for k, method in enumerate(methods):
        rows = summary[summary["method"] == method].set_index("region").loc[regions]
        x = np.arange(len(regions)) + (k - (len(methods) - 1) / 2) * width
        low = (rows["mean_pct_tbv"] - rows["ci_low_pct_tbv"]).clip(lower=0)
        high = (rows["ci_high_pct_tbv"] - rows["mean_pct_tbv"]).clip(lower=0)
        axis.bar(x, rows["mean_pct_tbv"], width, color=colours[method], label=method,
                 yerr=[low.fillna(0), high.fillna(0)], capsize=2)  # fmt: skip
    axis.set_xticks(np.arange(len(regions)), [r.replace("_", " ") for r in regions])
    axis.set_ylabel("mean |error| (% of total brain volume)")
    axis.set_yscale("log")
    axis.legend(fontsize=7, ncol=3)
    axis.grid(alpha=0.3, axis="y")
    figure.suptitle("held-out forecast error by region (research use only)", fontsize=11)
    figure.tight_layout()
    return figure


def figure_error_by_horizon(by_horizon: pd.DataFrame):
    colours = method_colours(dict.fromkeys(by_horizon["method"]))
    figure, panels = region_axes(list(dict.fromkeys(by_horizon["region"])), 3.0)
    for axis, region in panels:
        own = by_horizon[by_horizon["region"] == region]
        for method, rows in own.groupby("method", sort=False):
            years = rows["horizon"].str.replace(" y", "").astype(int)
            order = np.argsort(years.to_numpy())
            width = 2 if method in NETWORKS else 1
            axis.plot(years.to_numpy()[order], rows["mean_pct_tbv"].to_numpy()[order], "o-",
                      color=colours[method], label=method, lw=width)  # fmt: skip
        axis.set_title(region.replace("_", " "), fontsize=10)
        axis.set_xlabel("horizon (years)", fontsize=8)
        axis.set_ylabel("mean |error| (% TBV)", fontsize=8)
        axis.grid(alpha=0.3)
    panels[0][0].legend(fontsize=6)
    figure.suptitle("forecast error against horizon (research use only)", fontsize=11)
    figure.tight_layout()
    return figure


def figure_forecast_vs_observed(errors: pd.DataFrame):
    figure, panels = region_axes(list(dict.fromkeys(errors["region"])), 3.25)
    regressions = errors[~errors["method"].isin([*NETWORKS, FLOOR, "no-change"])]
    # the lowest-error regression of each region, shown for orientation (descriptive only)
    best = regressions.groupby(["region", "method"])["abs_error_pct_tbv"].mean().groupby(
        level="region").idxmin().map(lambda key: key[1])  # fmt: skip
    colours = method_colours(dict.fromkeys(errors["method"]))
    for axis, region in panels:
        own = errors[errors["region"] == region]
        for method in (best[region], NETWORK, JACOBIAN):
            rows = own[own["method"] == method]
            observed = rows["observed_ml"] - rows["baseline_ml"]
            forecast = rows["forecast_ml"] - rows["baseline_ml"]
            axis.scatter(observed, forecast, s=14, color=colours[method], label=method, alpha=0.8)
        limits = own[["observed_ml", "forecast_ml"]].sub(own["baseline_ml"], axis=0)
        low, high = float(limits.min().min()), float(limits.max().max())
        axis.plot([low, high], [low, high], color="#444444", lw=0.8)
        axis.set_title(region.replace("_", " "), fontsize=10)
        axis.set_xlabel("observed change (mL)", fontsize=8)
        axis.set_ylabel("forecast change (mL)", fontsize=8)
        axis.legend(fontsize=6)
        axis.grid(alpha=0.3)
    figure.suptitle("forecast against observed change (research use only)", fontsize=11)
    figure.tight_layout()
    return figure


def figure_examples(examples: list):
    """``examples``: (title, baseline, follow-up, forecast) working-grid T1 arrays (X, Y, Z)."""
    plt = pyplot()
    figure, axes = plt.subplots(len(examples), 4, figsize=(12, 3.2 * len(examples)), squeeze=False)
    for row, (title, baseline, follow, ahead) in enumerate(examples):
        k = baseline.shape[2] // 2 + 2
        panels = [
            ("baseline", baseline, "gray", (0, 1.3)),
            ("real follow-up", follow, "gray", (0, 1.3)),
            ("network forecast", ahead, "gray", (0, 1.3)),
            ("forecast - follow-up", ahead - follow, "BrBG", (-0.3, 0.3)),
        ]
        for column, (name, volume, colour_map, (low, high)) in enumerate(panels):
            axis = axes[row, column]
            shown = axis.imshow(volume[:, :, k].T, origin="lower", cmap=colour_map, vmin=low,
                                vmax=high, interpolation="nearest")  # fmt: skip
            axis.set_xticks([])
            axis.set_yticks([])
            axis.set_title(f"{name}" if row else f"{name}\n", fontsize=9)
            if column == 0:
                axis.set_ylabel(title, fontsize=8)
        figure.colorbar(shown, ax=axes[row, 3], shrink=0.8, label="normalised intensity")
    figure.suptitle("example test participants, axial slice (research use only)", fontsize=11)
    return figure


# --- the page -----------------------------------------------------------------------------
def cell(value, source: str, row: int, column: str) -> str:
    """A table cell showing a TSV value, tagged with where it comes from."""
    shown = format_number(value) if isinstance(value, float | int | np.number) else value
    return (
        f'<td data-source="{source}" data-row="{row}" data-column="{html.escape(column)}">'
        f"{html.escape(str(shown))}</td>"
    )


def format_number(value) -> str:
    """Four significant digits (NaN shown as 'n/a')."""
    if value is None or (isinstance(value, float) and np.isnan(value)):
        return "n/a"
    return f"{float(value):.4g}"


def table_html(frame: pd.DataFrame, source: str, columns: list[str] | None = None) -> str:
    columns = columns or list(frame.columns)
    head = "".join(f"<th>{html.escape(c.replace('_', ' '))}</th>" for c in columns)
    body = []
    for index, row in frame.iterrows():
        cells = "".join(cell(row[c], source, int(index), c) for c in columns)
        body.append(f"<tr>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def verdicts(headlines: pd.DataFrame, tests: pd.DataFrame) -> str:
    """Plain words per region: against how many comparators each network variant is better
    or worse (participant-level CIs of the difference), numbers tagged with their TSV cells."""
    items = []
    for region, rows in headlines.groupby("region", sort=False):
        if rows["role"].iloc[0] == "check":
            items.append(
                f"<li><b>{region.replace('_', ' ')}</b>: a check (a reference or the "
                "denominator of % of total brain volume), not a region to win.</li>"
            )
            continue
        parts = []
        for index, row in rows.iterrows():

            def tagged(column, index=index, row=row):
                return (
                    f'<span data-source="headlines.tsv" data-row="{index}" '
                    f'data-column="{column}">{format_number(row[column])}</span>'
                )

            worse = tests[(tests["region"] == region) & (tests["network"] == row["network"])
                          & (tests["verdict"] == "comparator better")]["comparator"]  # fmt: skip
            named = f" (worse than {html.escape(', '.join(worse))})" if len(worse) else ""
            skill = {
                "shown": "; subject-specific skill shown (it beats the population field)",
                "not shown": "; no subject-specific skill shown (it does not beat the "
                "population field)",
            }.get(row["subject_specific_skill"], "")
            parts.append(
                f"{VARIANT_WORDS[row['network']]} is better than {tagged('better_than')} and "
                f"worse than {tagged('worse_than')} of {tagged('comparators')} comparators"
                + named + skill
            )
        role = " (primary endpoint)" if rows["role"].iloc[0] == "primary" else ""
        items.append(
            f"<li><b>{region.replace('_', ' ')}</b>{role}: " + "; ".join(parts) + ".</li>"
        )
    return "<ul>" + "".join(items) + "</ul>"


VARIANT_WORDS = {
    NETWORK: "The network's forecast scan, measured like a real scan,",
    JACOBIAN: "the network's own volume forecast (Jacobian integral)",
}


STYLE = """
body { font-family: sans-serif; margin: 2em auto; max-width: 1150px; color: #1d2a2a; }
h1 { color: #1b5f5a; } h2 { color: #1b5f5a; border-bottom: 1px solid #c8d8d6; }
.caution { background: #fbeee6; border-left: 6px solid #b8651b; padding: 0.6em 1em; }
table { border-collapse: collapse; font-size: 0.82em; margin: 0.6em 0 1.2em; }
th, td { border: 1px solid #c8d8d6; padding: 2px 6px; text-align: right; }
th { background: #e8f1f0; } td:first-child, td:nth-child(2) { text-align: left; }
img { max-width: 100%; border: 1px solid #c8d8d6; margin: 0.4em 0; }
figcaption { font-size: 0.85em; color: #4a5a5a; }
"""


def observed_note(data: dict) -> str:
    """How the observed follow-up volumes (and the network's scan volumes) were measured."""
    measured = data.get("run", {}).get("scan_volumes", True)  # compare always measures
    if data.get("observed_change") == "registration":
        note = (
            "Observed follow-up volumes of the regions with a measured boundary (whole "
            "brain, hippocampi, ventricles) are the baseline volume times the change "
            "measured between the two aligned visits by the boundary shift integral "
            "(changes.tsv of the workspace); the other regions' are the follow-up's own "
            "segmentation."
        )
        if measured:
            note += (
                " The network's forecast scans were measured the same way: the baseline "
                "volume times the change by registration from the baseline to the forecast "
                "scan for those regions, the forecast scan's segmentation for the others."
            )
        return note
    if not measured:
        return "Observed follow-up volumes are the follow-ups' own segmentation."
    return (
        "The network's volumes were measured on its forecast scans by the same "
        "segmentation as the real follow-ups."
    )


def rescan_section(floor: pd.DataFrame, observed: str) -> str:
    """The change measurement's scan-rescan noise floor beside the errors (or why none)."""
    if floor.empty:
        return "<p>No scan-rescan noise floor is shown: the workspace has no same-day rescans.</p>"
    which = (
        "by registration for the regions with a boundary, by segmentation for the others"
        if observed == "registration"
        else "by segmentation"
    )
    return (
        f"<h3>Scan-rescan noise floor</h3><p>The observed change is measured {which}. Below, "
        "each measurement's median absolute change between a scan and its same-day rescan "
        "(the same anatomy), as % of total brain volume (the unit of the errors above) and "
        "as % of the region: an error near it is as small as the measurement can show.</p>"
        + table_html(floor, "noise_floor.tsv")
    )


def render_page(tables: dict[str, pd.DataFrame], data: dict, figures: list[str], out: Path):
    summary, tests = tables["summary"], tables["tests"]
    participants = data["participants"]
    images = tables["images"].groupby("method").mean(numeric_only=True).reset_index()
    write_tsv(out / "images_mean.tsv", images)
    images = pd.read_csv(out / "images_mean.tsv", sep="\t")
    floor_note = (
        f"<p>The row <i>{FLOOR}</i> is the phantom generator's best forecast from what is "
        "visible at baseline: no method can be expected to do better on average.</p>"
        if data.get("phantom_floor")
        else ""
    )
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<title>predictor: held-out comparison</title>",
        f"<style>{STYLE}</style></head><body>",
        "<h1>Held-out comparison: image forecast against volume regressions</h1>",
        f"<p class='caution'><b>Caution.</b> {html.escape(CAUTION)}</p>",
        "<h2>Data and split</h2>",
        f"<p>Model <code>{html.escape(data['model'])}</code>. Participants were split at the "
        f"participant level: {participants['train']} for training, "
        f"{participants['validation']} for validation and {participants['test']} for this "
        f"test. The regression forecasters were refitted on the training participants only. "
        f"{data['test_pairs']} baseline-to-follow-up pairs of the test participants were "
        f"forecast, at horizons of {data['horizon_years'][0]:.2f} to "
        f"{data['horizon_years'][1]:.2f} years. {observed_note(data)}</p>",
        "<h2>Does the network beat the other forecasts, region by region?</h2>",
        "<p>Each participant counts once: its errors are averaged over its pairs, the "
        "network's error is compared with each comparator's participant by participant, and "
        "the network is called better (or worse) only when the bootstrap 95% CI of the mean "
        "difference over participants excludes zero and the exact sign test over participants "
        "is below 0.05 (Holm-adjusted except for the primary region). Fewer than six test "
        "participants can never reach that, so with few test participants every difference "
        "stays undecided; that is the honest answer.</p>",
        verdicts(tables["headlines"], tests),
        "<h2>Forecast error (% of total brain volume)</h2>",
        floor_note,
        table_html(summary, "summary.tsv"),
        rescan_section(tables["noise_floor"], data["observed_change"]),
        "<h2>Network minus each comparator, per participant (% of total brain volume)</h2>",
        "<p>Mean difference with its participant-cluster bootstrap CI; exact sign test over "
        "participants, uncorrected for the primary region and Holm-corrected for the other "
        "target regions within each comparator.</p>",
        table_html(tests, "tests.tsv"),
        "<h2>Image agreement with the real follow-up (working grid, inside the brain)</h2>",
        table_html(images, "images_mean.tsv"),
        "<h2>By horizon</h2>",
        table_html(tables["by_horizon"], "by_horizon.tsv"),
        "<h2>By diagnosis</h2>",
        table_html(tables["by_diagnosis"], "by_diagnosis.tsv"),
        "<h2>Consistency: measured against Jacobian-integral network volumes</h2>",
        table_html(tables["consistency"], "consistency.tsv"),
        "<h2>Figures</h2>",
    ]
    for name in figures:
        encoded = base64.b64encode((out / name).read_bytes()).decode("ascii")
        parts.append(
            f"<figure><img alt='{html.escape(name)}' src='data:image/png;base64,{encoded}'>"
            f"<figcaption>{html.escape(FIGURES[name])}</figcaption></figure>"
        )
    parts.append(
        f"<p class='caution'>{html.escape(CAUTION)} Every number on this page is in the TSV "
        "files beside it (data-source attributes name the file, row and column).</p>"
    )
    parts.append(f"<script type='application/json' id='data'>{json.dumps(data)}</script>")
    parts.append("</body></html>")
    return "\n".join(parts)
