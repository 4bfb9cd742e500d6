"""The MODEL folder written by ``predictor train`` and read by forecast and compare.

Layout::

    model.json        everything needed to forecast: config, grid, template,
                      prepare settings, regions, conditioning statistics,
                      diagnosis labels, split, training ranges, package
                      versions, the SHA-256 of weights.pt
    weights.pt        state dict of the best epoch (tensors only)
    checkpoint.pt     last epoch: weights, optimiser, early-stopping state, history
    prior.json        the mixed-effects regional prior (training participants only)
    split.tsv         participant_id, set (train / validation / test)
    log.tsv           one row per epoch: loss terms and validation metrics
    loss_curves.png   the log as a picture

Every file is written atomically; ``.pt`` files are read with
``torch.load(weights_only=True)``, so a file carrying a pickled payload is
refused, never executed.
"""

from __future__ import annotations

import json
import os
import pickle
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path

import torch

from predictor.errors import ModelError
from predictor.files import atomic_write, sha256_file, write_json
from predictor.network import NetworkSettings, VelocityNet

MODEL_JSON = "model.json"
WEIGHTS = "weights.pt"
CHECKPOINT = "checkpoint.pt"
PRIOR = "prior.json"
FORMAT = 1
PACKAGES = ("predictor", "torch", "numpy", "scipy", "SimpleITK", "nibabel", "statsmodels")


def package_versions() -> dict[str, str]:
    """Installed versions of the packages a forecast depends on."""
    versions = {}
    for name in PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions


def save_tensors(path: str | os.PathLike[str], payload) -> Path:
    """``torch.save`` atomically (plain containers of tensors and numbers only)."""
    return atomic_write(path, lambda temporary: torch.save(payload, temporary))


def load_tensors(path: str | os.PathLike[str]):
    """``torch.load(weights_only=True)``; a missing, truncated or unsafe file is a ModelError."""
    path = Path(path)
    if not path.is_file():
        raise ModelError(f"{path}: file not found")
    try:
        return torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as error:
        first = str(error).strip().splitlines()[0][:160] if str(error).strip() else ""
        raise ModelError(
            f"{path}: refused: it holds more than tensors (weights_only load failed: {first})"
        ) from error
    except (RuntimeError, EOFError, OSError, ValueError) as error:
        raise ModelError(f"{path}: unreadable or truncated ({str(error)[:160]})") from error


@dataclass(frozen=True, eq=False)
class TrainedModel:
    """A loaded model folder: the network (eval mode), its description and its prior."""

    folder: Path
    network: VelocityNet
    info: dict
    prior: object  # predictor.regression.MixedEffectsForecaster

    @property
    def labels(self) -> list[str]:
        return list(self.info["condition"]["labels"])

    @property
    def checksum(self) -> str:
        return self.info["weights_sha256"]


def read_model_json(folder: str | os.PathLike[str]) -> dict:
    """``model.json`` of a model folder, checked for the keys forecasting needs."""
    path = Path(folder) / MODEL_JSON
    if not path.is_file():
        raise ModelError(f"{folder}: not a model folder ({MODEL_JSON} missing); run train")
    try:
        info = json.loads(path.read_text())
    except (ValueError, UnicodeDecodeError) as error:
        raise ModelError(f"{path}: not valid JSON ({error})") from error
    required = ("format", "config", "grid", "template", "condition", "split", "weights_sha256")
    missing = [key for key in required if key not in info] if isinstance(info, dict) else required
    if missing:
        raise ModelError(f"{path}: missing key(s) {', '.join(missing)}")
    if info["format"] != FORMAT:
        raise ModelError(f"{path}: model format {info['format']} is not {FORMAT}")
    from predictor.pairs import PRIOR_REGIONS

    if info.get("regions") != list(PRIOR_REGIONS):
        raise ModelError(
            f"{path}: made for the regions {info.get('regions')}, not this version's "
            f"{list(PRIOR_REGIONS)}"
        )
    return info


def build_network(info: dict) -> VelocityNet:
    """An untrained network with the architecture that ``info`` describes."""
    from predictor.config import settings_from_table

    settings = settings_from_table(NetworkSettings, info["config"]["network"], MODEL_JSON)
    return VelocityNet(settings, 2 + len(info["condition"]["labels"]))


def load_model(folder: str | os.PathLike[str]) -> TrainedModel:
    """Read a model folder; every mismatch or damage is a ModelError naming the file."""
    from predictor.regression import load_mixed_model

    folder = Path(folder)
    info = read_model_json(folder)
    weights = folder / WEIGHTS
    if weights.is_file() and sha256_file(weights) != info["weights_sha256"]:
        raise ModelError(
            f"{weights}: does not match {MODEL_JSON} (checksum differs: changed, "
            "truncated or from another training)"
        )
    state = load_tensors(weights)
    network = build_network(info)
    if not isinstance(state, dict):
        raise ModelError(f"{weights}: not a state dict")
    try:
        network.load_state_dict(state)
    except RuntimeError as error:
        raise ModelError(
            f"{weights}: does not fit the network in {MODEL_JSON} ({str(error)[:200]})"
        ) from error
    network.eval()
    return TrainedModel(folder, network, info, load_mixed_model(folder / PRIOR))


def write_model_json(folder: str | os.PathLike[str], info: dict) -> Path:
    """Write ``model.json`` with the checksum of the current ``weights.pt``."""
    folder = Path(folder)
    payload = info | {
        "format": FORMAT,
        "weights_sha256": sha256_file(folder / WEIGHTS),
        "versions": package_versions(),
    }
    return write_json(folder / MODEL_JSON, payload)
