"""Shared contracts: configuration files, regions, cohort coding, the network's input."""

from __future__ import annotations

import json
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
from typer.testing import CliRunner

from predictor.cli import app
from predictor.compare import CompareSettings
from predictor.config import CONFIG_DIR, CohortSettings
from predictor.demo import DemoSettings
from predictor.errors import ConfigError
from predictor.forecast import ForecastSettings
from predictor.prepare import PrepareSettings
from predictor.regions import RegionSet
from predictor.regression import MixedEffectsForecaster, RidgeForecaster
from predictor.training import TrainConfig

REPOSITORY = Path(__file__).resolve().parent.parent

# (reader, file content, words the one-line error must hold: file section and key)
BAD_CONFIGS = {
    "train-unknown": (TrainConfig.from_toml, "[loss]\nprior_weigth = 0.1\n",
                      r"\[loss\] 'prior_weigth': unknown key \(did you mean 'prior_weight'\?\)"),
    "train-type": (TrainConfig.from_toml, "[training]\nepochs = 'ten'\n",
                   r"\[training\] 'epochs': must be int"),
    "train-value": (TrainConfig.from_toml, "[training]\nmonitor = 'loss'\n",
                    r"\[training\]: monitor must be one of"),
    "prepare-unknown": (PrepareSettings.from_toml, "[registration]\niteratons = 3\n",
                        r"\[registration\] 'iteratons': unknown key \(did you mean 'iterations'"),
    "prepare-type": (PrepareSettings.from_toml, "[checks]\nbrain_ml = 'big'\n",
                     r"\[checks\] 'brain_ml': must be"),
    "prepare-value": (PrepareSettings.from_toml, "grid_mm = 20.0\n", r"'grid_mm' must be within"),
    "forecast-unknown": (ForecastSettings.from_toml, "interpolaton = 'cubic'\n",
                         r"'interpolaton': unknown key \(did you mean 'interpolation'"),
    "forecast-value": (ForecastSettings.from_toml, "interpolation = 'sinc'\n",
                       r"'interpolation' must be one of"),
    "cohort-unknown": (CohortSettings.from_toml, "[sex]\ncode = ['F', 'M']\n",
                       r"\[sex\] 'code': unknown key \(did you mean 'codes'"),
    "cohort-value": (CohortSettings.from_toml, "[sex]\ncodes = ['F', 'F']\n",
                     r"\[sex\]: 'codes' must be unique"),
    "cohort-type": (CohortSettings.from_toml, "[age]\nmin_years = 'old'\n",
                    r"\[age\] 'min_years': must be float"),
    "regions-unknown": (RegionSet.from_toml, "[regions.wm]\nchnage = 'shrinks'\n",
                        r"\[regions.wm\] 'chnage': unknown key \(did you mean 'change'"),
    "regions-value": (RegionSet.from_toml, "[regions.wm]\nchange = 'melts'\n",
                      r"\[regions.wm\] 'change': must be one of"),
    "regions-type": (RegionSet.from_toml, "[regions.wm]\nprior = 'yes'\n",
                     r"\[regions.wm\] 'prior': must be true or false"),
    "regions-band": (RegionSet.from_toml,
                     "[regions.brain]\nboundary = { outside = 'CSF', inside = 'GM', "
                     "band_voxels = 0 }\n",
                     r"\[regions.brain\] 'boundary': band_voxels must be an integer >= 1"),
    "regions-boundary": (RegionSet.from_toml,
                         "[regions.brain]\nboundary = { outside = 'CSF', inside = 'GM', "
                         "trim = 0.6 }\n",
                         r"\[regions.brain\] 'boundary': trim must be a number in \[0, 0.5\)"),
    "compare-unknown": (lambda path: CompareSettings.from_toml(path), "primary = 'wm'\n",
                        r"'primary': unknown key \(did you mean 'primary_region'"),
    "compare-value": (lambda path: CompareSettings.from_toml(path), "level = 1.5\n",
                      r"'level' must be within"),
    "compare-bands": (lambda path: CompareSettings.from_toml(path),
                      "interval_bands_years = [2.0, 1.0]\n",
                      r"'interval_bands_years' must be positive and increasing"),
    "demo-unknown": (lambda path: DemoSettings.from_toml(True, path), "[quick]\nepoch = 2\n",
                     r"\[quick\] 'epoch': unknown key \(did you mean 'epochs'"),
    "demo-type": (lambda path: DemoSettings.from_toml(True, path), "[quick]\nseed = 1.5\n",
                  r"\[quick\] 'seed': must be int"),
}  # fmt: skip


