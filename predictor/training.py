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
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import torch
import torch.distributed as dist

from predictor.config import CONFIG_DIR, CohortSettings, read_toml, settings_from_table
from predictor.errors import ConfigError, DataError, OutputError
from predictor.fields import jacobian_determinant, region_volume_ratio, warp
from predictor.files import write_tsv
from predictor.losses import (
    LossSettings,
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
    WEIGHTS,
    build_network,
    load_tensors,
    save_tensors,
    write_model_json,
)
from predictor.network import NetworkSettings, VelocityNet, encode_condition
from predictor.pairs import (
    PRIOR_REGIONS,
    REGION_DIRECTION,
    SETS,
    Batch,
    ScanStore,
    attach_prior,
    fit_prior,
    make_batch,
    read_workspace,
    split_participants,
    visit_pairs,
)
from predictor.phantoms.participants import seeded_rng
from predictor.regression import save_mixed_model

TERMS = ("similarity", "smoothness", "monotone", "prior")
#: validation figures that early stopping can follow: the mean volume error of the forecast
#: against the measured follow-ups (% of brain volume), or the weighted validation loss
MONITORS = ("val_volume_error", "val_total")


@dataclass(frozen=True)
class TrainingSettings:
    """Trainer settings (defaults in ``configs/train.toml``)."""

    epochs: int = 20
    batch_pairs: int = 2
    learning_rate: float = 1e-3
    patience: int = 4
    split: tuple[float, float, float] = (0.8, 0.1, 0.1)
    test_min_follow_up_years: float = 2.0
    max_pairs_per_epoch: int = 0
    gain_sd: float = 0.05
    flip_probability: float = 0.5
    seed: int = 0
    threads: int = 0
    monitor: str = "val_volume_error"  # early stopping and best weights follow this

    def __post_init__(self):
        if self.monitor not in MONITORS:
            raise ValueError(f"monitor must be one of {list(MONITORS)}; '{self.monitor}' was given")
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
        """Read ``configs/train.toml`` (or ``path``, e.g. ``configs/train-tiny.toml``)."""
        path = Path(path) if path is not None else CONFIG_DIR / "train.toml"
        return cls.from_dict(read_toml(path), str(path))

    @classmethod
    def from_dict(cls, raw: dict, source: str = "config") -> TrainConfig:
        parts = {"network": NetworkSettings, "loss": LossSettings, "training": TrainingSettings}
        unknown = sorted(set(raw) - set(parts))
        if unknown:
            raise ConfigError(f"{source}: unknown table(s) {', '.join(unknown)}")
        return cls(
            **{
                name: settings_from_table(kind, raw.get(name, {}), f"{source} [{name}]")
                for name, kind in parts.items()
            }
        )

    def to_dict(self) -> dict:
        return {name: asdict(getattr(self, name)) for name in ("network", "loss", "training")}


