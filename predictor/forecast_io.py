"""Forecast outputs on disk: one scan or a whole cohort, BIDS-derivatives layout, resumable.

For a scan with stem ``S`` (``sub-001_ses-01`` in a cohort, else the file
name without ``.nii[.gz]`` and ``_T1w``) and horizon label ``H``
(``forecast24mo`` for 2 years)::

    DIR/dataset_description.json
    DIR/[sub-001/ses-01/anat/]
        S_desc-H_T1w.nii.gz            forecast scan: the input's shape, affine, orientation
        S_desc-H_logjacobian.nii.gz    log volume ratio of the forward map (< 0: shrinkage)
        S_desc-H_logjacobiansd.nii.gz  (ensembles) member SD of the log-Jacobian
        S_desc-H_displacement.nii.gz   vector image, RAS mm: forecast(p) = baseline(p + u(p))
        S_desc-H_overview.png          baseline, forecast, difference, log-Jacobian (, SD)
        S_desc-forecast_volumes.tsv    regions x horizons: baseline, network (member mean,
                                       SD, calibrated interval), prior, change
        S_desc-forecast_trajectories.png
        S_desc-forecast_viewer.html    progression viewer: one offline page (predictor.viewer)
        S_desc-forecast_progression.gif  mid-planes over the horizons, for slides
        S_desc-forecast_provenance.json    written last: marks the forecast complete
    DIR/forecasts.tsv, DIR/failures.tsv    (cohort runs) every participant's volumes; failures

Every file is written atomically; a rerun skips a scan whose provenance
matches (same model, input bytes, horizons and covariates) and redoes the rest.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd

from predictor.cautions import CAUTION
from predictor.errors import DataError, PredictorError, ScanError
from predictor.files import (
    exclusive,
    redact_folders,
    sha256_file,
    write_bytes,
    write_json,
    write_tsv,
)
from predictor.forecast import ForecastResult, as_ensemble, covariate_values, forecast
from predictor.modelstore import Ensemble, TrainedModel, package_versions
from predictor.nifti import save_like
from predictor.parallel import run_all
from predictor.viewer import Frame, write_viewer

PROVENANCE = "desc-forecast_provenance.json"
VOLUMES = "desc-forecast_volumes.tsv"
TRAJECTORIES = "desc-forecast_trajectories.png"
#: threads compressing the NIfTI outputs of one forecast
IMAGE_WRITERS = 2
IDENTIFIERS = ("participant_id", "session_id", "age", "sex", "diagnosis")


def horizon_label(years: float) -> str:
    """BIDS ``desc`` label of a horizon, in whole months: 2 years -> ``forecast24mo``."""
    return f"forecast{int(round(years * 12))}mo"


def check_horizons(years) -> list[float]:
    """Sorted unique horizons (years); two horizons in the same month are an error."""
    horizons = sorted({float(t) for t in years})
    labels = [horizon_label(t) for t in horizons]
    if len(set(labels)) != len(labels):
        raise DataError(f"horizons {horizons} years must differ by at least one month")
    return horizons


def scan_stem(name: str) -> str:
    """``sub-01_ses-02_T1w.nii.gz`` -> ``sub-01_ses-02``; ``scan.nii`` -> ``scan``."""
    stem = name.removesuffix(".gz").removesuffix(".nii")
    return stem.removesuffix("_T1w")


def prior_band(model: Ensemble, result: ForecastResult, points: int = 25) -> pd.DataFrame:
    """The prior's mean and 90% interval on a fine grid of horizons (for the trajectories)."""
    longest = max(h.years for h in result.horizons)
    request = pd.DataFrame(
        [{"participant_id": "scan"} | result.condition | result.prepared.volumes]
    )
    try:
        return model.lead.prior.predict(request, np.linspace(0.0, max(longest, 0.5), points))
    except DataError:
        return None


