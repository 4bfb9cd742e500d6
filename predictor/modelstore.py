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
    loss_curves.png   the log as a picture (redrawn every 5 epochs and at the end)

An ensemble (``predictor train --members K``, or a fold of ``evaluate --members
K``) is a folder of model folders::

    ensemble.json     {"schema": 1, "members": ["member-1", ...]}
    member-<k>/       one model folder each (the layout above)
    calibration.json  the conformal calibration of its intervals (predictor calibrate)

A plain model folder is a one-member ensemble (:func:`load_ensemble`).

Every file is written atomically; ``.pt`` files are read with
``torch.load(weights_only=True)``, so a file carrying a pickled payload is
refused, never executed.
"""

from __future__ import annotations

import hashlib
import json
import os
import pickle
from dataclasses import MISSING, asdict, dataclass, field, fields, replace
from functools import cached_property
from importlib import metadata
from pathlib import Path

import numpy as np
import torch

from predictor.config import CohortSettings
from predictor.covariates import Encoder
from predictor.errors import ModelError, PredictorError
from predictor.files import atomic_write, sha256_file, write_json
from predictor.network import NetworkSettings, VelocityNet, condition_size
from predictor.regions import RegionSet

MODEL_JSON = "model.json"
WEIGHTS = "weights.pt"
CHECKPOINT = "checkpoint.pt"
PRIOR = "prior.json"
ENSEMBLE_JSON = "ensemble.json"
CALIBRATION = "calibration.json"
#: what every member of an ensemble must share (one preparation serves them all)
SHARED = ("grid", "template", "prepare_settings", "regions", "cohort", "split")
#: version of the model.json schema (ModelInfo); bumped when a field changes meaning
SCHEMA = 2
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


@dataclass(frozen=True)
class ModelInfo:
    """The typed record of ``model.json``: everything needed to forecast with a model.

    ``schema`` is the format's version; a file of another version is refused
    with a clear :class:`~predictor.errors.ModelError` (this is the only
    module that reads or writes ``model.json``).
    """

    schema: int
    config: dict  # TrainConfig.to_dict(): network, loss, training
    seed: int
    grid: dict  # {"affine": 4x4 RAS mm, "shape": [D, H, W]} of the working grid
    template: str  # "mni152" or a template folder
    prepare_settings: dict  # PrepareSettings as asdict() writes it
    regions: dict  # the region set (RegionSet.raw)
    cohort: dict  # the sex and diagnosis coding (CohortSettings.to_dict())
    condition: dict  # {"age_mean": years, "age_sd": years[, "covariates": Encoder dict]}
    split: dict  # set -> participant ids
    training_range: dict  # ages, longest interval, diagnoses and sexes seen, pairs, anatomy
    prior: str  # file name of the regional prior
    prior_warnings: list
    fingerprint: str  # workspace volumes + config + seed
    weights_sha256: str = ""
    versions: dict = field(default_factory=dict)
    epochs_run: int = 0
    best_epoch: int = 0
    stopped_early: bool = False
    complete: bool = False
    bootstrap: dict = field(default_factory=dict)  # ensemble member: participant -> draws

    @classmethod
    def from_json(cls, raw, source: str) -> ModelInfo:
        if not isinstance(raw, dict):
            raise ModelError(f"{source}: not a JSON object")
        if raw.get("schema") != SCHEMA:
            found = raw.get("schema", raw.get("format", "none"))
            raise ModelError(
                f"{source}: model schema {found} is not this version's {SCHEMA}; "
                "retrain with this version of predictor"
            )
        known = {item.name: item for item in fields(cls)}
        required = [name for name, item in known.items() if item.default is MISSING
                    and item.default_factory is MISSING]
        missing = [key for key in required if key not in raw]
        if missing:
            raise ModelError(f"{source}: missing key(s) {', '.join(missing)}")
        unknown = sorted(set(raw) - set(known))
        if unknown:
            raise ModelError(f"{source}: unknown key(s) {', '.join(unknown)}")
        return cls(**raw)

    def to_json(self) -> dict:
        raw = asdict(self)
        if not raw["bootstrap"]:  # a single model's file stays what it always was
            del raw["bootstrap"]
        return raw

    @cached_property
    def region_set(self) -> RegionSet:
        return RegionSet.from_dict(self.regions, MODEL_JSON)

    @cached_property
    def coding(self) -> CohortSettings:
        return CohortSettings.from_dict(self.cohort, MODEL_JSON)

    @property
    def labels(self) -> tuple[str, ...]:
        return self.coding.diagnosis_labels

    @property
    def grid_affine(self) -> np.ndarray:
        return np.asarray(self.grid["affine"], dtype=float)

    @property
    def grid_shape(self) -> tuple[int, int, int]:
        return tuple(int(n) for n in self.grid["shape"])

    @property
    def condition_size(self) -> int:
        """Width of the conditioning vector: age, sex indicators, diagnosis one-hot and
        the encoded covariates."""
        return condition_size(self.coding, self.covariates.width)

    @property
    def covariates(self) -> Encoder:
        """The covariates' training statistics (empty for a model without covariates)."""
        return Encoder.from_dict(self.condition.get("covariates"), "model.json")