# --- one batch ------------------------------------------------------------------------------
def batch_terms(network: VelocityNet, batch: Batch, loss: LossSettings):
    """Loss terms of a batch, and the forecast region ratios (B, R) and warped baseline."""
    module = network.module if hasattr(network, "module") else network
    velocity = network(batch.inputs, batch.condition)
    shape = tuple(batch.baseline.shape[2:])
    backward = module.displacement(velocity, -batch.years, shape)
    forward = module.displacement(velocity, batch.years, shape)
    earlier = module.displacement(velocity, batch.years * loss.earlier_horizon_fraction, shape)
    warped = warp(batch.baseline, backward)
    determinant = jacobian_determinant(forward)
    ratio = region_volume_ratio(batch.regions, determinant)
    ratio_earlier = region_volume_ratio(batch.regions, jacobian_determinant(earlier))
    log_jacobian = torch.log(determinant.clamp(min=1e-3))
    direction = torch.tensor(REGION_DIRECTION)
    ventricles = batch.regions[:, PRIOR_REGIONS.index("ventricles")]
    terms = {
        "similarity": similarity(warped, batch.followup, batch.mask, loss),
        "smoothness": smoothness(velocity),
        "monotone": monotone_voxels(log_jacobian, batch.tissue, ventricles)
        + monotone_regions(ratio_earlier, ratio, direction),
        "prior": prior_z2(ratio, batch.prior, batch.prior_sd),
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
    workspace: object
    split: dict
    pairs: dict  # set -> DataFrame of pairs with prior columns
    conditions: dict  # set -> (P, K) tensor
    info: dict  # model.json content without checksums


def prepare_run(work, config: TrainConfig, seed: int) -> tuple[Run, object, list[str]]:
    """Split, pairs, prior and conditioning statistics of a workspace; returns the prior too."""
    workspace = read_workspace(work)
    volumes = workspace.volumes
    settings = config.training
    split = split_participants(volumes, settings.split, settings.test_min_follow_up_years, seed)
    prior, prior_warnings = fit_prior(volumes, split["train"])
    pairs = {name: attach_prior(visit_pairs(volumes, split[name]), prior) for name in SETS}
    if pairs["train"].empty:
        raise DataError("the training participants have no follow-up visits: nothing to learn")
    cohort = CohortSettings.from_toml()
    labels = list(cohort.diagnosis_labels)
    ages = pairs["train"]["age"].to_numpy()
    age_mean, age_sd = float(ages.mean()), float(max(ages.std(), 1.0))

    def condition(frame):
        return encode_condition(
            frame["age"].to_numpy(),
            (frame["sex"] == "M").to_numpy(),
            [labels.index(d) for d in frame["diagnosis"]],
            age_mean,
            age_sd,
            len(labels),
        )

    conditions = {name: condition(frame) for name, frame in pairs.items() if not frame.empty}
    digest = hashlib.sha256((workspace.root / "volumes.tsv").read_bytes())
    digest.update(json.dumps(config.to_dict(), sort_keys=True).encode())
    digest.update(str(seed).encode())
    train_rows = volumes[volumes["participant_id"].isin(split["train"])]
    info = {
        "config": config.to_dict(),
        "seed": seed,
        "grid": {"affine": workspace.grid_affine.tolist(), "shape": list(workspace.grid_shape)},
        "template": workspace.template,
        "prepare_settings": workspace.prepare_settings,
        "regions": list(PRIOR_REGIONS),
        "condition": {
            "age_mean": age_mean,
            "age_sd": age_sd,
            "labels": labels,
            "sex_codes": list(cohort.sex_codes),
        },
        "split": split,
        "training_range": {
            "age_years": [float(train_rows["age"].min()), float(train_rows["age"].max())],
            "max_horizon_years": float(pairs["train"]["years"].max()),
            "diagnoses": sorted(set(train_rows["diagnosis"])),
            "sexes": sorted(set(train_rows["sex"])),
            "pairs": len(pairs["train"]),
        },
        "prior": PRIOR,
        "prior_warnings": prior_warnings,
        "fingerprint": digest.hexdigest()[:20],
    }
    return Run(config, seed, workspace, split, pairs, conditions, info), prior, prior_warnings


def _distributed() -> tuple[int, int]:
    """(rank, world size); initialises the gloo process group under torchrun."""
    world = int(os.environ.get("WORLD_SIZE", "1"))
    if world > 1 and not dist.is_initialized():
        dist.init_process_group("gloo")
    return (dist.get_rank(), world) if world > 1 else (0, 1)


def _batches(count: int, size: int, order: np.ndarray) -> list[np.ndarray]:
    return [order[start : start + size] for start in range(0, count, size)]


def evaluate(network, run: Run, store: ScanStore, rank: int = 0, world: int = 1) -> dict:
    """Validation loss terms (full weights) and forecast errors against the no-change forecast.

    Errors: image MSE inside the brain (normalised intensity^2), and each
    region's absolute volume error as % of the baseline total brain volume.
    """
    pairs = run.pairs["validation"]
    loss = run.config.loss
    weights = loss.weights(10**6)
    sums = {f"val_{name}": 0.0 for name in (*TERMS, "total", "image_mse", "image_mse_no_change")}
    for region in PRIOR_REGIONS:
        sums[f"val_error_{region}"] = sums[f"val_error_{region}_no_change"] = 0.0
    count = 0
    mine = np.arange(len(pairs))[rank::world]
    with torch.no_grad():
        for chunk in _batches(len(mine), run.config.training.batch_pairs, mine):
            frame = pairs.iloc[chunk]
            conditions = run.conditions["validation"][chunk]
            batch = make_batch(frame, store, conditions, run.config.network.tissue_channels)
            terms, ratio, warped = batch_terms(network, batch, loss)
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
            brain = frame["brain"].to_numpy()
            for j, region in enumerate(PRIOR_REGIONS):
                base = frame[region].to_numpy()
                truth = frame[f"{region}_follow"].to_numpy()
                forecast = base * ratio[:, j].numpy()
                sums[f"val_error_{region}"] += float((100 * np.abs(forecast - truth) / brain).sum())
                sums[f"val_error_{region}_no_change"] += float(
                    (100 * np.abs(base - truth) / brain).sum()
                )
            count += size
    if world > 1:
        packed = torch.tensor([*sums.values(), count], dtype=torch.float64)
        dist.all_reduce(packed)
        sums = dict(zip(sums, packed[:-1].tolist(), strict=True))
        count = int(packed[-1])
    means = {name: value / max(count, 1) for name, value in sums.items()}
    means["val_volume_error"] = float(np.mean([means[f"val_error_{r}"] for r in PRIOR_REGIONS]))
    means["val_volume_error_no_change"] = float(
        np.mean([means[f"val_error_{r}_no_change"] for r in PRIOR_REGIONS])
    )
    return means


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
) -> dict:
    """Train a model on a prepared workspace into ``model_dir``; returns the last log row.

    ``epochs`` and ``seed`` override the config's. ``on_step(epoch, step,
    steps, terms)`` and ``on_epoch(row)`` report progress (rank 0 only).
    """
    config = config or TrainConfig.from_toml()
    settings = config.training
    epochs = int(epochs if epochs is not None else settings.epochs)
    seed = int(seed if seed is not None else settings.seed)
    model_dir = Path(model_dir)
    rank, world = _distributed()
    checkpoint_path = model_dir / CHECKPOINT
    if checkpoint_path.exists() and not (resume or force):
        raise OutputError(
            f"{model_dir}: holds a trained model; pass --resume to continue or --force to restart"
        )
    threads = settings.threads or (max(1, (os.cpu_count() or 1) // world) if world > 1 else 0)
    if threads:
        torch.set_num_threads(threads)

    run, prior, _ = prepare_run(work, config, seed)
    network = _initial_network(run.info, seed)
    optimiser = torch.optim.Adam(network.parameters(), lr=settings.learning_rate)
    state = {"epoch": 0, "best_monitored": float("inf"), "best_epoch": 0, "bad_epochs": 0}
    history: list[dict] = []
    if resume and checkpoint_path.exists():
        saved = load_tensors(checkpoint_path)
        if saved.get("fingerprint") != run.info["fingerprint"]:
            raise OutputError(
                f"{checkpoint_path}: was trained on another workspace, config or seed; "
                "use --force to restart"
            )
        network.load_state_dict(saved["model"])
        optimiser.load_state_dict(saved["optimizer"])
        state = {key: saved[key] for key in state}
        history = [dict(row) for row in saved["history"]]
    elif rank == 0:
        model_dir.mkdir(parents=True, exist_ok=True)
        save_mixed_model(model_dir / PRIOR, prior)
        write_tsv(
            model_dir / "split.tsv",
            pd.DataFrame(
                [(p, name) for name in SETS for p in run.split[name]],
                columns=["participant_id", "set"],
            ),
        )
    trainer = network
    if world > 1:
        from torch.nn.parallel import DistributedDataParallel

        trainer = DistributedDataParallel(network)
    store = ScanStore(work)
    pairs = run.pairs["train"]
    stopped = state["bad_epochs"] >= settings.patience
    epoch = state["epoch"]
    while epoch < epochs and not stopped:
        started = time.perf_counter()
        weights = config.loss.weights(epoch)
        order = seeded_rng(seed, 11, epoch).permutation(len(pairs))
        if settings.max_pairs_per_epoch:
            order = order[: settings.max_pairs_per_epoch]
        batches = _batches(len(order), settings.batch_pairs, order)
        batches = [b for b in batches if len(b) >= world]
        sums = dict.fromkeys((*TERMS, "total"), 0.0)
        trainer.train()
        for step, chunk in enumerate(batches):
            mine = chunk[rank::world]
            # augmentation drawn per pair from its place in the epoch: the same draws
            # whatever the number of processes
            start = step * settings.batch_pairs + rank
            places = range(start, start + len(mine) * world, world)
            batch = make_batch(
                pairs.iloc[mine],
                store,
                run.conditions["train"][mine],
                config.network.tissue_channels,
                [seeded_rng(seed, 13, epoch, place) for place in places],
                settings.gain_sd,
                settings.flip_probability,
            )
            terms, _, _ = batch_terms(trainer, batch, config.loss)
            total = weighted_total(terms, weights)
            optimiser.zero_grad()
            total.backward()
            optimiser.step()
            for name in TERMS:
                sums[name] += terms[name].item()
            sums["total"] += total.item()
            if on_step and rank == 0:
                on_step(epoch, step + 1, len(batches), {n: v / (step + 1) for n, v in sums.items()})
        trainer.eval()
        row = {"epoch": epoch + 1}
        row |= {f"train_{name}": value / max(len(batches), 1) for name, value in sums.items()}
        if not run.pairs["validation"].empty:
            row |= evaluate(network, run, store, rank, world)
        monitored = row.get(settings.monitor, row["train_total"])
        improved = monitored < state["best_monitored"]
        state["epoch"] = epoch + 1
        if improved:
            state |= {"best_monitored": monitored, "best_epoch": epoch + 1, "bad_epochs": 0}
        else:
            state["bad_epochs"] += 1
        row["seconds"] = time.perf_counter() - started
        history.append(row)
        stopped = state["bad_epochs"] >= settings.patience
        if rank == 0:
            complete = stopped or state["epoch"] >= epochs
            _write_epoch(model_dir, network, optimiser, state, history, run, improved, complete)
            if on_epoch:
                on_epoch(row)
        if world > 1:
            dist.barrier()
        epoch += 1
    return history[-1] if history else {}


def _initial_network(info: dict, seed: int) -> VelocityNet:
    """The network with weights drawn from ``seed`` (the global torch state is left alone)."""
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        return build_network(info)


def _write_epoch(model_dir, network, optimiser, state, history, run, improved, complete) -> None:
    """Checkpoint, best weights, model.json, log and loss curves after an epoch (rank 0)."""
    if improved or not (model_dir / WEIGHTS).exists():
        save_tensors(model_dir / WEIGHTS, network.state_dict())
    save_tensors(
        model_dir / CHECKPOINT,
        {
            "model": network.state_dict(),
            "optimizer": optimiser.state_dict(),
            "history": history,
            "fingerprint": run.info["fingerprint"],
        }
        | state,
    )
    write_model_json(
        model_dir,
        run.info
        | {
            "epochs_run": state["epoch"],
            "best_epoch": state["best_epoch"],
            "stopped_early": state["bad_epochs"] >= run.config.training.patience,
            "complete": complete,
        },
    )
    log = pd.DataFrame(history)
    write_tsv(model_dir / "log.tsv", log)
    plot_loss_curves(log, model_dir / "loss_curves.png")


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