def write_forecast(
    result: ForecastResult,
    model: Ensemble | TrainedModel,
    folder: str | os.PathLike[str],
    stem: str,
    input_checksum: str,
    identifiers: dict | None = None,
) -> dict:
    """Write every output of one scan's forecast (see the module docstring); returns provenance.

    ``model``: the ensemble (or the one model) that made it."""
    from predictor.figures import figure_png, forecast_overview, save_figure, trajectories

    model = as_ensemble(model)
    folder = Path(folder)
    scan = result.scan
    brain = sum(result.prepared.native_tissue.values()) > 0.5
    outputs = []
    # the images are compressed on worker threads (zlib releases the GIL) while the
    # figures are rendered; the figures are written only once every image is, so a
    # failed write (raised here) adds no new file
    with ThreadPoolExecutor(IMAGE_WRITERS) as pool:
        written, overviews = [], {}
        for horizon in result.horizons:
            base = f"{stem}_desc-{horizon_label(horizon.years)}"
            images = [("T1w", horizon.image), ("logjacobian", horizon.log_jacobian),
                      ("displacement", horizon.displacement_mm)]  # fmt: skip
            if horizon.log_jacobian_sd is not None:
                images.append(("logjacobiansd", horizon.log_jacobian_sd))
            for suffix, array in images:
                name = f"{base}_{suffix}.nii.gz"
                written.append(pool.submit(save_like, array, scan, folder / name))
                outputs.append(name)
            figure = forecast_overview(
                scan.data,
                horizon.image,
                horizon.log_jacobian,
                brain,
                scan.voxel_size_mm,
                f"{stem}: forecast at +{horizon.years:g} years (age {result.condition['age']:g}, "
                f"{result.condition['diagnosis']})",
                horizon.log_jacobian_sd,
            )
            overviews[f"{base}_overview.png"] = figure_png(figure)
        for future in written:
            future.result()
    for name, png in overviews.items():
        write_bytes(folder / name, png)
        outputs.append(name)
    write_tsv(folder / f"{stem}_{VOLUMES}", result.volumes)
    figure = trajectories(
        result.volumes,
        prior_band(model, result),
        result.condition["age"],
        f"{stem}: forecast regional volumes (network and mixed-effects prior)",
    )
    save_figure(figure, folder / f"{stem}_{TRAJECTORIES}")
    outputs += [f"{stem}_{VOLUMES}", f"{stem}_{TRAJECTORIES}"]
    frames = [Frame(h.years, h.image, h.log_jacobian, h.log_jacobian_sd)
              for h in result.horizons]  # fmt: skip
    outputs += write_viewer(folder, stem, scan, frames, viewer_title(stem, result.condition))
    provenance = _provenance(result, model, input_checksum, identifiers, outputs)
    write_json(folder / f"{stem}_{PROVENANCE}", provenance)
    return provenance


def viewer_title(stem: str, condition: dict) -> str:
    return (f"{stem}: forecast progression (age {condition['age']:g} years, "
            f"{condition['diagnosis']})")  # fmt: skip


def view_forecast(folder: str | os.PathLike[str], scan_path: str | os.PathLike[str]) -> Path:
    """Write the progression viewer (and GIF) of an earlier forecast in ``folder`` (searched
    recursively) of the baseline ``scan_path`` (the latest, when there are several);
    returns the page's path. The scan must be the forecast's input (its checksum is
    compared with the provenance's)."""
    from predictor.nifti import load_scan

    folder, checksum = Path(folder), sha256_file(scan_path)
    found = []
    for path in sorted(folder.rglob(f"*_{PROVENANCE}")):
        try:
            saved = json.loads(path.read_text())
            if saved["input"]["sha256"] == checksum:
                found.append((path, saved))
        except (ValueError, KeyError, TypeError):
            continue
    if not found:
        raise DataError(f"{folder}: no forecast of {Path(scan_path).name} (no provenance file "
                        "records its checksum)")  # fmt: skip
    path, saved = max(found, key=lambda item: item[0].stat().st_mtime)  # the latest
    stem = path.name.removesuffix(f"_{PROVENANCE}")
    scan = load_scan(scan_path)
    frames = []
    for years in saved["horizons_years"]:
        base = path.parent / f"{stem}_desc-{horizon_label(years)}"
        arrays = [load_scan(f"{base}_{suffix}.nii.gz").data if
                  Path(f"{base}_{suffix}.nii.gz").is_file() else None
                  for suffix in ("T1w", "logjacobian", "logjacobiansd")]  # fmt: skip
        if arrays[0] is None:
            raise DataError(f"{base}_T1w.nii.gz: missing; the forecast is incomplete")
        frames.append(Frame(float(years), *arrays))
    names = write_viewer(path.parent, stem, scan, frames, viewer_title(stem, saved["participant"]))
    return path.parent / names[0]


