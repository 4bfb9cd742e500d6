"""Network, losses and trainer (predictor.network, losses, pairs, training, modelstore)."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
from typer.testing import CliRunner

from predictor.cli import app
from predictor.config import CONFIG_DIR, CohortSettings, merged
from predictor.errors import ConfigError, DataError, OutputError
from predictor.fields import identity_grid, jacobian_determinant, region_volume_ratio
from predictor.losses import (
    LossSettings,
    log_jacobian_match,
    masked_lncc,
    masked_mse,
    monotone_regions,
    monotone_voxels,
    prior_z2,
    smoothness,
)
from predictor.modelstore import CHECKPOINT, WEIGHTS, load_model, load_tensors
from predictor.network import NetworkSettings, VelocityNet, encode_condition
from predictor.pairs import (
    ScanStore,
    make_batch,
    network_input,
    region_weights,
    split_participants,
    visit_pairs,
)
from predictor.training import TrainConfig, train
from predictor.workspace import read_workspace

TINY = CONFIG_DIR / "train-tiny.toml"
CODING = CohortSettings.from_toml()


# --- configuration --------------------------------------------------------------------------
def test_default_and_tiny_configs_read():
    default, tiny = TrainConfig.from_toml(), TrainConfig.from_toml(TINY)
    assert default.network.channels == (8, 16, 24, 32) and tiny.network.channels == (4, 8, 8)
    assert TrainConfig.from_dict(default.to_dict()) == default


@pytest.mark.parametrize(
    ("raw", "message"),
    [
        ({"network": {"chanels": [4, 8]}}, "unknown key"),
        ({"loss": {"similarity": "ssd"}}, "'ssd' was given"),
        ({"training": {"split": [0.5, 0.1, 0.1]}}, "summing to 1"),
        ({"training": {"epochs": "ten"}}, r"\[training\] 'epochs': must be int"),
        ({"optimiser": {}}, "'optimiser': unknown key"),
    ],
)
def test_bad_config_is_a_clear_error(raw, message):
    with pytest.raises(ConfigError, match=message):
        TrainConfig.from_dict(merged(TrainConfig.from_toml().to_dict(), raw), "test.toml")


# --- network --------------------------------------------------------------------------------
def test_untrained_network_forecasts_no_change_and_checks_shapes():
    settings = NetworkSettings(
        channels=(4, 8, 8), tissue_channels=True, condition_width=16, integration_steps=6
    )
    network = VelocityNet(settings, condition_size=5)
    image = torch.randn(2, 4, 13, 15, 11)  # odd sides are padded internally
    condition = encode_condition([70, 80], ["F", "M"], ["CN", "AD"], CODING, 75.0, 5.0)
    velocity = network(image, condition)
    assert velocity.shape == (2, 3, 8, 8, 6)  # half of the sides padded to a multiple of 4
    assert torch.count_nonzero(velocity) == 0  # zero-initialised output layer
    displacement = network.displacement(velocity, 3.0, (13, 15, 11))
    assert displacement.shape == (2, 3, 13, 15, 11) and torch.count_nonzero(displacement) == 0
    with pytest.raises(ValueError, match=r"image must be \(B, 4, D, H, W\)"):
        network(torch.randn(2, 1, 8, 8, 8), condition)
    with pytest.raises(ValueError, match=r"condition must be \(2, 5\)"):
        network(image, condition[:, :4])


def test_condition_encoding_is_standardised_and_one_hot():
    condition = encode_condition([70.0, 80.0], ["F", "M"], ["AD", "CN"], CODING, 75.0, 5.0)
    np.testing.assert_allclose(condition.numpy(), [[-1, -0.5, 0, 0, 1], [1, 0.5, 1, 0, 0]])
    # other codes for the same people, declared in the cohort settings: the same vectors
    other = CohortSettings.from_dict(
        CODING.to_dict() | {"sex": {"codes": ["female", "male"], "aliases": {}}}
    )
    again = encode_condition([70.0, 80.0], ["female", "male"], ["AD", "CN"], other, 75.0, 5.0)
    assert torch.equal(again, condition)


# --- losses (hand-computed values) -------------------------------------------------------------
def test_loss_terms_on_hand_checkable_inputs(rng):
    a = torch.zeros(1, 1, 4, 5, 6)
    b = torch.full((1, 1, 4, 5, 6), 2.0)
    mask = torch.zeros_like(a)
    mask[..., :2] = 1.0
    assert float(masked_mse(a, b, mask)) == pytest.approx(4.0)
    image = torch.tensor(rng.normal(size=(1, 1, 7, 8, 9)), dtype=torch.float32)
    ones = torch.ones_like(image)
    # identical images (and any affine change of intensity) correlate perfectly
    assert float(masked_lncc(image, image, ones, 3)) == pytest.approx(0.0, abs=1e-3)
    assert float(masked_lncc(image, 2 * image + 1, ones, 3)) == pytest.approx(0.0, abs=1e-3)
    # a linear field v = 0.1 x along axis 0 has forward differences 0.1 on one of 3 axes
    linear = 0.1 * identity_grid((5, 6, 7))[:, :1].repeat(1, 3, 1, 1, 1)
    assert float(smoothness(linear)) == pytest.approx(0.01 / 3, rel=1e-5)
    log_j = torch.tensor([[0.2, -0.1, 0.3, -0.4]]).view(1, 1, 2, 2)
    tissue = torch.tensor([[1.0, 1.0, 0.0, 0.0]]).view(1, 1, 2, 2)
    ventricles = 1.0 - tissue
    # tissue grows by 0.2 at one of its 2 voxels; ventricles shrink by 0.4 at one of 2
    assert float(monotone_voxels(log_j, tissue, ventricles)) == pytest.approx(0.1 + 0.2)
    earlier = torch.tensor([[0.98, 1.05]])
    later = torch.tensor([[0.99, 1.03]])  # shrinking region grew, growing region shrank
    direction = torch.tensor([-1.0, 1.0])
    assert float(monotone_regions(earlier, later, direction)) == pytest.approx(0.01 + 0.02)
    forecast, prior = torch.tensor([[0.97, 1.1]]), torch.tensor([[0.95, 1.1]])
    spread = torch.tensor([[0.01, 1.0]])
    assert float(prior_z2(forecast, prior, spread)) == pytest.approx((2.0**2 + 0.0) / 2, rel=1e-5)


def test_similarity_warm_up_ramps_linearly():
    default = TrainConfig.from_toml().loss.__dict__
    settings = LossSettings(**default | {"similarity_weight": 2.0, "similarity_warmup_epochs": 3})
    assert [settings.weights(e)["similarity"] for e in range(5)] == [0.5, 1.0, 1.5, 2.0, 2.0]


# --- split and pairs ------------------------------------------------------------------------------
def test_split_is_participant_level_and_test_has_two_year_follow_up(tiny_workspace):
    volumes = read_workspace(tiny_workspace).volumes
    split = split_participants(volumes, (0.8, 0.1, 0.1), 2.0, seed=1)
    sets = [set(split[name]) for name in ("train", "validation", "test")]
    assert sum(map(len, sets)) == volumes.participant_id.nunique() == 20
    assert not (sets[0] & sets[1] or sets[0] & sets[2] or sets[1] & sets[2])
    assert len(sets[2]) == len(sets[1]) == 2
    span = volumes.groupby("participant_id").age.agg(lambda a: a.max() - a.min())
    assert all(span[p] >= 2.0 for p in sets[2])
    assert split == split_participants(volumes, (0.8, 0.1, 0.1), 2.0, seed=1)  # seeded
    with pytest.raises(DataError, match="follow-up 30 years"):
        split_participants(volumes, (0.8, 0.1, 0.1), 30.0, seed=1)


def test_visit_pairs_are_every_earlier_later_pair(tiny_workspace):
    volumes = read_workspace(tiny_workspace).volumes
    participants = sorted(volumes.participant_id.unique())[:5]
    pairs = visit_pairs(volumes, participants, read_workspace(tiny_workspace).regions)
    visits = volumes[volumes.participant_id.isin(participants)].groupby("participant_id").size()
    assert len(pairs) == int((visits * (visits - 1) // 2).sum())
    assert (pairs.years > 0).all() and (pairs.base_key != pairs.follow_key).all()


# --- training ---------------------------------------------------------------------------------
def forecast_percent_change(model_dir: Path, work: Path, years: float = 2.0) -> pd.DataFrame:
    """Each participant's baseline forecast on the grid: % volume change of the prior regions."""
    model = load_model(model_dir)
    store, condition, regions = ScanStore(work), model.info.condition, model.info.region_set
    rows = []
    for row in read_workspace(work).volumes.groupby("participant_id").head(1).itertuples():
        arrays = store[row.key]
        code = encode_condition(
            [row.age], [row.sex], [row.diagnosis], model.info.coding,
            condition["age_mean"], condition["age_sd"],
        )  # fmt: skip
        with torch.no_grad():
            velocity = model.network(network_input(arrays, True)[None], code)
            forward = model.network.displacement(velocity, years, tuple(arrays.shape[1:]))
        weights = region_weights(arrays, regions, regions.prior)[None]
        ratio = region_volume_ratio(weights, jacobian_determinant(forward))[0].numpy()
        percent = dict(zip(regions.prior, 100 * (ratio - 1), strict=True))
        rows.append({"diagnosis": row.diagnosis} | percent)
    return pd.DataFrame(rows)


