"""Forecasts in the scan's own space (predictor.forecast, forecast_io, figures)."""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import SimpleITK as sitk
from conftest import NIBABEL_ANATOMICAL
from helpers import constant_velocity_model
from PIL import Image
from typer.testing import CliRunner

from predictor.cli import app, expand_lists
from predictor.errors import DataError
from predictor.forecast import as_ensemble, forecast
from predictor.forecast_io import (
    PROVENANCE,
    VOLUMES,
    check_horizons,
    forecast_cohort,
    forecast_one,
    horizon_label,
    write_forecast,
)
from predictor.nifti import load_scan
from predictor.prepare import PrepareSettings, cached_template, prepare_scan
from predictor.preprocess import Registration
from predictor.regions import RegionSet
from predictor.volumes import region_volumes

REGION_SET = RegionSet.from_toml()
REGIONS = REGION_SET.names
SHRINKING = [r for r in REGIONS if r != "ventricles"]


@pytest.fixture(scope="module")
def baseline_row(tiny_workspace):
    """The first prepared scan of the tiny workspace (a cohort.tsv row)."""
    cohort = pd.read_csv(tiny_workspace / "cohort.tsv", sep="\t")
    return cohort.iloc[0]


@pytest.fixture(scope="module")
def tiny_forecast(tiny_model, baseline_row):
    row = baseline_row
    return forecast(tiny_model, row.image, row.age, row.sex, row.diagnosis, [0, 1, 2, 4])


def test_horizon_zero_is_the_baseline_and_volumes_are_monotone(tiny_forecast):
    zero = tiny_forecast.horizons[0]
    data = tiny_forecast.scan.data
    assert zero.years == 0
    assert np.abs(zero.image - data).max() < 1e-5 * data.max()  # interpolation tolerance
    assert np.abs(zero.log_jacobian).max() < 1e-5
    table = tiny_forecast.volumes
    for region, rows in table.groupby("region"):
        series = rows.sort_values("years")["network_ml"].to_numpy()
        steps = np.diff(series)
        if region == "icv":  # the skull does not move: constant rather than monotone
            assert np.abs(series / series[0] - 1).max() < 0.01
        else:
            assert np.all(steps >= 0) if region == "ventricles" else np.all(steps <= 0), region
        assert series[0] == pytest.approx(rows["baseline_ml"].iloc[0], rel=1e-5)


def test_log_jacobian_file_integrates_to_the_reported_change(tiny_forecast, tiny_model, tmp_path):
    model = as_ensemble(tiny_model).lead
    write_forecast(tiny_forecast, model, tmp_path, "scan", "")
    prepared, scan = tiny_forecast.prepared, tiny_forecast.scan
    table = tiny_forecast.volumes.set_index(["region", "years"])
    for horizon in (2.0, 4.0):
        path = tmp_path / f"scan_desc-{horizon_label(horizon)}_logjacobian.nii.gz"
        ratio = np.exp(load_scan(path).data) - 1.0  # read back in RAS order from the file
        change = region_volumes(
            prepared.native_tissue, prepared.native_deep, scan.voxel_volume_ml, REGION_SET, ratio
        )
        for region in REGIONS:
            reported = table.loc[(region, horizon), "network_change_ml"]
            assert change[region] == pytest.approx(reported, rel=0.02), (region, horizon)


def test_outputs_match_the_input_grid_and_carry_the_caution(
    tiny_forecast, tiny_model, baseline_row, tmp_path
):
    model = as_ensemble(tiny_model).lead
    provenance = write_forecast(tiny_forecast, model, tmp_path, "scan", "abc")
    source = nib.load(baseline_row.image)
    for name in provenance["outputs"]:
        if name.endswith(".nii.gz"):
            image = nib.load(tmp_path / name)
            assert image.shape[:3] == source.shape
            np.testing.assert_allclose(image.affine, source.affine)
        if name.endswith(".png"):
            assert "Research use only" in Image.open(tmp_path / name).text["Description"]
    saved = json.loads((tmp_path / f"scan_{PROVENANCE}").read_text())
    assert "Research use only" in saved["cautions"]
    assert saved["input"]["sha256"] == "abc" and saved["model"]["weights_sha256"] == model.checksum


