"""Test and benchmark helpers that build small objects without training."""

from __future__ import annotations

import warnings
from dataclasses import asdict
from pathlib import Path

import torch

from predictor.config import CohortSettings
from predictor.modelstore import TrainedModel, build_network
from predictor.pairs import PRIOR_REGIONS
from predictor.phantoms.generate import true_volume_table
from predictor.phantoms.scenario import Scenario
from predictor.prepare import PrepareSettings, cached_template, working_grid
from predictor.regression import MixedEffectsForecaster
from predictor.training import TrainConfig
from predictor.volumes import REGIONS


def constant_velocity_model(
    template: str = "mni152",
    velocity=(0.0, 0.0, 0.0),
    config: TrainConfig | None = None,
    settings: PrepareSettings | None = None,
) -> TrainedModel:
    """An untrained model whose network predicts a constant velocity (coarse voxels / year).

    Its prior is a mixed-effects model of the phantom scenario's true volumes
    (no images needed); everything else is what ``train`` would record.
    """
    config = config or TrainConfig.from_toml()
    settings = settings or PrepareSettings.from_toml()
    grid, shape = working_grid(cached_template(template), settings)
    labels = list(CohortSettings.from_toml().diagnosis_labels)
    info = {
        "config": config.to_dict(),
        "grid": {"affine": grid.tolist(), "shape": list(shape)},
        "template": template,
        "prepare_settings": asdict(settings),
        "regions": list(PRIOR_REGIONS),
        "condition": {"age_mean": 75.0, "age_sd": 8.0, "labels": labels, "sex_codes": ["F", "M"]},
        "split": {"train": [], "validation": [], "test": []},
        "training_range": {
            "age_years": [60.0, 95.0],
            "max_horizon_years": 5.0,
            "diagnoses": labels,
            "sexes": ["F", "M"],
        },
        "weights_sha256": "0" * 64,
    }
    network = build_network(info)
    with torch.no_grad():
        network.head.bias.copy_(torch.tensor(velocity, dtype=torch.float32))
    network.eval()
    truth, _ = true_volume_table(Scenario.from_toml(), 40, seed=1)
    with warnings.catch_warnings():  # convergence of this stand-in prior does not matter
        warnings.simplefilter("ignore", RuntimeWarning)
        prior = MixedEffectsForecaster().fit(truth, list(REGIONS))
    return TrainedModel(Path("synthetic-model"), network, info, prior)
