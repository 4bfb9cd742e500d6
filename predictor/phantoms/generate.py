"""Write a phantom cohort: a BIDS dataset plus its ground truth and population template.

Layout under OUT::

    dataset_description.json, participants.tsv, participants.json
    sub-001/sub-001_sessions.tsv
    sub-001/ses-01/anat/sub-001_ses-01_T1w.nii.gz
    sub-002/ses-01/anat/sub-002_ses-01_run-{1,2}_T1w.nii.gz   a same-day rescan
    derivatives/phantom-truth/
        dataset_description.json, labels.tsv, draws.json
        true_volumes.tsv            every visit's true regional volumes (mL)
        best_forecast_volumes.tsv   the best forecast from baseline (mL), the error floor
        rates.tsv                   each participant's true mean annual rates over the first
                                    two years (% per year), acceleration and regional factors
        sub-001/ses-01/anat/sub-001_ses-01_dseg.nii.gz   label map on the scan's grid
    derivatives/phantom-template/   (geometric scenarios; a template scenario uses mni152)
        template_T1w.nii.gz, template_probseg-{GM,WM,CSF}.nii.gz,
        template_dseg.nii.gz, template_mask.nii.gz, labels.tsv
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd

from predictor import __version__
from predictor.errors import OutputError
from predictor.files import write_json, write_text, write_tsv
from predictor.nifti import save_array
from predictor.parallel import run_all
from predictor.phantoms.anatomy import (
    CSF_LABELS,
    GM_LABELS,
    LABELS,
    WM_LABELS,
    Progression,
    region_volumes,
)
from predictor.phantoms.imaging import Pose, acquire, render, scanner_grid, tissue_intensities
from predictor.phantoms.participants import (
    assign_groups,
    best_forecast_ml,
    draw_participant,
    mean_anatomy,
)
from predictor.phantoms.scenario import Scenario
from predictor.rng import seeded_rng

TRUTH = Path("derivatives") / "phantom-truth"
TEMPLATE = Path("derivatives") / "phantom-template"
CAUTION = "Synthetic phantom data for testing and demonstration; not images of any person."


def _session(number: int) -> str:
    return f"ses-{number:02d}"


def _visit_key(draw, number: int, years: float) -> dict:
    return {
        "participant_id": draw.participant_id,
        "session_id": _session(number),
        "years": years,
        "age": round(draw.baseline_age + years, 2),
        "sex": draw.sex,
        "diagnosis": draw.diagnosis,
    } | _carrier(draw) | _visit_covariates(draw, number)


def _carrier(draw) -> dict:
    """The participant's risk_carrier column ("no"/"yes"; none without covariates)."""
    return {} if draw.carrier is None else {"risk_carrier": "yes" if draw.carrier else "no"}


def _visit_truth(scenario: Scenario, draw, anatomy, number: int, years: float):
    """Keys, true volumes and best forecast (mL) of one visit, and its progression map."""
    progression = Progression.at(anatomy, draw.ratios(years))
    key = _visit_key(draw, number, years)
    truth = key | region_volumes(progression.volumes_ml())
    best = key | best_forecast_ml(scenario, draw, anatomy, years)
    return truth, best, progression