@pytest.fixture(scope="module")
def anatomical_forecast():
    """nibabel's shipped anatomical.nii (LAS, 2 mm) under a constant-velocity MNI152 model.

    The file is a 66 x 82 x 50 mm crop that no whole-brain registration can
    place, so its template-to-scan affine is given (a translation onto the
    crop) and the brain-volume plausibility check is relaxed.
    """
    velocity = (0.4, -0.3, 0.25)  # coarse-grid voxels per year
    model = constant_velocity_model(velocity=velocity)
    scan = load_scan(NIBABEL_ANATOMICAL)
    centre = scan.affine @ np.r_[(np.array(scan.data.shape) - 1) / 2, 1.0]
    template_to_native = np.eye(4)
    template_to_native[:3, 3] = centre[:3] - np.array([0.0, -18.0, 18.0])
    settings = PrepareSettings.from_toml(checks={"brain_ml": [1.0, 5000.0]})
    registration = Registration(template_to_native, -1.0, 0, "given")
    template = cached_template("mni152", REGION_SET)
    prepared = prepare_scan(scan, template, settings, None, registration)
    return model, scan, prepared, np.array(velocity)


@pytest.mark.parametrize(
    ("interpolation", "reference", "margin", "tolerance"),
    # SimpleITK's B-spline mirrors the image at its border where scipy's prefilter repeats the
    # edge; the difference decays by a factor 0.27 a voxel, so compare further inside
    [("linear", sitk.sitkLinear, 3, 1e-5), ("cubic", sitk.sitkBSpline, 8, 1e-4)],
)
def test_anatomical_nii_outputs_keep_shape_affine_and_orientation(
    anatomical_forecast, tmp_path, interpolation, reference, margin, tolerance
):
    model, scan, prepared, velocity = anatomical_forecast
    result = forecast(model, scan, 70.0, "F", "CN", [2.0], prepared, interpolation)
    provenance = write_forecast(result, model, tmp_path, "anatomical", "")
    source = nib.load(NIBABEL_ANATOMICAL)
    assert nib.aff2axcodes(source.affine) == ("L", "A", "S")
    for name in provenance["outputs"]:
        if name.endswith(".nii.gz"):
            image = nib.load(tmp_path / name)
            assert image.shape[:3] == source.shape, name
            np.testing.assert_allclose(image.affine, source.affine)
            assert nib.aff2axcodes(image.affine) == ("L", "A", "S")
    # the pull-back displacement of a constant velocity is the constant -t * 2 v grid voxels
    # (coarse grid: half resolution), carried to RAS mm through grid and template affines
    grid = model.info.grid_affine
    expected_mm = result.prepared.template_to_native[:3, :3] @ grid[:3, :3] @ (-2.0 * 2 * velocity)
    field = nib.load(tmp_path / "anatomical_desc-forecast24mo_displacement.nii.gz")
    assert field.shape == (*source.shape, 1, 3)
    vectors = np.asarray(field.dataobj).reshape(-1, 3)
    np.testing.assert_allclose(vectors, np.tile(expected_mm, (len(vectors), 1)), atol=1e-3)
    # SimpleITK, reading the input file itself, resamples it through the same translation
    # (a TranslationTransform maps an output point p to p + offset, in LPS mm)
    moving = sitk.ReadImage(str(NIBABEL_ANATOMICAL), sitk.sitkFloat32)
    offset = (expected_mm * np.array([-1.0, -1.0, 1.0])).tolist()
    expected = sitk.Resample(moving, moving, sitk.TranslationTransform(3, offset), reference, 0.0)
    written = sitk.ReadImage(str(tmp_path / "anatomical_desc-forecast24mo_T1w.nii.gz"))
    difference = sitk.GetArrayFromImage(written) - sitk.GetArrayFromImage(expected)
    inner = (slice(margin, -margin),) * 3
    scale = float(sitk.GetArrayFromImage(moving).max())
    assert np.abs(difference[inner]).max() < tolerance * scale