@pytest.mark.slow
def test_tiny_model_learns_group_differences_and_beats_no_change(tiny_model, tiny_workspace):
    change = forecast_percent_change(tiny_model, tiny_workspace).groupby("diagnosis").mean()
    # Published group differences built into the phantoms (synthetic_phantoms/memory_clinic.toml):
    # ventricles expand and hippocampi shrink faster in AD than in controls.
    assert change.loc["AD", "ventricles"] > change.loc["CN", "ventricles"] > 0
    for side in ("hippocampus_left", "hippocampus_right"):
        assert change.loc["AD", side] < change.loc["CN", side] < 0
    log = pd.read_csv(tiny_model / "log.tsv", sep="\t")
    best = log.loc[log.val_total.idxmin()]
    assert best.val_volume_error < best.val_volume_error_no_change
    assert best.val_image_mse < best.val_image_mse_no_change
    assert (tiny_model / "loss_curves.png").stat().st_size > 10_000


QUICK = TrainConfig.from_dict(
    TrainConfig.from_toml(TINY).to_dict()
    | {"training": TrainConfig.from_toml(TINY).to_dict()["training"] | {"max_pairs_per_epoch": 8}}
)


def test_resume_gives_bitwise_equal_weights(tiny_workspace, tmp_path):
    straight, resumed = tmp_path / "straight", tmp_path / "resumed"
    train(tiny_workspace, straight, QUICK, epochs=3)
    train(tiny_workspace, resumed, QUICK, epochs=2)
    with pytest.raises(OutputError, match="--resume"):
        train(tiny_workspace, resumed, QUICK, epochs=3)
    train(tiny_workspace, resumed, QUICK, epochs=3, resume=True)
    for name in (CHECKPOINT, WEIGHTS):
        a, b = load_tensors(straight / name), load_tensors(resumed / name)
        a, b = (x["model"] if name == CHECKPOINT else x for x in (a, b))
        assert a.keys() == b.keys()
        assert all(torch.equal(a[key], b[key]) for key in a)
    pd.testing.assert_frame_equal(
        pd.read_csv(straight / "log.tsv", sep="\t").drop(columns="seconds"),
        pd.read_csv(resumed / "log.tsv", sep="\t").drop(columns="seconds"),
    )
    with pytest.raises(OutputError, match="another workspace, config, seed or split"):
        train(tiny_workspace, resumed, QUICK, epochs=4, resume=True, seed=9)


