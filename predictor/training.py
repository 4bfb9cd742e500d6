"""``predictor train``: the CPU trainer of the velocity-field network.

One epoch visits the training pairs in a seeded order, in batches of
``batch_pairs``; validation runs after every epoch; training stops early when
the validation loss has not improved for ``patience`` epochs. Early stopping
(and the choice of the best weights) follows ``monitor``: by default the
validation pairs' mean volume error against their measured follow-ups, the
quantity a user of the forecasts cares about. Every draw
(split, order, augmentation, initial weights) comes from the seed and the
epoch and batch numbers, so ``--resume`` from the last checkpoint reaches the
same weights, bit for bit, as an uninterrupted run.

Under ``torchrun`` (``WORLD_SIZE`` > 1) every process takes its share of each
batch, PyTorch's DistributedDataParallel (gloo backend) averages the
gradients, validation sums are all-reduced, and only rank 0 writes.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import asdict, dataclass, replace
from functools import cached_property
from pathlib import Path

import numpy as np
import pandas as pd
import torch
import torch.distributed as dist

from predictor.atypical import anatomy_reference
from predictor.config import load_settings, settings_from_table
from predictor.covariates import Encoder
from predictor.errors import DataError, OutputError
from predictor.fields import jacobian_determinant, region_volume_ratio, warp
from predictor.files import write_tsv
from predictor.losses import (
    LossSettings,
    log_jacobian_match,
    masked_mse,
    monotone_regions,
    monotone_voxels,
    prior_z2,
    similarity,
    smoothness,
)
from predictor.modelstore import (
    CHECKPOINT,
    PRIOR,
    SCHEMA,
    WEIGHTS,
    ModelInfo,
    build_network,
    load_tensors,
    save_tensors,
    write_model_json,
)
from predictor.network import NetworkSettings, VelocityNet, encode_condition
from predictor.pairs import (
    SETS,
    Batch,
    ScanStore,
    attach_prior,
    bootstrap_counts,
    fit_prior,
    make_batch,
    split_participants,
    template_entry,
    visit_pairs,
)
from predictor.parallel import cores
from predictor.regions import TOTAL_BRAIN, RegionSet
from predictor.regression import baseline_rows, save_mixed_model
from predictor.rng import seeded_rng
from predictor.workspace import WITHIN_SUBJECT, Workspace, read_workspace

TERMS = ("similarity", "smoothness", "monotone", "prior", "jacobian")
#: validation figures that early stopping can follow: the mean volume error of the forecast
#: against the measured follow-ups (% of brain volume), or the weighted validation loss
MONITORS = ("val_volume_error", "val_total")
#: what the network sees: the participant's baseline scan, or the template for everyone (a
#: population field: conditioning on age, sex and diagnosis only, applied to the participant's
#: own regions; the comparator that exposes a network without subject-specific skill)
IMAGE_INPUTS = ("scan", "template")


@dataclass(frozen=True)
class TrainingSettings:
    """Trainer settings (``[training]`` of ``configs/train.toml``)."""

    epochs: int
    batch_pairs: int
    learning_rate: float
    patience: int
    split: tuple[float, float, float]
    test_min_follow_up_years: float
    max_pairs_per_epoch: int
    gain_sd: float
    flip_probability: float
    seed: int
    threads: int
    monitor: str  # early stopping and best weights follow this
    image_input: str  # "scan": the participant's baseline; "template": a population field

    def __post_init__(self):
        if self.monitor not in MONITORS:
            raise ValueError(f"monitor must be one of {list(MONITORS)}; '{self.monitor}' was given")
        if self.image_input not in IMAGE_INPUTS:
            raise ValueError(
                f"image_input must be one of {list(IMAGE_INPUTS)}; '{self.image_input}' was given"
            )
        if self.epochs < 1 or self.batch_pairs < 1 or self.patience < 1:
            raise ValueError("epochs, batch_pairs and patience must be >= 1")
        if len(self.split) != 3 or abs(sum(self.split) - 1) > 1e-6 or min(self.split) < 0:
            raise ValueError(f"split must be three fractions summing to 1, got {self.split}")
        if self.learning_rate <= 0:
            raise ValueError(f"learning_rate must be > 0, got {self.learning_rate}")


@dataclass(frozen=True)
class TrainConfig:
    """Network, loss and trainer settings of one training run."""

    network: NetworkSettings
    loss: LossSettings
    training: TrainingSettings

    @classmethod
    def from_toml(cls, path: str | os.PathLike[str] | None = None) -> TrainConfig:
        """``configs/train.toml`` with the file at ``path`` (e.g. ``configs/train-tiny.toml``)
        laid over it."""
        return load_settings(cls, "train.toml", path)

    @classmethod
    def from_dict(cls, raw: dict, source: str = "config") -> TrainConfig:
        """A complete configuration as :meth:`to_dict` writes it (e.g. from model.json)."""
        loss = {"jacobian_weight": 0.0} | raw.get("loss", {})
        return settings_from_table(cls, raw | {"loss": loss}, source)

    def to_dict(self) -> dict:
        """Every setting, except a ``jacobian_weight`` of 0 (the term off): records made
        before that term existed (model.json, checkpoints' and folds' fingerprints) then
        still match the same training."""
        raw = {name: asdict(getattr(self, name)) for name in ("network", "loss", "training")}
        if raw["loss"]["jacobian_weight"] == 0.0:
            del raw["loss"]["jacobian_weight"]
        return raw


# --- one batch ------------------------------------------------------------------------------
def batch_terms(network: VelocityNet, batch: Batch, loss: LossSettings, direction: torch.Tensor):
    """Loss terms of a batch, and the forecast region ratios (B, R) and warped baseline.

    ``direction`` (R,) is each prior region's expected sign of change
    (:meth:`~predictor.regions.RegionSet.directions`); regions that grow (the
    ventricles) may not shrink voxel by voxel, brain tissue may not grow.
    """
    module = network.module if hasattr(network, "module") else network
    velocity = network(batch.inputs, batch.condition)
    shape = tuple(batch.baseline.shape[2:])
    backward = module.displacement(velocity, -batch.years, shape)
    if loss.earlier_horizon_fraction == 0.5:  # the default: one integration gives both
        forward, earlier = module.displacement_and_half(velocity, batch.years, shape)
    else:
        forward = module.displacement(velocity, batch.years, shape)
        earlier = module.displacement(velocity, batch.years * loss.earlier_horizon_fraction, shape)
    warped = warp(batch.baseline, backward)
    determinant = jacobian_determinant(forward)
    ratio = region_volume_ratio(batch.regions, determinant)
    ratio_earlier = region_volume_ratio(batch.regions, jacobian_determinant(earlier))
    log_jacobian = torch.log(determinant.clamp(min=1e-3))
    growing = batch.regions[:, direction > 0].sum(dim=1)
    terms = {
        "similarity": similarity(warped, batch.followup, batch.mask, loss),
        "smoothness": smoothness(velocity),
        "monotone": monotone_voxels(log_jacobian, batch.tissue, growing)
        + monotone_regions(ratio_earlier, ratio, direction),
        "prior": prior_z2(ratio, batch.prior, batch.prior_sd),
        "jacobian": log_jacobian_match(
            log_jacobian, batch.log_jacobian, batch.mask[:, 0], batch.measured
        ),
    }
    return terms, ratio, warped


def weighted_total(terms: dict, weights: dict) -> torch.Tensor:
    return sum(weights[name] * terms[name] for name in TERMS)


# --- the run --------------------------------------------------------------------------------
@dataclass
class Run:
    """What a training run works on (built once; identical in every process)."""

    config: TrainConfig
    seed: int
    workspace: Workspace
    split: dict
    pairs: dict  # set -> DataFrame of pairs with prior columns
    conditions: dict  # set -> (P, K) tensor
    info: ModelInfo  # model.json content before the weights' checksum

    @property
    def regions(self) -> RegionSet:
        return self.workspace.regions

    @property
    def direction(self) -> torch.Tensor:
        return torch.from_numpy(self.regions.directions(self.regions.prior))

    def batch(self, name: str, rows: np.ndarray, rngs=None) -> Batch:
        """The batch of pairs ``rows`` of the set ``name`` (augmented when ``rngs`` given)."""
        training = self.config.training
        return make_batch(
            self.pairs[name].iloc[rows],
            self.store,
            self.conditions[name][rows],
            self.config.network.tissue_channels,
            self.regions,
            rngs,
            training.gain_sd if rngs else 0.0,
            training.flip_probability if rngs else 0.0,
            self.image,
            log_jacobians=self.config.loss.jacobian_weight > 0,
        )

    @cached_property
    def image(self) -> torch.Tensor | None:
        """The template's grid entry for a population-field run, else None (the scan)."""
        if self.config.training.image_input != "template":
            return None
        workspace = self.workspace
        return template_entry(workspace.template, workspace.regions, workspace.prepare_settings)

    @cached_property
    def store(self) -> ScanStore:
        volumes = self.workspace.volumes
        if WITHIN_SUBJECT not in volumes:  # prepared without the within-subject stage
            return ScanStore(self.workspace.root)
        return ScanStore(self.workspace.root, dict(zip(volumes["key"], volumes[WITHIN_SUBJECT],
                                                       strict=True)))  # fmt: skip