@pytest.mark.slow
def test_held_out_forecasts_beat_no_change(tiny_model, tiny_workspace):
    # Ground truth of the phantom generator (derivatives/phantom-truth), held-out participants
    # (validation and test sets of the model's split), horizons of 2 years or more.
    model = as_ensemble(tiny_model).lead
    cohort = pd.read_csv(tiny_workspace / "cohort.tsv", sep="\t")
    truth_path = tiny_workspace.parent / "bids" / "derivatives" / "phantom-truth"
    truth = pd.read_csv(truth_path / "true_volumes.tsv", sep="\t")
    held_out = model.info.split["validation"] + model.info.split["test"]
    errors = []
    for participant in held_out:
        visits = cohort[cohort.participant_id == participant].sort_values("age")
        base = visits.iloc[0]
        later = visits[visits.age - base.age >= 2.0]
        if later.empty:
            continue
        horizons = (later.age - base.age).round(6).tolist()
        result = forecast(model, base.image, base.age, base.sex, base.diagnosis, horizons)
        table = result.volumes.set_index(["region", "years"])
        for (_, visit), years in zip(later.iterrows(), horizons, strict=True):
            true = truth[
                (truth.participant_id == participant) & (truth.session_id == visit.session_id)
            ]
            for region in ("ventricles", "total_gm"):
                row = table.loc[(region, years)]
                real = float(true[region].iloc[0])
                errors.append(
                    {
                        "region": region,
                        "network": abs(row.network_ml - real),
                        "no_change": abs(row.baseline_ml - real),
                    }
                )
    errors = pd.DataFrame(errors).groupby("region").mean()
    assert len(errors) == 2
    assert (errors.network < errors.no_change).all(), errors


def test_forced_failure_leaves_complete_or_absent_files(
    tiny_model, baseline_row, tmp_path, monkeypatch
):
    import predictor.figures

    row = baseline_row
    request = (row.image, row.age, row.sex, row.diagnosis, [1, 3], tmp_path)

    def broken(*args, **kwargs):
        raise RuntimeError("forced failure while drawing")

    monkeypatch.setattr(predictor.figures, "trajectories", broken)
    with pytest.raises(RuntimeError, match="forced failure"):
        forecast_one(tiny_model, *request)
    written = [p for p in tmp_path.rglob("*") if p.is_file()]
    assert written and not [p for p in written if ".tmp-" in p.name]
    assert not list(tmp_path.glob(f"*{PROVENANCE}"))  # not marked complete
    for path in written:
        if path.name.endswith(".nii.gz"):
            assert np.isfinite(np.asarray(nib.load(path).dataobj)).all()  # complete file
    monkeypatch.undo()
    assert forecast_one(tiny_model, *request)[1] is False
    assert forecast_one(tiny_model, *request)[1] is True  # complete: skipped


def test_cohort_forecast_in_parallel_with_a_failure(tiny_model, tiny_workspace, tmp_path):
    cohort = pd.read_csv(tiny_workspace / "cohort.tsv", sep="\t")
    chosen = cohort[cohort.participant_id.isin(["sub-001", "sub-002", "sub-003"])].copy()
    broken = tmp_path / "broken.nii.gz"
    broken.write_bytes(b"\x1f\x8b truncated")
    chosen.loc[chosen.participant_id == "sub-003", "image"] = str(broken)
    out = tmp_path / "out"
    summary = forecast_cohort(tiny_model, chosen, out, [1, 2], jobs=2)
    assert summary == {"forecast": 2, "skipped": 0, "failed": 1}
    failures = pd.read_csv(out / "failures.tsv", sep="\t")
    assert failures.participant_id.tolist() == ["sub-003"]
    assert "broken.nii.gz" in failures.reason[0] and str(tmp_path) not in failures.reason[0]
    table = pd.read_csv(out / "forecasts.tsv", sep="\t")
    assert set(table.participant_id) == {"sub-001", "sub-002"}
    assert len(table) == 2 * len(REGIONS) * 2
    again = forecast_cohort(tiny_model, chosen, out, [1, 2], jobs=2)
    assert again == {"forecast": 0, "skipped": 2, "failed": 1}
    assert (out / "sub-001" / "ses-01" / "anat" / f"sub-001_ses-01_{VOLUMES}").is_file()