def true_volume_table(
    scenario: Scenario, participants: int, seed: int
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """True and best-forecast volume tables (mL) of a cohort, without rendering images.

    Equal to ``true_volumes.tsv`` and ``best_forecast_volumes.tsv`` of
    :func:`generate_cohort` with the same scenario, size-independent, and fast
    (geometric scenarios only: a template scenario's truth needs its warps).
    """
    if scenario.kind != "geometric":
        raise ValueError(f"{scenario.source}: true_volume_table needs a geometric scenario")
    groups = assign_groups(scenario.cohort["diagnosis_fractions"], participants, seed)
    truth, best = [], []
    for index in range(participants):
        draw, anatomy = draw_participant(scenario, index, groups[index], seed)
        for number, years in enumerate(draw.visit_years, start=1):
            true_row, best_row, _ = _visit_truth(scenario, draw, anatomy, number, years)
            truth.append(true_row)
            best.append(best_row)
    return pd.DataFrame(truth), pd.DataFrame(best)


def protocol_change(scenario: Scenario, index: int, seed: int, visits: int) -> int | None:
    """Number (1-based) of the participant's first visit on the new protocol, or None."""
    change = scenario.scanner_change
    if not change or visits < 2:
        return None
    rng = seeded_rng(seed, index, 2)
    if rng.random() >= change["fraction"]:
        return None
    return int(rng.integers(2, visits + 1))


def rescanned(scenario: Scenario, index: int, seed: int) -> bool:
    """Whether the participant has a same-day rescan of its baseline (``rescan_fraction``)."""
    fraction = float(scenario.cohort.get("rescan_fraction", 0.0))
    return fraction > 0 and seeded_rng(seed, index, 4).random() < fraction


def _make_participant(
    scenario_source: str, size_name: str, index: int, diagnosis: str, seed: int, out: str
) -> dict:
    """Render and write all visits of one participant; return its table rows.

    A rescanned participant's baseline session holds two scans of the same
    anatomy (``run-1``, ``run-2``): new head pose, gain, bias field and noise.
    """
    scenario = Scenario.from_toml(scenario_source)
    draw, anatomy = draw_participant(scenario, index, diagnosis, seed)
    switch = protocol_change(scenario, index, seed, len(draw.visit_years))
    subject = None
    if scenario.kind == "template":
        from predictor.phantoms.template_anatomy import Subject

        subject = Subject.build(scenario, draw, seeded_rng(seed, index, 3))
    root, pid = Path(out), draw.participant_id
    rescan = rescanned(scenario, index, seed)
    truth_rows, best_rows, session_rows, visits = [], [], [], []
    for number, years in enumerate(draw.visit_years, start=1):
        changed = switch is not None and number >= switch
        size = scenario.size(size_name)
        size = size.scaled(scenario.scanner_change["voxel_factor"]) if changed else size
        imaging = scenario.imaging_at(changed)
        affine, _ = scanner_grid(size)
        session = _session(number)
        runs = [seeded_rng(seed, index, 1, number)]
        if rescan and number == 1:
            runs.append(seeded_rng(seed, index, 5))
        acquired = []
        for run, rng in enumerate(runs, start=1):
            pose = Pose.draw(rng, imaging["rotation_degrees"], imaging["translation_mm"])
            if subject is None:
                true_row, best_row, progression = _visit_truth(
                    scenario, draw, anatomy, number, years
                )
                clean, labels, _ = render(
                    anatomy,
                    progression,
                    size,
                    pose,
                    int(imaging["supersample"]),
                    tissue_intensities(imaging),
                )
            else:
                clean, labels, truth, best = subject.visit(years, size, pose)
                key = _visit_key(draw, number, years)
                true_row, best_row = key | truth, key | best
            image, acquisition = acquire(clean, size, imaging, rng)
            stem = f"{pid}_{session}" + (f"_run-{run}" if len(runs) > 1 else "")
            anat = Path(pid) / session / "anat"
            save_array(image, affine, root / anat / f"{stem}_T1w.nii.gz", np.int16)
            save_array(labels, affine, root / TRUTH / anat / f"{stem}_dseg.nii.gz", np.uint8)
            acquired.append(
                {
                    "pose_rotation": pose.rotation.tolist(),
                    "pose_translation_mm": pose.translation.tolist(),
                }
                | acquisition
            )
        truth_rows.append(true_row)
        best_rows.append(best_row)
        session_rows.append(
            {
                "session_id": session,
                "age": true_row["age"],
                "diagnosis": diagnosis,
                "protocol": 2 if changed else 1,
            }
            | _visit_covariates(draw, number)
        )
        visits.append(
            {
                "session_id": session,
                "years": years,
                "protocol": 2 if changed else 1,
                "voxel_mm": size.voxel_mm,
            }
            | acquired[0]
            | ({"rescan": acquired[1]} if len(acquired) > 1 else {})
        )
    write_tsv(root / pid / f"{pid}_sessions.tsv", pd.DataFrame(session_rows))
    rates = {f"{region}_percent_per_year": 100 * rate for region, rate in draw.rates.items()}
    multipliers = {f"{region}_factor": value for region, value in draw.multipliers.items()}
    return {
        "participant": {"participant_id": pid, "sex": draw.sex, "diagnosis": diagnosis}
        | _carrier(draw),
        "rates": {
            "participant_id": pid,
            "diagnosis": diagnosis,
            "baseline_age": draw.baseline_age,
            "acceleration_per_year": draw.acceleration,
        }
        | rates
        | multipliers,
        "truth": truth_rows,
        "best": best_rows,
        "draw": draw.record() | {"visits": visits},
    }


def _visit_covariates(draw, number: int) -> dict:
    """The per-visit covariate columns of a sessions.tsv row (none without covariates)."""
    if draw.carrier is None:
        return {}
    score = draw.cognition[number - 1]
    return {"cognition": "n/a" if score is None else f"{score:g}"}


#: how a phantom cohort with covariates declares them (predictor prepare --covariates)
COVARIATES_TOML = """# Covariates of this phantom cohort, for
# predictor prepare BIDS WORK --covariates BIDS/code/covariates.toml
[covariates.risk_carrier]
kind = "categorical"
levels = ["no", "yes"]
missing = false

[covariates.cognition]
kind = "numeric"
unit = "points"
range = [0.0, 30.0]
missing = true
"""
#: where a phantom cohort keeps that declaration
COVARIATES_FILE = Path("code") / "covariates.toml"


def write_template(scenario: Scenario, size_name: str, out: Path) -> None:
    """The population-mean anatomy (age at the reference, stage 0): T1, tissue maps, labels."""
    size = scenario.size(size_name)
    anatomy = mean_anatomy(scenario)
    affine, _ = scanner_grid(size)
    image, labels, fractions = render(
        anatomy, None, size, Pose.identity(), 3, tissue_intensities(scenario.imaging)
    )
    folder = out / TEMPLATE
    save_array(image * scenario.imaging["scale"], affine, folder / "template_T1w.nii.gz")
    for name, values in (("GM", GM_LABELS), ("WM", WM_LABELS), ("CSF", CSF_LABELS)):
        probability = fractions[..., list(values)].sum(axis=-1)
        save_array(probability, affine, folder / f"template_probseg-{name}.nii.gz")
    save_array(labels, affine, folder / "template_dseg.nii.gz", np.uint8)
    brain = np.isin(labels, GM_LABELS + WM_LABELS + CSF_LABELS)
    save_array(brain.astype(np.uint8), affine, folder / "template_mask.nii.gz", np.uint8)
    write_tsv(folder / "labels.tsv", _label_table())


def _label_table() -> pd.DataFrame:
    return pd.DataFrame({"index": list(LABELS), "name": list(LABELS.values())})


def _check_output(out: Path, force: bool) -> None:
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is not a folder")
    if out.is_dir() and any(out.iterdir()) and not force:
        raise OutputError(f"{out}: folder is not empty; choose another or pass --force")


def generate_cohort(
    out: str | os.PathLike[str],
    participants: int | None = None,
    size: str = "tiny",
    seed: int = 0,
    scenario_path: str | os.PathLike[str] | None = None,
    jobs: int = 1,
    force: bool = False,
    progress: Callable[[], None] | None = None,
) -> Path:
    """Generate a phantom cohort under ``out`` (see the module docstring for the layout).

    ``progress()`` is called after each participant.
    The same arguments give the same bytes, whatever ``jobs`` is.
    """
    out = Path(out)
    _check_output(out, force)
    scenario = Scenario.from_toml(scenario_path)
    scenario.size(size)  # fail early on an unknown size
    count = participants if participants is not None else int(scenario.cohort["participants"])
    if count < 1:
        raise ValueError(f"participants must be at least 1, got {count}")
    groups = assign_groups(scenario.cohort["diagnosis_fractions"], count, seed)
    arguments = [(scenario.source, size, k, groups[k], seed, str(out)) for k in range(count)]
    results = run_all(_make_participant, arguments, jobs, progress)
    _write_tables(out, scenario, size, seed, results)
    if scenario.kind == "geometric":  # a "template" scenario's template is mni152 itself
        write_template(scenario, size, out)
    return out


def _write_tables(out: Path, scenario: Scenario, size: str, seed: int, results: list) -> None:
    generated_by = [
        {
            "Name": "predictor phantoms",
            "Version": __version__,
            "Description": f"scenario {scenario.name}, size {size}, seed {seed}",
        }
    ]
    write_json(
        out / "dataset_description.json",
        {
            "Name": f"{scenario.description} ({size})",
            "BIDSVersion": "1.9.0",
            "DatasetType": "raw",
            "GeneratedBy": generated_by,
            "License": "CC0",
            "HowToAcknowledge": CAUTION,
        },
    )
    write_tsv(out / "participants.tsv", pd.DataFrame([r["participant"] for r in results]))
    carrier = {
        "risk_carrier": {
            "Description": "carrier of a risk genotype that speeds every rate (invented)",
            "Levels": {"no": "non-carrier", "yes": "carrier"},
        }
    }
    write_json(
        out / "participants.json",
        {
            "sex": {"Description": "sex", "Levels": {"F": "female", "M": "male"}},
            "diagnosis": {"Description": "diagnosis group (constant over visits)"},
        }
        | (carrier if scenario.covariates else {}),
    )
    write_json(
        out / "sessions.json",
        {
            "age": {"Description": "age at the visit", "Units": "year"},
            "diagnosis": {"Description": "diagnosis group (constant over visits)"},
            "protocol": {
                "Description": "scanner protocol of the visit's scan",
                "Levels": {"1": "first protocol", "2": "protocol after a scanner change"},
            },
        }
        | (
            {"cognition": {"Description": "cognitive score (invented)", "Units": "points"}}
            if scenario.covariates
            else {}
        ),
    )
    if scenario.covariates:
        write_text(out / COVARIATES_FILE, COVARIATES_TOML)
    truth = out / TRUTH
    write_json(
        truth / "dataset_description.json",
        {
            "Name": "phantom ground truth",
            "BIDSVersion": "1.9.0",
            "DatasetType": "derivative",
            "GeneratedBy": generated_by,
            "HowToAcknowledge": CAUTION,
        },
    )
    write_tsv(
        truth / "true_volumes.tsv", pd.DataFrame([row for r in results for row in r["truth"]])
    )
    write_tsv(
        truth / "best_forecast_volumes.tsv",
        pd.DataFrame([row for r in results for row in r["best"]]),
    )
    write_tsv(truth / "rates.tsv", pd.DataFrame([r["rates"] for r in results]))
    write_tsv(truth / "labels.tsv", _label_table())
    write_json(
        truth / "draws.json",
        {
            "seed": seed,
            "size": size,
            "scenario": scenario.name,
            "participants": [r["draw"] for r in results],
        },
    )