def default_split(volumes, config: TrainConfig, seed: int) -> dict[str, list[str]]:
    """The config's seeded train / validation / test split of the workspace's participants."""
    settings = config.training
    return split_participants(volumes, settings.split, settings.test_min_follow_up_years, seed)


def prepare_run(
    work, config: TrainConfig, seed: int, split: dict[str, list[str]] | None = None,
    member: int | None = None,
) -> tuple[Run, object]:
    """Split, pairs, prior and conditioning statistics of a workspace; returns the prior too.

    ``split`` (train / validation / test participant lists) replaces the config's seeded
    80/10/10 split, as cross-validation folds do. ``member`` (an ensemble member's number)
    trains on that member's stratified bootstrap of the training participants
    (:func:`~predictor.pairs.bootstrap_counts`): a participant drawn k times gives each of
    its pairs k times per epoch; the prior is still fitted on every training participant.
    """
    workspace = read_workspace(work)
    volumes, regions, coding = workspace.volumes, workspace.regions, workspace.cohort
    if split is None:
        split = default_split(volumes, config, seed)
    else:
        split = {name: sorted(split.get(name, [])) for name in SETS}
    prior, prior_warnings = fit_prior(volumes, split["train"], regions, coding)
    names = coding.covariate_names
    pairs = {
        name: attach_prior(
            visit_pairs(volumes, split[name], regions, names), prior, regions.prior
        )
        for name in SETS
    }
    if pairs["train"].empty:
        raise DataError("the training participants have no follow-up visits: nothing to learn")
    spaces = volumes[WITHIN_SUBJECT] if WITHIN_SUBJECT in volumes else pd.Series(dtype=str)
    made = workspace.prepare_settings.get("longitudinal", {}).get("jacobian_targets", False)
    if config.loss.jacobian_weight > 0 and not (made and spaces.notna().any()):
        raise DataError(f"{work}: jacobian_weight > 0 needs measured log-Jacobian maps; prepare "
                        "it with [longitudinal] jacobian_targets = true")  # fmt: skip
    counts = {}
    if member is not None:
        diagnosis = volumes.groupby("participant_id")["diagnosis"].first()
        counts = bootstrap_counts(split["train"], diagnosis, seed, member)
        repeat = pairs["train"]["participant_id"].map(counts).to_numpy()
        pairs["train"] = pairs["train"].loc[pairs["train"].index.repeat(repeat)]
        pairs["train"] = pairs["train"].reset_index(drop=True)
        if pairs["train"].empty:
            raise DataError(f"member {member}'s bootstrap drew no participant with a follow-up")
    ages = pairs["train"]["age"].to_numpy()
    age_mean, age_sd = float(ages.mean()), float(max(ages.std(), 1.0))
    train_rows = volumes[volumes["participant_id"].isin(split["train"])]
    # covariates standardised over the training participants' first visits
    encoder = Encoder.fit(coding.covariates, baseline_rows(train_rows))
    conditions = {
        name: encode_condition(
            frame["age"].to_numpy(), frame["sex"], frame["diagnosis"], coding, age_mean, age_sd,
            encoder.encode(frame),
        )  # fmt: skip
        for name, frame in pairs.items()
        if not frame.empty
    }
    digest = hashlib.sha256(workspace.layout.volumes.read_bytes())
    digest.update(json.dumps(config.to_dict(), sort_keys=True).encode())
    digest.update(str(seed).encode())
    digest.update(json.dumps(split, sort_keys=True).encode())
    if counts:
        digest.update(json.dumps(counts, sort_keys=True).encode())
    info = ModelInfo(
        schema=SCHEMA,
        config=config.to_dict(),
        seed=seed,
        grid={"affine": workspace.grid_affine.tolist(), "shape": list(workspace.grid_shape)},
        template=workspace.template,
        prepare_settings=workspace.prepare_settings,
        regions=regions.raw,
        cohort=coding.to_dict(),
        condition={"age_mean": age_mean, "age_sd": age_sd}
        | ({"covariates": encoder.to_dict()} if encoder.covariates else {}),
        split=split,
        training_range={
            "age_years": [float(train_rows["age"].min()), float(train_rows["age"].max())],
            "max_horizon_years": float(pairs["train"]["years"].max()),
            "diagnoses": sorted(set(train_rows["diagnosis"])),
            "sexes": sorted(set(train_rows["sex"])),
            "pairs": len(pairs["train"]),
            "anatomy": anatomy_reference(train_rows, regions),
        },
        prior=PRIOR,
        prior_warnings=prior_warnings,
        fingerprint=digest.hexdigest()[:20],
        bootstrap=counts,
    )
    return Run(config, seed, workspace, split, pairs, conditions, info), prior