def _provenance(result, model: Ensemble, input_checksum, identifiers, outputs) -> dict:
    lead, calibration = model.lead, model.calibration
    return {
        "kind": "predictor forecast",
        "cautions": CAUTION,
        "model": {
            "folder": model.folder.name,
            "weights_sha256": model.checksum,  # an ensemble's: of its members and calibration
            "template": Path(lead.info.template).name,
            "members": len(model.members),
            "epochs_run": [m.info.epochs_run for m in model.members],
            "best_epoch": [m.info.best_epoch for m in model.members],
            "calibration": None if calibration is None else {
                key: calibration.get(key)
                for key in ("level", "method", "bands_years", "participants", "observed_change")
            },
        },
        "input": {"file": result.scan.name, "sha256": input_checksum},
        "participant": (identifiers or {}) | result.condition,
        "horizons_years": [h.years for h in result.horizons],
        "warnings": result.warnings,
        "settings": {
            "prepare": lead.info.prepare_settings,
            "grid": lead.info.grid,
        },
        "registration": {
            key: value
            for key, value in result.prepared.diagnostics.items()
            if key.startswith("registration")
        },
        "conventions": {
            "displacement": "RAS millimetres; forecast(p) = baseline(p + u(p))",
            "log_jacobian": "log of the forward map's Jacobian determinant; < 0 means shrinkage",
            "volumes": "mL; network = member mean, its interval conformal at the calibration's "
            "level; prior interval 90%; percent per year = linear annualised change",
        },
        "outputs": outputs,
        "versions": package_versions(),
    }


def is_complete(path: Path, checksum: str, input_checksum: str, horizons, condition) -> bool:
    """Whether a provenance file records the same forecast (so a rerun can skip it)."""
    if not path.is_file():
        return False
    try:
        saved = json.loads(path.read_text())
        return (
            saved["model"]["weights_sha256"] == checksum
            and saved["input"]["sha256"] == input_checksum
            and saved["horizons_years"] == list(horizons)
            and all(saved["participant"].get(k) == v for k, v in condition.items())
            and all((path.parent / name).is_file() for name in saved["outputs"])
        )
    except (ValueError, KeyError, TypeError):
        return False


def write_description(out: Path) -> None:
    """BIDS ``dataset_description.json`` of a forecast folder (once)."""
    path = out / "dataset_description.json"
    if not path.is_file():
        write_json(
            path,
            {
                "Name": "predictor forecasts",
                "BIDSVersion": "1.9.0",
                "DatasetType": "derivative",
                "GeneratedBy": [{"Name": "predictor", "Version": package_versions()["predictor"]}],
                "HowToAcknowledge": CAUTION,
            },
        )


def forecast_one(
    model: Ensemble | str | os.PathLike[str],
    image: str | os.PathLike[str],
    age: float,
    sex: str,
    diagnosis: str,
    years,
    out: str | os.PathLike[str],
    identifiers: dict | None = None,
    covariates: dict | None = None,
) -> tuple[dict, bool]:
    """Forecast one scan file into ``out``; returns (provenance, skipped because complete).
    ``covariates``: the model's declared covariates at baseline (see :func:`forecast`)."""
    model = as_ensemble(model)
    horizons = check_horizons(years)
    out, image = Path(out), Path(image)
    identifiers = identifiers or {}
    if "participant_id" in identifiers:
        folder = out / identifiers["participant_id"] / identifiers["session_id"] / "anat"
        stem = f"{identifiers['participant_id']}_{identifiers['session_id']}"
    else:
        folder, stem = out, scan_stem(image.name)
    if not image.is_file():
        raise ScanError(f"{image}: file not found")
    checksum = sha256_file(image)
    path = folder / f"{stem}_{PROVENANCE}"
    covariates = covariate_values(model.lead, covariates)
    condition = {"age": float(age), "diagnosis": diagnosis} | covariates
    with exclusive(folder / f".{stem}.lock"):  # a concurrent run on this scan waits, then skips
        if is_complete(path, model.checksum, checksum, horizons, condition):
            return json.loads(path.read_text()), True
        result = forecast(model, image, age, sex, diagnosis, horizons, covariates=covariates)
        write_description(out)
        return write_forecast(result, model, folder, stem, checksum, identifiers), False