def test_requests_are_checked_and_warned(tiny_model, baseline_row):
    row = baseline_row
    with pytest.raises(DataError, match="diagnosis 'FTD' is not one of CN, MCI, AD"):
        forecast(tiny_model, row.image, row.age, row.sex, "FTD", [1])
    with pytest.raises(DataError, match="horizons must be finite"):
        forecast(tiny_model, row.image, row.age, row.sex, row.diagnosis, [-1])
    with pytest.raises(DataError, match="at least one month"):
        check_horizons([1.0, 1.01])
    result = forecast(tiny_model, row.image, 20.0, row.sex, row.diagnosis, [30])
    text = " ".join(result.warnings)
    assert "age 20 years is outside the training range" in text
    assert "horizon 30 years is beyond the longest interval" in text


def test_forecast_command_single_scan(tiny_model, baseline_row, tmp_path):
    row = baseline_row
    runner = CliRunner()
    arguments = ["forecast", str(tiny_model), row.image, "--age", str(row.age), "--sex", row.sex]
    arguments += ["--diagnosis", row.diagnosis, "--years", "1", "2.5", "--out", str(tmp_path)]
    result = runner.invoke(app, expand_lists(arguments))
    assert result.exit_code == 0, result.output
    assert "Research use only" in result.output and "ventricles" in result.output
    assert len(list(tmp_path.glob("*_T1w.nii.gz"))) == 2
    missing = runner.invoke(app, ["forecast", str(tiny_model), row.image, "--age", "70"])
    assert missing.exit_code == 2 and "--sex" in missing.output
    assert expand_lists(["x", "--years", "1", "2", "5", "--out", "o"]) == [
        "x", "--years", "1", "--years", "2", "--years", "5", "--out", "o",
    ]  # fmt: skip


def test_prior_flag_holds_a_mean_against_the_prior_interval_for_a_mean():
    # A network forecast between the prior's 95% interval for the true volume and the
    # wider one for an observed follow-up is flagged; one inside the narrower is not. The
    # prior is fitted on phantom volumes with 3% measurement noise, so that the two differ.
    from dataclasses import replace

    from predictor.forecast import Z95, volume_table
    from predictor.phantoms.generate import true_volume_table
    from predictor.phantoms.scenario import Scenario
    from predictor.regression import MixedEffectsForecaster

    region = "hippocampus_left"
    truth, _ = true_volume_table(Scenario.from_toml(), 41, seed=1)
    noisy = truth.copy()
    noisy[region] *= 1 + 0.03 * np.random.default_rng(3).normal(size=len(truth))
    train, new = (
        noisy[noisy["participant_id"] != "sub-041"],
        truth[truth["participant_id"] == "sub-041"],
    )
    model = constant_velocity_model()
    model = replace(
        model, prior=MixedEffectsForecaster(coding=model.info.coding).fit(train, [region])
    )
    first = new.iloc[0]
    baseline = {name: float(first[name]) for name in model.info.region_set.names}
    request = pd.DataFrame([{"participant_id": "p", "age": first["age"], "sex": first["sex"],
                             "diagnosis": first["diagnosis"]} | baseline])  # fmt: skip
    observed = model.prior.predict(request, [3.0]).set_index("region")
    true = model.prior.predict(request, [3.0], noise_free=True).set_index("region")
    mean, wide = observed.loc[region, "mean_ml"], observed.loc[region, "sd_ml"]
    narrow = true.loc[region, "sd_ml"]
    assert wide > 1.1 * narrow  # the residual noise of one observation is not negligible
    for value, flagged in (
        (mean + Z95 * (wide + narrow) / 2, True),
        (mean + Z95 * narrow / 2, False),
    ):
        network = {3.0: [baseline | {region: value}]}  # one member's volumes
        request = {key: first[key] for key in ("age", "sex", "diagnosis")}
        table, notes = volume_table(as_ensemble(model), baseline, network, request)
        row = table[(table["region"] == region)].iloc[0]
        assert bool(row["outside_prior_95"]) is flagged
        assert any("interval for the true volume" in note for note in notes) is flagged