def _distributed() -> tuple[int, int]:
    """(rank, world size); initialises the gloo process group under torchrun."""
    world = int(os.environ.get("WORLD_SIZE", "1"))
    if world > 1 and not dist.is_initialized():
        dist.init_process_group("gloo")
    return (dist.get_rank(), world) if world > 1 else (0, 1)


def _batches(count: int, size: int, order: np.ndarray) -> list[np.ndarray]:
    return [order[start : start + size] for start in range(0, count, size)]


def evaluate(network, run: Run, rank: int = 0, world: int = 1) -> dict:
    """Validation loss terms (full weights) and forecast errors against the no-change forecast.

    Errors: image MSE inside the brain (normalised intensity^2), and each
    prior region's absolute volume error as % of the baseline total brain volume.
    """
    pairs, names = run.pairs["validation"], run.regions.prior
    weights = run.config.loss.weights(10**6)
    sums = {f"val_{name}": 0.0 for name in (*TERMS, "total", "image_mse", "image_mse_no_change")}
    for region in names:
        sums[f"val_error_{region}"] = sums[f"val_error_{region}_no_change"] = 0.0
    mine = np.arange(len(pairs))[rank::world]
    with torch.no_grad():
        for chunk in _batches(len(mine), run.config.training.batch_pairs, mine):
            batch = run.batch("validation", chunk)
            terms, ratio, warped = batch_terms(network, batch, run.config.loss, run.direction)
            size = len(chunk)
            for name in TERMS:
                sums[f"val_{name}"] += float(terms[name]) * size
            sums["val_total"] += float(weighted_total(terms, weights)) * size
            for k in range(size):
                one = (slice(k, k + 1),)
                sums["val_image_mse"] += float(
                    masked_mse(warped[one], batch.followup[one], batch.mask[one])
                )
                sums["val_image_mse_no_change"] += float(
                    masked_mse(batch.baseline[one], batch.followup[one], batch.mask[one])
                )
            frame = pairs.iloc[chunk]
            brain = frame[TOTAL_BRAIN].to_numpy()
            for j, region in enumerate(names):
                base = frame[region].to_numpy()
                truth = frame[f"{region}_follow"].to_numpy()
                forecast = base * ratio[:, j].numpy()
                sums[f"val_error_{region}"] += float((100 * np.abs(forecast - truth) / brain).sum())
                sums[f"val_error_{region}_no_change"] += float(
                    (100 * np.abs(base - truth) / brain).sum()
                )
    sums, count = _summed(sums, len(mine), world)
    means = {name: value / max(count, 1) for name, value in sums.items()}
    means["val_volume_error"] = float(np.mean([means[f"val_error_{r}"] for r in names]))
    means["val_volume_error_no_change"] = float(
        np.mean([means[f"val_error_{r}_no_change"] for r in names])
    )
    return means