@pytest.mark.slow
def test_torchrun_two_processes_match_a_single_process(tiny_workspace, tmp_path):
    # One optimiser step on one batch of two pairs: each of two torchrun processes takes
    # one pair and DDP averages their gradients, which must give the single process's
    # step. Adam's first step is about the learning rate times the gradient's sign, so a
    # wrong pair, augmentation or split moves weights by about the learning rate; the
    # summation order alone moved them by 0.6% of it (2026-12-05), except where a gradient
    # is so near zero that the order flips its sign and Adam steps the other way (one
    # weight of 8479 on another tiny workspace): at most 0.1% of the weights may differ by
    # more than 5% of the learning rate. Over more steps such
    # float-level differences grow (Adam divides near-zero gradients by their own size):
    # after 2 epochs of 16 pairs the validation loss differed by 10.6%, which is why this
    # test compares one step, not a trained model.
    torchrun = shutil.which("torchrun", path=str(Path(sys.executable).parent))
    config = tmp_path / "quick.toml"
    raw = QUICK.to_dict()
    raw["training"]["max_pairs_per_epoch"] = raw["training"]["batch_pairs"] = 2
    config.write_text(_toml(raw))
    single = tmp_path / "single"
    train(tiny_workspace, single, TrainConfig.from_toml(config), epochs=1)
    environment = os.environ | {"OMP_NUM_THREADS": "1"}
    command = [torchrun, "--standalone", "--nproc_per_node", "2", "-m", "predictor.cli", "train"]
    command += [str(tiny_workspace), str(tmp_path / "ddp"), "--config", str(config)]
    command += ["--epochs", "1"]
    done = subprocess.run(command, capture_output=True, text=True, env=environment, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    one, two = load_tensors(single / WEIGHTS), load_tensors(tmp_path / "ddp" / WEIGHTS)
    moved = sum(int(((one[k] - two[k]).abs() > 0.05 * raw["training"]["learning_rate"]).sum())
                for k in one)  # fmt: skip
    assert moved <= 0.001 * sum(tensor.numel() for tensor in one.values()), moved
    # both processes' validation sums are gathered: the same validation loss
    logs = [pd.read_csv(f / "log.tsv", sep="\t") for f in (single, tmp_path / "ddp")]
    assert logs[1].val_total.iloc[-1] == pytest.approx(logs[0].val_total.iloc[-1], rel=0.01)


def _toml(raw: dict) -> str:
    """Minimal TOML writer for a two-level table of numbers, strings, booleans and lists."""

    def value(v):
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return f'"{v}"'
        if isinstance(v, list | tuple):
            return "[" + ", ".join(value(x) for x in v) + "]"
        return repr(v)

    return "".join(
        f"[{name}]\n" + "".join(f"{key} = {value(v)}\n" for key, v in table.items())
        for name, table in raw.items()
    )


def test_train_command_refuses_to_overwrite(tiny_workspace, tmp_path):
    runner = CliRunner()
    model = tmp_path / "model"
    arguments = ["train", str(tiny_workspace), str(model), "--config", str(TINY), "--epochs", "1"]
    first = runner.invoke(app, arguments)
    assert first.exit_code == 0, first.output
    assert "Research use only" in first.output
    again = runner.invoke(app, arguments)
    assert again.exit_code == 2 and "--resume" in again.output and "Traceback" not in again.output
    missing = runner.invoke(app, ["train", str(tmp_path / "nowhere"), str(tmp_path / "other")])
    assert missing.exit_code == 2 and "not a prepared workspace" in missing.output


def test_log_jacobian_term_is_the_masked_mean_squared_difference_of_measured_pairs(rng):
    # By hand (numpy): per pair the mean squared difference inside the mask, averaged over
    # the pairs with a measured map; a pair without one adds nothing.
    predicted, measured = rng.normal(size=(2, 3, 4, 5, 6))
    mask = (rng.random((3, 4, 5, 6)) > 0.4).astype(float)
    present = np.array([1.0, 0.0, 1.0])
    per_pair = [((predicted[k] - measured[k]) ** 2 * mask[k]).sum() / mask[k].sum() for k in (0, 2)]
    found = log_jacobian_match(*(torch.tensor(a) for a in (predicted, measured, mask, present)))
    assert float(found) == pytest.approx(np.mean(per_pair), rel=1e-12)
    none = [torch.tensor(a) for a in (predicted, measured, mask, 0 * present)]
    assert float(log_jacobian_match(*none)) == 0.0


def test_batches_carry_each_pairs_measured_log_jacobian_flipped_with_it(tiny_workspace):
    # The map a batch carries is the participant's within-subject file (read here with
    # nibabel), mirrored with the pair; without log_jacobians no pair has one.
    import nibabel as nib

    workspace = read_workspace(tiny_workspace)
    volumes, regions = workspace.volumes, workspace.regions
    spaces = dict(zip(volumes["key"], volumes["within_subject"], strict=True))
    participants = sorted(volumes.participant_id.unique())[:2]
    priors = {f"{r}_prior{end}": 1.0 for r in regions.prior for end in ("", "_sd")}
    pairs = visit_pairs(volumes, participants, regions).assign(**priors)
    store, count = ScanStore(tiny_workspace, spaces), len(pairs)
    rngs = [np.random.default_rng(k) for k in range(count)]
    batch = make_batch(pairs, store, torch.zeros(count, 5), True, regions, rngs, 0.0, 1.0,
                       log_jacobians=True)  # fmt: skip
    for k, pair in enumerate(pairs.itertuples(index=False)):
        path = workspace.layout.subject(spaces[pair.base_key]).log_jacobian(
            pair.base_key, pair.follow_key
        )
        expected = np.asarray(nib.load(path).dataobj, dtype=np.float32)[::-1]
        np.testing.assert_array_equal(batch.log_jacobian[k].numpy(), expected)
    assert batch.measured.tolist() == [1.0] * count
    plain = make_batch(pairs, store, torch.zeros(count, 5), True, regions)
    assert plain.measured.sum() == 0 and plain.log_jacobian.abs().sum() == 0


def test_a_config_recorded_before_the_jacobian_term_reads_the_same():
    # The term off (weight 0) leaves no trace in the record, so model.json files, checkpoint
    # and fold fingerprints written before the term existed still match the same training.
    from dataclasses import replace

    config = TrainConfig.from_toml()
    raw = config.to_dict()
    assert config.loss.jacobian_weight == 0.0 and "jacobian_weight" not in raw["loss"]
    assert TrainConfig.from_dict(raw) == config
    on = replace(config, loss=replace(config.loss, jacobian_weight=2.0))
    assert TrainConfig.from_dict(on.to_dict()) == on
