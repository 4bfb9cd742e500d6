"""One forecast of the 1 mm MNI152 T1: from the raw scan (preparation included) and prepared."""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))  # tests/helpers.py


def _setup(folder: Path):
    import nibabel as nib
    from helpers import constant_velocity_model
    from nilearn import datasets

    image = folder / "mni.nii.gz"
    nib.save(datasets.load_mni152_template(resolution=1), image)
    return constant_velocity_model(velocity=(0.2, -0.1, 0.1)), image


def forecast_raw_1mm() -> dict:
    """Preparation, network, native-space warps and every output file, two horizons."""
    from predictor.forecast_io import forecast_one

    with tempfile.TemporaryDirectory() as folder:
        model, image = _setup(Path(folder))
        started = time.perf_counter()
        forecast_one(model, image, 70.0, "F", "MCI", [1, 3], Path(folder) / "out")
        return {"horizons": 2, "s_total": round(time.perf_counter() - started, 2)}


def forecast_prepared_1mm() -> dict:
    """Network and native-space warps and volumes for a prepared scan, then the output files.

    ``s_compute`` uses the configured (cubic B-spline) resampling of the
    baseline, ``s_compute_linear`` trilinear resampling; ``s_viewer_and_gif`` is the
    viewer page and GIF alone (also inside ``s_with_outputs``).
    """
    from predictor.forecast import forecast, prepare_for
    from predictor.forecast_io import write_forecast
    from predictor.nifti import load_scan
    from predictor.viewer import Frame, write_viewer

    with tempfile.TemporaryDirectory() as folder:
        model, image = _setup(Path(folder))
        scan = load_scan(image)
        prepared = prepare_for(model, scan)
        started = time.perf_counter()
        result = forecast(model, scan, 70.0, "F", "MCI", [1, 3], prepared=prepared)
        computed = time.perf_counter() - started
        write_forecast(result, model, Path(folder) / "out", "mni", "")
        with_outputs = time.perf_counter() - started
        started = time.perf_counter()
        frames = [Frame(h.years, h.image, h.log_jacobian, h.log_jacobian_sd)
                  for h in result.horizons]  # fmt: skip
        write_viewer(Path(folder) / "out", "again", scan, frames, "viewer only")
        viewer = time.perf_counter() - started
        started = time.perf_counter()
        forecast(model, scan, 70.0, "F", "MCI", [1, 3], prepared=prepared, interpolation="linear")
        return {
            "horizons": 2,
            "s_compute": round(computed, 2),
            "s_with_outputs": round(with_outputs, 2),
            "s_viewer_and_gif": round(viewer, 2),
            "s_compute_linear": round(time.perf_counter() - started, 2),
        }


def ensemble_prepared_1mm() -> dict:
    """A prepared 1 mm forecast (two horizons) by 5 members against 1 (goal: at most 2x):
    the members share the preparation, and the baseline is resampled once per horizon
    through the members' mean velocity. Both with their output files, in one run."""
    from helpers import constant_velocity_model

    from predictor.forecast import forecast, prepare_for
    from predictor.forecast_io import write_forecast
    from predictor.modelstore import Ensemble
    from predictor.nifti import load_scan

    with tempfile.TemporaryDirectory() as folder:
        model, image = _setup(Path(folder))
        members = [model] + [
            constant_velocity_model(velocity=(0.2 + 0.02 * k, -0.1, 0.1)) for k in range(1, 5)
        ]
        scan = load_scan(image)
        prepared = prepare_for(model, scan)
        figures = {"horizons": 2}
        for run, count in enumerate((1, 5, 1)):  # the single member again, to see the noise
            ensemble = Ensemble(Path(folder), tuple(members[:count]), None)
            started = time.perf_counter()
            result = forecast(ensemble, scan, 70.0, "F", "MCI", [1, 3], prepared=prepared)
            computed = time.perf_counter() - started
            write_forecast(result, ensemble, Path(folder) / f"out{run}", "mni", "")
            again = "_again" if run == 2 else ""
            figures[f"s_compute_{count}{again}"] = round(computed, 2)
            figures[f"s_with_outputs_{count}{again}"] = round(time.perf_counter() - started, 2)
        figures["ratio_compute_5_to_1"] = round(figures["s_compute_5"] / figures["s_compute_1"], 2)
        figures["ratio_with_outputs_5_to_1"] = round(
            figures["s_with_outputs_5"] / figures["s_with_outputs_1"], 2
        )
        return figures


def remeasured_after_a_shift() -> dict:
    """Why volumes measured on forecast scans are noisier than the network's own: four
    template_anatomy baselines (2 mm) are moved half a voxel along every axis by the
    forecast's cubic resampler (no anatomical change at all) and prepared again against
    mni152 at the default grid; mean |re-measured - measured| per region, % of total
    brain volume. A forecast scan carries this noise on top of its forecast error."""
    from dataclasses import replace

    import numpy as np

    from predictor.cohort import read_cohort
    from predictor.fields import identity_grid
    from predictor.forecast import baseline_resampler
    from predictor.nifti import load_scan
    from predictor.phantoms.generate import generate_cohort
    from predictor.prepare import PrepareSettings, cached_template, prepare_scan
    from predictor.regions import RegionSet

    regions = RegionSet.from_toml()
    template, settings = cached_template("mni152", regions), PrepareSettings.from_toml()
    rows = []
    with tempfile.TemporaryDirectory() as folder:
        cohort = generate_cohort(Path(folder) / "bids", 4, "demo", seed=7,
                                 scenario_path="template_anatomy", jobs=2)  # fmt: skip
        for image in read_cohort(cohort).groupby("participant_id")["image"].first():
            scan = load_scan(image)
            first = prepare_scan(scan, template, settings)
            shifted = identity_grid(scan.data.shape)[0] + 0.5
            moved = baseline_resampler(scan.data, "cubic")(shifted)
            again = prepare_scan(replace(scan, data=moved), template, settings)
            brain = first.volumes["brain"]
            rows.append(
                {r: abs(again.volumes[r] - first.volumes[r]) / brain for r in regions.names}
            )
    return {r: round(100 * float(np.mean([row[r] for row in rows])), 3) for r in regions.names}


BENCHMARKS = {
    "forecast_raw_1mm": forecast_raw_1mm,
    "forecast_prepared_1mm": forecast_prepared_1mm,
    "ensemble_prepared_1mm": ensemble_prepared_1mm,
    "remeasured_after_a_shift": remeasured_after_a_shift,
}