def _summed(sums: dict, count: int, world: int) -> tuple[dict, int]:
    """The sums and count added over every process (all-reduce under torchrun)."""
    if world == 1:
        return sums, count
    packed = torch.tensor([*sums.values(), count], dtype=torch.float64)
    dist.all_reduce(packed)
    return dict(zip(sums, packed[:-1].tolist(), strict=True)), int(packed[-1])


@dataclass
class EarlyStopping:
    """Follows the monitored validation figure: the best epoch and the epochs without progress."""

    patience: int
    epoch: int = 0
    best_monitored: float = float("inf")
    best_epoch: int = 0
    bad_epochs: int = 0

    @property
    def stopped(self) -> bool:
        return self.bad_epochs >= self.patience

    def update(self, monitored: float) -> bool:
        """Record one finished epoch; True when it is the best so far."""
        self.epoch += 1
        improved = monitored < self.best_monitored
        if improved:
            self.best_monitored, self.best_epoch, self.bad_epochs = monitored, self.epoch, 0
        else:
            self.bad_epochs += 1
        return improved

    def state(self) -> dict:
        return {
            "epoch": self.epoch,
            "best_monitored": self.best_monitored,
            "best_epoch": self.best_epoch,
            "bad_epochs": self.bad_epochs,
        }


def train(
    work: str | os.PathLike[str],
    model_dir: str | os.PathLike[str],
    config: TrainConfig | None = None,
    epochs: int | None = None,
    resume: bool = False,
    seed: int | None = None,
    force: bool = False,
    on_step: Callable[[int, int, int, dict], None] | None = None,
    on_epoch: Callable[[dict], None] | None = None,
    split: dict[str, list[str]] | None = None,
    member: int | None = None,
) -> dict:
    """Train a model on a prepared workspace into ``model_dir``; returns the last log row.

    ``epochs`` and ``seed`` override the config's; ``split`` the config's participant
    split and ``member`` an ensemble member's bootstrap (see :func:`prepare_run`).
    ``on_step(epoch, step, steps, terms)`` and
    ``on_epoch(row)`` report progress (rank 0 only).
    """
    config = config or TrainConfig.from_toml()
    settings = config.training
    epochs = int(epochs if epochs is not None else settings.epochs)
    seed = int(seed if seed is not None else settings.seed)
    model_dir = Path(model_dir)
    rank, world = _distributed()
    if (model_dir / CHECKPOINT).exists() and not (resume or force):
        raise OutputError(
            f"{model_dir}: holds a trained model; pass --resume to continue or --force to restart"
        )
    threads = settings.threads or (max(1, cores() // world) if world > 1 else 0)
    if threads:
        torch.set_num_threads(threads)
    run, prior = prepare_run(work, config, seed, split, member)
    network = _initial_network(run.info, seed)
    optimiser = torch.optim.Adam(network.parameters(), lr=settings.learning_rate)
    stopping, history = EarlyStopping(settings.patience), []
    if resume and (model_dir / CHECKPOINT).exists():
        stopping, history = _resume(model_dir / CHECKPOINT, run, network, optimiser)
    elif rank == 0:
        _start_folder(model_dir, run, prior)
    trainer = network
    if world > 1:
        from torch.nn.parallel import DistributedDataParallel

        trainer = DistributedDataParallel(network)
    while stopping.epoch < epochs and not stopping.stopped:
        started = time.perf_counter()
        row = {"epoch": stopping.epoch + 1}
        row |= _train_epoch(trainer, optimiser, run, stopping.epoch, rank, world, on_step)
        trainer.eval()
        if not run.pairs["validation"].empty:
            row |= evaluate(network, run, rank, world)
        improved = stopping.update(row.get(settings.monitor, row["train_total"]))
        row["seconds"] = time.perf_counter() - started
        history.append(row)
        if rank == 0:
            complete = stopping.stopped or stopping.epoch >= epochs
            _write_epoch(model_dir, network, optimiser, stopping, history, run, improved, complete)
            if on_epoch:
                on_epoch(row)
        if world > 1:
            dist.barrier()
    return history[-1] if history else {}


def _train_epoch(trainer, optimiser, run: Run, epoch: int, rank: int, world: int, on_step):
    """One epoch over the training pairs in a seeded order; returns the mean loss terms.

    The next batch is read and augmented in a background thread while the current
    step runs (its draws depend only on its place in the epoch, so the result is the
    same as reading it afterwards).
    """
    settings, seed = run.config.training, run.seed
    weights = run.config.loss.weights(epoch)
    order = seeded_rng(seed, 11, epoch).permutation(len(run.pairs["train"]))
    if settings.max_pairs_per_epoch:
        order = order[: settings.max_pairs_per_epoch]
    batches = _batches(len(order), settings.batch_pairs, order)
    batches = [b for b in batches if len(b) >= world]
    sums = dict.fromkeys((*TERMS, "total"), 0.0)

    def read(step: int) -> Batch:
        mine = batches[step][rank::world]
        # augmentation drawn per pair from its place in the epoch: the same draws
        # whatever the number of processes
        start = step * settings.batch_pairs + rank
        places = range(start, start + len(mine) * world, world)
        return run.batch("train", mine, [seeded_rng(seed, 13, epoch, p) for p in places])

    trainer.train()
    with ThreadPoolExecutor(max_workers=1) as reader:
        upcoming = reader.submit(read, 0) if batches else None
        for step in range(len(batches)):
            batch = upcoming.result()
            if step + 1 < len(batches):
                upcoming = reader.submit(read, step + 1)
            terms, _, _ = batch_terms(trainer, batch, run.config.loss, run.direction)
            total = weighted_total(terms, weights)
            optimiser.zero_grad()
            total.backward()
            optimiser.step()
            for name in TERMS:
                sums[name] += terms[name].item()
            sums["total"] += total.item()
            if on_step and rank == 0:
                done = {n: v / (step + 1) for n, v in sums.items()}
                on_step(epoch, step + 1, len(batches), done)
    return {f"train_{name}": value / max(len(batches), 1) for name, value in sums.items()}


def _resume(path: Path, run: Run, network, optimiser) -> tuple[EarlyStopping, list[dict]]:
    """Weights, optimiser, early-stopping state and history from the last checkpoint."""
    saved = load_tensors(path)
    if saved.get("fingerprint") != run.info.fingerprint:
        raise OutputError(
            f"{path}: was trained on another workspace, config, seed or split; "
            "use --force to restart"
        )
    network.load_state_dict(saved["model"])
    optimiser.load_state_dict(saved["optimizer"])
    stopping = EarlyStopping(run.config.training.patience)
    for key in stopping.state():
        setattr(stopping, key, saved[key])
    return stopping, [dict(row) for row in saved["history"]]


def _start_folder(model_dir: Path, run: Run, prior) -> None:
    """A new model folder: the prior and the split (rank 0)."""
    model_dir.mkdir(parents=True, exist_ok=True)
    save_mixed_model(model_dir / PRIOR, prior)
    write_tsv(
        model_dir / "split.tsv",
        pd.DataFrame(
            [(p, name) for name in SETS for p in run.split[name]],
            columns=["participant_id", "set"],
        ),
    )


def _initial_network(info: ModelInfo, seed: int) -> VelocityNet:
    """The network with weights drawn from ``seed`` (the global torch state is left alone)."""
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        return build_network(info)


#: the loss curves are redrawn every this many epochs, and when training ends
CURVES_EVERY = 5


def _write_epoch(model_dir, network, optimiser, stopping, history, run, improved, complete):
    """Best weights, model.json, log (and loss curves), then the checkpoint (rank 0).

    The checkpoint is written last: it marks the epoch as done, so a run killed before it
    redoes the epoch (the same result) and one killed after it has every other file.
    """
    if improved or not (model_dir / WEIGHTS).exists():
        save_tensors(model_dir / WEIGHTS, network.state_dict())
    write_model_json(
        model_dir,
        replace(
            run.info,
            epochs_run=stopping.epoch,
            best_epoch=stopping.best_epoch,
            stopped_early=stopping.stopped,
            complete=complete,
        ),
    )
    log = pd.DataFrame(history)
    write_tsv(model_dir / "log.tsv", log)
    if complete or stopping.epoch % CURVES_EVERY == 0:  # a plot costs about a tiny epoch
        plot_loss_curves(log, model_dir / "loss_curves.png")
    save_tensors(
        model_dir / CHECKPOINT,
        {
            "model": network.state_dict(),
            "optimizer": optimiser.state_dict(),
            "history": history,
            "fingerprint": run.info.fingerprint,
        }
        | stopping.state(),
    )


def plot_loss_curves(log: pd.DataFrame, path: Path) -> None:
    """Loss terms per epoch and validation volume error against no change (PNG)."""
    from predictor.figures import pyplot, save_figure

    figure, axes = pyplot().subplots(1, 2, figsize=(10, 4), constrained_layout=True)
    for name in (*TERMS, "total"):
        axes[0].plot(log["epoch"], log[f"train_{name}"], marker="o", label=f"train {name}")
    if "val_total" in log:
        axes[0].plot(log["epoch"], log["val_total"], "k--", marker="s", label="validation total")
        axes[1].plot(log["epoch"], log["val_volume_error"], marker="o", label="network")
        axes[1].plot(
            log["epoch"], log["val_volume_error_no_change"], "k:", label="no-change forecast"
        )
    axes[0].set(xlabel="epoch", ylabel="loss (terms unweighted, total weighted)", yscale="log")
    axes[1].set(
        xlabel="epoch",
        ylabel="mean volume error (% of total brain volume)",
        title="validation pairs",
    )
    for axis in axes:
        axis.legend(fontsize=7)
        axis.grid(alpha=0.3)
    figure.suptitle("predictor training log (research use only)", fontsize=10)
    save_figure(figure, path)
