"""Figures (PNG, matplotlib's Agg backend): forecast overviews and volume trajectories.

Every figure carries the research-use caution in its caption and states the
units on its colour bars and axes. Planes are drawn in RAS order with the
subject's left on the left of each panel (marked), superior or anterior up.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pandas as pd

from predictor.cautions import CAPTION, CAUTION
from predictor.files import write_bytes

#: our own colour choices: greys for scans, a brown-teal diverging map for differences,
#: a purple-green diverging map for the log-Jacobian
SCAN_MAP, DIFFERENCE_MAP, JACOBIAN_MAP = "gray", "BrBG", "PRGn"
#: a sequential map for the members' spread (0 = the members agree)
SPREAD_MAP = "YlOrBr"
NETWORK_COLOUR, PRIOR_COLOUR = "#1b7f79", "#b8651b"
DPI = 80


def pyplot():
    """matplotlib's pyplot on the Agg backend (no screen needed)."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    return plt


def save_figure(figure, path: str | Path) -> Path:
    """Write a matplotlib figure as PNG atomically (the caution in its metadata) and close it."""
    return write_bytes(path, figure_png(figure))


def figure_png(figure) -> bytes:
    """A matplotlib figure rendered as PNG bytes (the caution in its metadata); closes it."""
    stream = io.BytesIO()
    metadata = {"Description": CAUTION, "Software": "predictor"}
    figure.savefig(stream, dpi=DPI, format="png", metadata=metadata)
    pyplot().close(figure)
    return stream.getvalue()


#: the slices of :func:`planes`, and the (column, row) voxel axes each one shows
PLANE_NAMES = ("axial", "coronal", "sagittal")
PLANE_AXES = ((0, 1), (0, 2), (1, 2))


def planes(volume: np.ndarray, centre) -> list[np.ndarray]:
    """Axial, coronal and sagittal slices through ``centre`` (voxel indices), display-ready:
    (rows, columns) arrays with row 0 at the bottom (see :data:`PLANE_AXES`)."""
    i, j, k = (int(round(c)) for c in centre)
    return [volume[:, :, k].T, volume[:, j, :].T, volume[i, :, :].T]


def forecast_overview(
    baseline: np.ndarray,
    forecast: np.ndarray,
    log_jacobian: np.ndarray,
    brain: np.ndarray,
    voxel_mm: np.ndarray,
    title: str,
    log_jacobian_sd: np.ndarray | None = None,
):
    """Baseline, forecast, difference and log-Jacobian in three planes (a matplotlib Figure),
    and the members' log-Jacobian SD when given (an ensemble's voxel-wise uncertainty).

    Arrays are (X, Y, Z) in RAS order; ``brain`` is a boolean mask that
    chooses the slices (its centre) and the intensity window.
    """
    plt = pyplot()
    centre = np.argwhere(brain).mean(axis=0) if brain.any() else np.array(brain.shape) / 2
    base, ahead, jacobian, inside = (
        planes(volume, centre) for volume in (baseline, forecast, log_jacobian, brain)
    )
    difference = [a - b for a, b in zip(ahead, base, strict=True)]

    def limit(shown, floor):
        values = np.concatenate([np.abs(p[m]) for p, m in zip(shown, inside, strict=True)])
        return max(float(np.percentile(values, 99.5)) if values.size else floor, floor)

    top = limit(base, 1e-6)
    spread = limit(difference, 1e-6 * top)
    jacobian_limit = limit(jacobian, 1e-4)
    jacobian = [np.where(m, p, np.nan) for p, m in zip(jacobian, inside, strict=True)]
    columns = [
        ("baseline", base, SCAN_MAP, (0, top), "intensity (scanner units)"),
        ("forecast", ahead, SCAN_MAP, (0, top), "intensity (scanner units)"),
        ("forecast - baseline", difference, DIFFERENCE_MAP, (-spread, spread), "scanner units"),
        (
            "log-Jacobian",
            jacobian,
            JACOBIAN_MAP,
            (-jacobian_limit, jacobian_limit),
            "log volume ratio (< 0: shrinkage)",
        ),
    ]
    if log_jacobian_sd is not None:
        sd = [np.where(m, p, np.nan) for p, m in zip(planes(log_jacobian_sd, centre), inside,
                                                      strict=True)]  # fmt: skip
        columns.append(("member spread", sd, SPREAD_MAP, (0, limit(sd, 1e-4)),
                        "SD of the log-Jacobian across members"))  # fmt: skip
    aspects = [voxel_mm[row] / voxel_mm[column] for column, row in PLANE_AXES]
    figure = plt.figure(figsize=(3.25 * len(columns), 10.5))
    layout = figure.add_gridspec(
        4, len(columns), height_ratios=[1, 1, 1, 0.06], hspace=0.08, wspace=0.05
    )
    for column, (name, shown_planes, colour_map, limits, unit) in enumerate(columns):
        for row, (plane, aspect) in enumerate(zip(shown_planes, aspects, strict=True)):
            axis = figure.add_subplot(layout[row, column])
            shown = axis.imshow(
                plane, origin="lower", cmap=colour_map, vmin=limits[0], vmax=limits[1],
                aspect=aspect, interpolation="nearest",
            )  # fmt: skip
            axis.set_xticks([])
            axis.set_yticks([])
            if row == 0:
                axis.set_title(name, fontsize=11)
            if column == 0:
                axis.set_ylabel(PLANE_NAMES[row], fontsize=10)
            if row < 2:
                axis.text(0.02, 0.03, "L", transform=axis.transAxes, color="#e0e0e0", fontsize=9)
        colour_bar = figure.colorbar(
            shown, cax=figure.add_subplot(layout[3, column]), orientation="horizontal"
        )
        colour_bar.set_label(unit, fontsize=9)
    figure.suptitle(title, fontsize=12)
    figure.text(0.5, 0.01, CAPTION, ha="center", va="bottom", fontsize=9, color="#8a1c1c")
    figure.subplots_adjust(left=0.04, right=0.98, top=0.93, bottom=0.1)
    return figure