def _cohort_task(model_dir: str, row: dict, horizons, out: str) -> dict:
    """Worker: one participant's forecast (its covariates from its row, when the model
    declares any); returns its status instead of raising."""
    identifiers = {key: row[key] for key in ("participant_id", "session_id")}
    try:
        _, skipped = forecast_one(
            model_dir,
            row["image"],
            row["age"],
            row["sex"],
            row["diagnosis"],
            horizons,
            out,
            identifiers,
            {c.name: row[c.name] for c in as_ensemble(model_dir).lead.info.coding.covariates},
        )
    except PredictorError as error:
        return identifiers | {"failed": redact_folders(str(error), row["image"])}
    return identifiers | {"skipped": skipped}


def forecast_cohort(
    model_dir: str | os.PathLike[str] | Mapping[str, str | os.PathLike[str]],
    cohort: pd.DataFrame,
    out: str | os.PathLike[str],
    years,
    session: str | None = None,
    jobs: int = 1,
    progress=None,
) -> dict:
    """Forecast every participant's baseline (or ``session``) scan of a validated cohort.

    ``model_dir``: one model folder, or a participant_id -> model folder mapping (each
    participant forecast by its own model, such as the cross-validation fold that held it
    out). Failed scans are listed in ``out/failures.tsv`` and the others go on;
    ``out/forecasts.tsv`` collects every complete forecast's volume table.
    Returns counts: forecast, skipped, failed.
    """
    if isinstance(model_dir, Mapping):
        missing = sorted(set(cohort["participant_id"]) - set(model_dir))
        if missing:
            raise DataError(f"no model named for participant(s) {', '.join(missing[:5])}")
        models = {pid: str(folder) for pid, folder in model_dir.items()}
    else:
        models = dict.fromkeys(cohort["participant_id"], str(model_dir))
    for folder in sorted(set(models.values())):
        needed = as_ensemble(folder).lead.info.coding.covariate_names  # fail early on a bad one
        absent = [name for name in needed if name not in cohort.columns]
        if absent:
            raise DataError(f"the cohort has no column for covariate '{absent[0]}' the model needs")
    horizons = check_horizons(years)
    out = Path(out)
    if session is None:
        chosen = cohort.groupby("participant_id", sort=True).head(1)
    else:
        chosen = cohort[cohort["session_id"] == session]
        if chosen.empty:
            raise DataError(f"no scan of session '{session}' in the cohort")
    rows = chosen.to_dict("records")
    arguments = [
        (models[row["participant_id"]], row, horizons, str(out)) for row in rows
    ]
    results = run_all(_cohort_task, arguments, jobs, progress)
    failures = [r for r in results if "failed" in r]
    write_tsv(
        out / "failures.tsv",
        pd.DataFrame(failures, columns=["participant_id", "session_id", "failed"]).rename(
            columns={"failed": "reason"}
        ),
    )
    write_tsv(out / "forecasts.tsv", collect_forecasts(out, rows))
    return {
        "forecast": sum(r.get("skipped") is False for r in results),
        "skipped": sum(r.get("skipped") is True for r in results),
        "failed": len(failures),
    }


def collect_forecasts(out: Path, rows: list[dict]) -> pd.DataFrame:
    """One table of the volume tables of every complete forecast among ``rows``."""
    frames = []
    for row in rows:
        pid, session = row["participant_id"], row["session_id"]
        stem = f"{pid}_{session}"
        folder = out / pid / session / "anat"
        if (folder / f"{stem}_{PROVENANCE}").is_file():
            table = pd.read_csv(folder / f"{stem}_{VOLUMES}", sep="\t")
            frames.append(table.assign(**{key: row[key] for key in IDENTIFIERS}))
    if not frames:
        return pd.DataFrame(columns=[*IDENTIFIERS, "region", "years"])
    table = pd.concat(frames, ignore_index=True)
    return table[[*IDENTIFIERS, *[c for c in table.columns if c not in IDENTIFIERS]]]
