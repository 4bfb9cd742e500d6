"""Test and benchmark helpers that build small objects without training."""

from __future__ import annotations

import warnings
from dataclasses import asdict
from pathlib import Path

import torch

from predictor.config import CohortSettings
from predictor.modelstore import (
    PRIOR,
    SCHEMA,
    WEIGHTS,
    ModelInfo,
    TrainedModel,
    build_network,
    save_tensors,
    write_model_json,
)
from predictor.phantoms.generate import true_volume_table
from predictor.phantoms.scenario import Scenario
from predictor.prepare import PrepareSettings, cached_template, working_grid
from predictor.regions import RegionSet
from predictor.regression import MixedEffectsForecaster, save_mixed_model
from predictor.training import TrainConfig

#: prepare settings of the shared tiny workspaces (4 mm grid). Without demons: their
#: tests use only the boundary regions' change (the observed change), which needs none.
BOUNDARY_CHANGE_ONLY = PrepareSettings.from_toml(
    grid_mm=4.0, longitudinal={"demons": False, "jacobian_targets": True}
)


def constant_velocity_model(
    template: str = "mni152",
    velocity=(0.0, 0.0, 0.0),
    config: TrainConfig | None = None,
    settings: PrepareSettings | None = None,
    regions: RegionSet | None = None,
) -> TrainedModel:
    """An untrained model whose network predicts a constant velocity (coarse voxels / year).

    Its prior is a mixed-effects model of the phantom scenario's true volumes
    (no images needed); everything else is what ``train`` would record.
    """
    config = config or TrainConfig.from_toml()
    settings = settings or PrepareSettings.from_toml()
    regions, coding = regions or RegionSet.from_toml(), CohortSettings.from_toml()
    grid, shape = working_grid(cached_template(template, regions), settings)
    labels = list(coding.diagnosis_labels)
    info = ModelInfo(
        schema=SCHEMA,
        config=config.to_dict(),
        seed=0,
        grid={"affine": grid.tolist(), "shape": list(shape)},
        template=template,
        prepare_settings=asdict(settings),
        regions=regions.raw,
        cohort=coding.to_dict(),
        condition={"age_mean": 75.0, "age_sd": 8.0},
        split={"train": [], "validation": [], "test": []},
        training_range={
            "age_years": [60.0, 95.0],
            "max_horizon_years": 5.0,
            "diagnoses": labels,
            "sexes": list(coding.sex_codes),
            "pairs": 0,
        },
        prior=PRIOR,
        prior_warnings=[],
        fingerprint="synthetic",
        weights_sha256="0" * 64,
    )
    network = build_network(info)
    with torch.no_grad():
        network.head.bias.copy_(torch.tensor(velocity, dtype=torch.float32))
    network.eval()
    truth, _ = true_volume_table(Scenario.from_toml(), 40, seed=1)
    with warnings.catch_warnings():  # convergence of this stand-in prior does not matter
        warnings.simplefilter("ignore", RuntimeWarning)
        known = [name for name in regions.names if name in truth]  # the phantoms' regions
        prior = MixedEffectsForecaster(coding=coding).fit(truth, known)
    return TrainedModel(Path("synthetic-model"), network, info, prior)


def write_model_folder(model: TrainedModel, folder: Path) -> Path:
    """Save an in-memory model as a model folder (weights, model.json, prior), as train does."""
    folder.mkdir(parents=True, exist_ok=True)
    save_tensors(folder / WEIGHTS, model.network.state_dict())
    save_mixed_model(folder / PRIOR, model.prior)
    write_model_json(folder, model.info)
    return folder