@pytest.mark.parametrize("case", sorted(BAD_CONFIGS))
def test_bad_config_files_name_file_section_and_key(tmp_path, case):
    reader, text, words = BAD_CONFIGS[case]
    path = tmp_path / "mine.toml"
    path.write_text(text)
    with pytest.raises(ConfigError, match=words) as caught:
        reader(path)
    assert str(caught.value).startswith(str(path)) and "\n" not in str(caught.value)


def test_cli_reports_a_bad_config_in_one_line_with_exit_2(tmp_path):
    path = tmp_path / "prepare.toml"
    path.write_text("[registration]\niteratons = 3\n")
    (tmp_path / "cohort").mkdir()
    result = CliRunner().invoke(
        app, ["prepare", str(tmp_path / "cohort"), str(tmp_path / "w"), "--config", str(path)]
    )
    assert result.exit_code == 2
    assert "Traceback" not in result.output and len(result.output.strip().splitlines()) == 1


def test_evaluate_and_compare_read_their_settings_file(tmp_path):
    path = tmp_path / "compare.toml"
    path.write_text("interval_bands_years = [3.0, 2.0]\n")
    for command in (["evaluate", str(tmp_path / "w"), str(tmp_path / "cv")],
                    ["compare", str(tmp_path / "m"), str(tmp_path / "w"), str(tmp_path / "r")]):
        result = CliRunner().invoke(app, [*command, "--settings", str(path)])
        assert result.exit_code == 2, result.output
        assert "interval_bands_years" in result.output and str(path) in result.output
        assert len(result.output.strip().splitlines()) == 1
    assert not (tmp_path / "cv").exists() and not (tmp_path / "r").exists()


def test_prepare_settings_of_an_earlier_model_still_read():
    # model.json of earlier versions records [longitudinal] boundary_width_voxels (now each
    # region's boundary band, whose default of 2 voxels it was): it is dropped, not refused
    from dataclasses import asdict

    stored = asdict(PrepareSettings.from_toml())
    stored["longitudinal"]["boundary_width_voxels"] = 2
    assert PrepareSettings.from_dict(stored) == PrepareSettings.from_toml()


def test_shipped_configs_read_and_hold_each_default_once():
    """Every dataclass read from configs/ has no defaults of its own (common practice)."""
    from dataclasses import MISSING, fields

    from predictor.losses import LossSettings
    from predictor.network import NetworkSettings
    from predictor.prepare import RegistrationSettings
    from predictor.training import TrainingSettings

    for kind in (LossSettings, NetworkSettings, TrainingSettings, RegistrationSettings,
                 PrepareSettings, ForecastSettings, DemoSettings, CohortSettings,
                 CompareSettings):  # fmt: skip
        assert all(item.default is MISSING for item in fields(kind)), kind
    assert TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml").network.channels == (4, 8, 8)
    assert RegionSet.from_toml().prior == (
        "hippocampus_left", "hippocampus_right", "ventricles", "total_gm", "wm", "icv"
    )  # fmt: skip


def test_region_order_survives_a_key_sorted_json_copy():
    """Workspaces and models save regions as key-sorted JSON; the report order is kept."""
    regions = RegionSet.from_toml()
    copy = RegionSet.from_dict(json.loads(json.dumps(regions.raw, sort_keys=True)))
    assert copy.names == regions.names and copy.deep == regions.deep
    np.testing.assert_array_equal(copy.coefficients(), regions.coefficients())
    broken = json.loads(json.dumps(regions.raw)) | {"order": ["wm"]}
    with pytest.raises(ConfigError, match="'order' does not list exactly"):
        RegionSet.from_dict(broken, "model.json")