def trajectories(
    table: pd.DataFrame, prior_band: pd.DataFrame | None, baseline_age: float, title: str
):
    """Each region's forecast volume (mL) against age: network points (with their conformal
    interval as bars where the model is calibrated), prior mean and 90% band.

    ``table`` is a forecast volume table (region, years, network_ml, ...);
    ``prior_band`` has region, years, mean_ml, lower_ml, upper_ml on a fine
    grid of horizons (or None when there is no prior forecast).
    """
    plt = pyplot()
    regions = list(dict.fromkeys(table["region"]))
    columns = 4
    rows = int(np.ceil(len(regions) / columns))
    figure, axes = plt.subplots(rows, columns, figsize=(3.4 * columns, 3.0 * rows + 0.8))
    for axis, region in zip(np.ravel(axes), regions, strict=False):
        own = table[table["region"] == region].sort_values("years")
        start = own.iloc[:1].assign(years=0.0, network_ml=own["baseline_ml"].iloc[0])
        own = pd.concat([start, own[own["years"] > 0]])
        if prior_band is not None:
            band = prior_band[prior_band["region"] == region].sort_values("years")
            ages = baseline_age + band["years"]
            axis.fill_between(ages, band["lower_ml"], band["upper_ml"], color=PRIOR_COLOUR,
                              alpha=0.2, label="prior 90% interval")  # fmt: skip
            axis.plot(ages, band["mean_ml"], color=PRIOR_COLOUR, label="mixed-effects prior")
        axis.plot(baseline_age + own["years"], own["network_ml"], "o-", color=NETWORK_COLOUR,
                  label="network")  # fmt: skip
        bounded = own[own["years"] > 0].dropna(subset=["network_lower_ml"])
        if len(bounded):
            axis.errorbar(
                baseline_age + bounded["years"], bounded["network_ml"],
                yerr=[bounded["network_ml"] - bounded["network_lower_ml"],
                      bounded["network_upper_ml"] - bounded["network_ml"]],
                fmt="none", ecolor=NETWORK_COLOUR, capsize=3, label="network interval",
            )  # fmt: skip
        axis.set_title(region.replace("_", " "), fontsize=10)
        axis.set_xlabel("age (years)", fontsize=8)
        axis.set_ylabel("volume (mL)", fontsize=8)
        axis.tick_params(labelsize=7)
        axis.grid(alpha=0.3)
    for axis in np.ravel(axes)[len(regions) :]:
        axis.axis("off")
    np.ravel(axes)[0].legend(fontsize=7)
    figure.suptitle(title, fontsize=12)
    figure.text(0.5, 0.005, CAPTION, ha="center", va="bottom", fontsize=8, color="#8a1c1c")
    figure.tight_layout(rect=(0, 0.06, 1, 0.95))
    return figure