@dataclass(frozen=True, eq=False)
class TrainedModel:
    """A loaded model folder: the network (eval mode), its description and its prior."""

    folder: Path
    network: VelocityNet
    info: ModelInfo
    prior: object  # predictor.regression.MixedEffectsForecaster

    @property
    def labels(self) -> tuple[str, ...]:
        return self.info.labels

    @property
    def checksum(self) -> str:
        return self.info.weights_sha256


def read_model_json(folder: str | os.PathLike[str]) -> ModelInfo:
    """``model.json`` of a model folder as a :class:`ModelInfo`."""
    path = Path(folder) / MODEL_JSON
    if not path.is_file():
        raise ModelError(f"{folder}: not a model folder ({MODEL_JSON} missing); run train")
    try:
        raw = json.loads(path.read_text())
    except (ValueError, UnicodeDecodeError) as error:
        raise ModelError(f"{path}: not valid JSON ({error})") from error
    info = ModelInfo.from_json(raw, str(path))
    try:
        info.region_set, info.coding  # noqa: B018 (validated here, once)
    except PredictorError as error:
        raise ModelError(f"{path}: {error}") from error
    return info


def build_network(info: ModelInfo) -> VelocityNet:
    """An untrained network with the architecture that ``info`` describes."""
    from predictor.config import settings_from_table

    settings = settings_from_table(NetworkSettings, info.config["network"], MODEL_JSON)
    return VelocityNet(settings, info.condition_size)


def load_model(folder: str | os.PathLike[str]) -> TrainedModel:
    """Read a model folder; every mismatch or damage is a ModelError naming the file."""
    from predictor.regression import load_mixed_model

    folder = Path(folder)
    info = read_model_json(folder)
    weights = folder / WEIGHTS
    if weights.is_file() and sha256_file(weights) != info.weights_sha256:
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


def write_model_json(folder: str | os.PathLike[str], info: ModelInfo) -> Path:
    """Write ``model.json`` with the checksum of the current ``weights.pt``."""
    folder = Path(folder)
    stamped = replace(
        info, weights_sha256=sha256_file(folder / WEIGHTS), versions=package_versions()
    )
    return write_json(folder / MODEL_JSON, stamped.to_json())


# --- ensembles ----------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Ensemble:
    """A loaded model folder as members (one for a plain model folder) and its calibration.

    ``calibration``: the content of ``calibration.json`` (see
    :func:`predictor.ensemble.calibrate`), or None where the folder has none.
    """

    folder: Path
    members: tuple[TrainedModel, ...]
    calibration: dict | None

    @property
    def lead(self) -> TrainedModel:
        """The first member: its description, prior and coding stand for the ensemble's."""
        return self.members[0]

    @property
    def checksum(self) -> str:
        """The weights' SHA-256 of one uncalibrated member; otherwise the SHA-256 of every
        member's checksum and the calibration (what a forecast's outputs depend on)."""
        if len(self.members) == 1 and self.calibration is None:
            return self.lead.checksum
        state = [[m.checksum for m in self.members], self.calibration]
        return hashlib.sha256(json.dumps(state, sort_keys=True).encode()).hexdigest()