def test_other_sex_codes_give_the_same_fitted_models():
    """Sex coded 'female'/'male' through configs/cohort.toml fits what 'F'/'M' fits."""
    from predictor.phantoms.generate import true_volume_table
    from predictor.phantoms.scenario import Scenario

    truth, _ = true_volume_table(Scenario.from_toml(), 40, seed=5)
    standard = CohortSettings.from_toml()
    other = CohortSettings.from_dict(
        standard.to_dict() | {"sex": {"codes": ["female", "male"], "aliases": {"w": "female"}}}
    )
    recoded = truth.assign(sex=truth["sex"].map({"F": "female", "M": "male"}))
    regions = ["hippocampus_left", "ventricles"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        a = MixedEffectsForecaster(coding=standard).fit(truth, regions)
        b = MixedEffectsForecaster(coding=other).fit(recoded, regions)
    for region in regions:
        np.testing.assert_allclose(b.fits_[region].beta, a.fits_[region].beta, rtol=1e-9)
    # the sex effect is estimated (a column that a hard-coded 'M' would leave all zero)
    assert (recoded["sex"] == "male").any() and a.fits_["ventricles"].beta[2] != 0
    ridge_a = RidgeForecaster(coding=standard).fit(truth, regions)
    ridge_b = RidgeForecaster(coding=other).fit(recoded, regions)
    start = truth.groupby("participant_id").head(1).head(5)
    np.testing.assert_allclose(
        ridge_b.predict(start.assign(sex=start["sex"].map({"F": "female", "M": "male"})), [2.0])
        ["mean_ml"], ridge_a.predict(start, [2.0])["mean_ml"], rtol=1e-12,
    )  # fmt: skip


def test_training_and_forecast_build_bitwise_equal_inputs(tiny_workspace):
    """One prepared scan: the batch built from the workspace files and the forecast's input."""
    from helpers import constant_velocity_model

    from predictor.forecast import network_inputs
    from predictor.nifti import load_scan
    from predictor.pairs import ScanStore, make_batch
    from predictor.prepare import cached_template, prepare_scan, read_prepared
    from predictor.preprocess import single_threaded_itk
    from predictor.workspace import read_workspace

    workspace = read_workspace(tiny_workspace)
    row = workspace.volumes.iloc[0]
    image = workspace.layout.read_cohort().set_index("key").loc[row["key"], "image"]
    settings = PrepareSettings.from_dict(workspace.prepare_settings)
    single_threaded_itk()
    prepared = prepare_scan(
        load_scan(image), cached_template(workspace.template, workspace.regions), settings
    )
    config = TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml")
    model = constant_velocity_model(workspace.template, config=config, settings=settings)
    inputs, weights = network_inputs(model, prepared)
    pair = pd.DataFrame(
        [{"base_key": row["key"], "follow_key": row["key"], "years": 1.0}
         | {f"{r}_prior": 1.0 for r in workspace.regions.prior}
         | {f"{r}_prior_sd": 1.0 for r in workspace.regions.prior}]
    )  # fmt: skip
    batch = make_batch(
        pair, ScanStore(tiny_workspace), torch.zeros(1, 5), True, workspace.regions
    )
    assert inputs.dtype == batch.inputs.dtype == torch.float32
    assert torch.equal(inputs, batch.inputs)
    assert torch.equal(weights, batch.regions)
    # the workspace's cached preparation read back (what evaluate forecasts from) is the
    # fresh one: the same arrays and volumes, so the same forecast
    cached = read_prepared(workspace.layout.scan(row["key"]), load_scan(image), workspace.regions)
    for name in ("grid_t1", "grid_mask", "grid_tissue", "grid_regions", "native_labels",
                 "native_t1", "template_to_native"):  # fmt: skip
        np.testing.assert_array_equal(getattr(cached, name), getattr(prepared, name), name)
    maps, fresh = (p.native_tissue | p.native_deep for p in (cached, prepared))
    assert maps.keys() == fresh.keys()
    for name in fresh:
        np.testing.assert_array_equal(maps[name], fresh[name], name)
    assert cached.volumes == pytest.approx(prepared.volumes, rel=1e-12)
    assert torch.equal(network_inputs(model, cached)[0], inputs)


def test_a_population_field_sees_the_template_for_everyone(tiny_workspace):
    """image_input = "template": the same input for every pair, each pair's own regions."""
    from predictor.pairs import ScanStore, make_batch, template_entry
    from predictor.workspace import read_workspace

    workspace = read_workspace(tiny_workspace)
    image = template_entry(workspace.template, workspace.regions, workspace.prepare_settings)
    keys = workspace.volumes.groupby("participant_id")["key"].first().iloc[:2].tolist()
    names = workspace.regions.prior
    pairs = pd.DataFrame(
        [{"base_key": key, "follow_key": key, "years": 1.0}
         | {f"{r}_prior": 1.0 for r in names} | {f"{r}_prior_sd": 1.0 for r in names}
         for key in keys]
    )  # fmt: skip
    store = ScanStore(tiny_workspace)
    batch = make_batch(pairs, store, torch.zeros(2, 5), True, workspace.regions, image=image)
    assert torch.equal(batch.inputs[0], batch.inputs[1])
    assert not torch.equal(batch.regions[0], batch.regions[1])  # the participants' own regions
    own = make_batch(pairs, store, torch.zeros(2, 5), True, workspace.regions)
    assert not torch.equal(own.inputs[0], own.inputs[1])
    # the template on the working grid: T1 with white matter near 1, tissue priors sum to 1
    inside = image[1] > 0
    assert image[2:5].sum(0)[inside].mean() == pytest.approx(1.0, abs=0.05)


@pytest.mark.slow
def test_a_region_added_in_a_regions_file_reaches_volumes_prior_and_forecasts(
    tiny_workspace, tmp_path
):
    """No code change: 'hippocampi' (both hippocampal labels) from a user's regions file."""
    from helpers import constant_velocity_model

    from predictor.cohort import read_cohort
    from predictor.forecast import forecast
    from predictor.pairs import attach_prior, fit_prior, visit_pairs
    from predictor.phantoms.generate import TEMPLATE
    from predictor.prepare import prepare_cohort
    from predictor.workspace import read_workspace

    extra = tmp_path / "regions.toml"
    extra.write_text(
        '[regions.hippocampi]\ndescription = "both hippocampi"\ntissue = "GM"\n'
        'change = "shrinks"\nreference = false\nprior = true\n'
        '[masks.phantom.hippocampi]\nlabels = [4, 5]\ndilate_mm = 5.0\n'
    )
    regions = RegionSet.from_toml(extra)
    assert regions.names[-1] == "hippocampi" and "hippocampi" in regions.prior
    cohort = tiny_workspace.parent / "bids"  # the shared tiny cohort, 8 of its participants
    table = read_cohort(cohort)
    table = table[table["participant_id"].isin(sorted(set(table["participant_id"]))[:8])]
    # volumes only: the longitudinal stage's changes are not what this test follows
    settings = PrepareSettings.from_toml(grid_mm=4.0, longitudinal={"enabled": False})
    prepare_cohort(table, tmp_path / "work", cohort / TEMPLATE, settings, jobs=2, regions=regions)
    volumes = pd.read_csv(tmp_path / "work" / "volumes.tsv", sep="\t")
    assert "hippocampi" in volumes and "hippocampi_pct_tbv" in volumes
    # the two dilated label masks do not meet, so the union is the sum of the sides
    both = volumes["hippocampus_left"] + volumes["hippocampus_right"]
    np.testing.assert_allclose(volumes["hippocampi"], both, rtol=2e-5)  # TSV: 6 digits
    # the training prior (fitted as `train` fits it) and the pairs' prior targets
    workspace = read_workspace(tmp_path / "work")
    assert workspace.regions.names == regions.names
    people = sorted(set(volumes["participant_id"]))
    prior, _ = fit_prior(workspace.volumes, people, workspace.regions, workspace.cohort)
    assert "hippocampi" in prior.fits_
    pairs = attach_prior(visit_pairs(workspace.volumes, people, regions), prior, regions.prior)
    assert {"hippocampi_prior", "hippocampi_prior_sd"} <= set(pairs.columns)
    model = constant_velocity_model(str(cohort / TEMPLATE), (0.0, 0.0, 0.2),
                                    TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml"),
                                    settings, regions)  # fmt: skip
    first = table.iloc[0]
    result = forecast(model, first["image"], first["age"], first["sex"], first["diagnosis"], [2])
    assert "hippocampi" in set(result.volumes["region"])
    assert "hippocampi" in result.horizons[0].grid_ratio


@pytest.mark.slow
def test_a_non_editable_install_runs_outside_the_source_tree(tmp_path):
    """configs/ and synthetic_phantoms/ ship as package data (pip install, not -e)."""
    site = tmp_path / "site"
    subprocess.run(
        [sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--no-build-isolation",
         "--target", str(site), str(REPOSITORY)],
        check=True, capture_output=True,
    )  # fmt: skip
    assert (site / "predictor" / "configs" / "train.toml").is_file()
    assert (site / "predictor" / "scenarios" / "memory_clinic.toml").is_file()
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    code = (
        "import sys, predictor, predictor.config as c; "
        "assert 'site' in predictor.__file__, predictor.__file__; "
        "print(c.CONFIG_DIR); from predictor.cli import main; main(sys.argv[1:])"
    )
    run = subprocess.run(
        [sys.executable, "-c", code, "phantoms", "cohort", "--participants", "1"],
        cwd=elsewhere, env={"PYTHONPATH": str(site), "PATH": "/usr/bin:/bin"},
        capture_output=True, text=True, timeout=300,
    )  # fmt: skip
    assert run.returncode == 0, run.stderr
    assert str(site) in run.stdout
    assert (elsewhere / "cohort" / "participants.tsv").is_file()