def member_folder(folder: str | os.PathLike[str], member: int) -> Path:
    """Folder of member ``member`` (1-based) of an ensemble."""
    return Path(folder) / f"member-{member}"


def member_folders(folder: str | os.PathLike[str]) -> list[Path]:
    """The member model folders of ``folder`` (itself, for a plain model folder)."""
    folder = Path(folder)
    path = folder / ENSEMBLE_JSON
    if not path.is_file():
        return [folder]
    try:
        raw = json.loads(path.read_text())
        names = [str(name) for name in raw["members"]]
    except (ValueError, KeyError, TypeError, UnicodeDecodeError) as error:
        raise ModelError(f"{path}: not an ensemble description ({error})") from error
    if raw.get("schema") != 1 or not names or any("/" in n or n in ("", ".", "..") for n in names):
        raise ModelError(f"{path}: schema must be 1 and members a list of folder names")
    return [folder / name for name in names]


def write_ensemble_json(folder: str | os.PathLike[str], members: int) -> Path:
    """Describe ``folder`` as an ensemble of ``members`` member folders."""
    names = [member_folder(folder, k).name for k in range(1, members + 1)]
    return write_json(Path(folder) / ENSEMBLE_JSON, {"schema": 1, "members": names})


def read_calibration(folder: str | os.PathLike[str]) -> dict | None:
    """``calibration.json`` of a model folder, or None; a damaged file is a ModelError."""
    path = Path(folder) / CALIBRATION
    if not path.is_file():
        return None
    try:
        raw = json.loads(path.read_text())
    except ValueError as error:
        raise ModelError(f"{path}: not a calibration ({error})") from error
    if isinstance(raw, dict) and "bands_years" not in raw:
        raise ModelError(
            f"{path}: one quantile for every horizon (an older version); run predictor "
            "calibrate again"
        )
    try:
        raw["bands_years"] = [float(edge) for edge in raw["bands_years"]]
        raw["quantiles"] = {  # null: no finite quantile in that band
            str(r): [float("nan") if q is None else float(q) for q in qs]
            for r, qs in raw["quantiles"].items()
        }
        if any(len(qs) != len(raw["bands_years"]) + 1 for qs in raw["quantiles"].values()):
            raise ValueError("a quantile list does not match the bands")
        raw["level"] = float(raw["level"])
        raw["member_sha256"] = [str(c) for c in raw["member_sha256"]]
        for key in ("method", "participants"):
            raw[key]  # noqa: B018 (required)
    except (ValueError, KeyError, TypeError, AttributeError) as error:
        raise ModelError(f"{path}: not a calibration ({error})") from error
    return raw


def load_ensemble(folder: str | os.PathLike[str]) -> Ensemble:
    """Every member of a model folder, checked to share what one preparation needs."""
    members = tuple(load_model(path) for path in member_folders(folder))
    lead = members[0].info
    for member in members[1:]:
        differ = [key for key in SHARED if getattr(member.info, key) != getattr(lead, key)]
        if member.info.config["network"] != lead.config["network"]:
            differ.append("network")
        if member.info.config["training"]["image_input"] != lead.config["training"]["image_input"]:
            differ.append("image_input")
        if differ:
            raise ModelError(
                f"{member.folder}: differs from {members[0].folder} in {', '.join(differ)}; "
                "every member of an ensemble must share them"
            )
    calibration = read_calibration(folder)
    if calibration is not None and calibration["member_sha256"] != [m.checksum for m in members]:
        raise ModelError(
            f"{Path(folder) / CALIBRATION}: was made for other member weights; run predictor "
            "calibrate again"
        )
    return Ensemble(Path(folder), members, calibration)
