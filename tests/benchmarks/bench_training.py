"""Training-step time, pairs per second and floating-point rate at the default config and grid
(beside the machine's own matrix-multiply rate, measured in the same run); one network pass."""

from __future__ import annotations

import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))  # tests/helpers.py


def _default_batch(pairs: int):
    import torch

    from predictor.config import CohortSettings
    from predictor.network import encode_condition
    from predictor.pairs import Batch
    from predictor.prepare import PrepareSettings, cached_template, working_grid
    from predictor.regions import RegionSet

    region_set = RegionSet.from_toml()
    _, shape = working_grid(cached_template("mni152", region_set), PrepareSettings.from_toml())
    generator = torch.Generator().manual_seed(0)
    coding = CohortSettings.from_toml()

    def field(channels):
        return torch.rand(pairs, channels, *shape, generator=generator)

    condition = encode_condition([70.0] * pairs, ["F"] * pairs, ["CN"] * pairs, coding, 75.0, 8.0)
    regions = len(region_set.prior)
    batch = Batch(
        field(4), field(1), field(1), torch.ones(pairs, 1, *shape), field(1)[:, 0],
        field(regions), condition, torch.full((pairs,), 2.0),
        torch.ones(pairs, regions), torch.full((pairs, regions), 0.01),
        torch.zeros(pairs, *shape), torch.zeros(pairs),
    )  # fmt: skip
    return batch, shape


def matmul_gflops(size: int = 2048, repeats: int = 7) -> float:
    """The machine's dense float32 matrix-multiply rate on PyTorch's threads (median)."""
    import torch

    generator = torch.Generator().manual_seed(0)
    a, b = (torch.rand(size, size, generator=generator) for _ in range(2))
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        torch.matmul(a, b)
        times.append(time.perf_counter() - started)
    return 2 * size**3 / sorted(times)[len(times) // 2] / 1e9


def convolution_flops(network, inputs, condition) -> int:
    """Forward floating-point work of the network's 3D convolutions, counted from the layers:
    2 x (input channels x 27 + 1) x output channels x output voxels each (a multiply-add is
    two operations, the bias one)."""
    import torch

    total, hooks = [0], []

    def count(layer, _, output):
        kernel = layer.in_channels // layer.groups * int(torch.tensor(layer.kernel_size).prod())
        total[0] += 2 * kernel * output.numel() + output.numel()

    for layer in network.modules():
        if isinstance(layer, torch.nn.Conv3d):
            hooks.append(layer.register_forward_hook(count))
    with torch.no_grad():
        network(inputs, condition)
    for hook in hooks:
        hook.remove()
    return total[0]


def default_training_step() -> dict:
    """Seconds per optimiser step of ``batch_pairs`` pairs (configs/train.toml, 3 mm grid),
    the step's floating-point work and rate, and the machine's matmul rate beside it."""
    import torch
    from helpers import constant_velocity_model
    from torch.utils.flop_counter import FlopCounterMode

    from predictor.modelstore import build_network
    from predictor.regions import RegionSet
    from predictor.training import TrainConfig, batch_terms, weighted_total

    config = TrainConfig.from_toml()
    pairs = config.training.batch_pairs
    batch, shape = _default_batch(pairs)
    network = build_network(constant_velocity_model(config=config).info)
    direction = torch.from_numpy(RegionSet.from_toml().directions(RegionSet.from_toml().prior))
    optimiser = torch.optim.Adam(network.parameters(), lr=1e-3)
    weights = config.loss.weights(100)

    def step():
        terms, _, _ = batch_terms(network, batch, config.loss, direction)
        optimiser.zero_grad()
        weighted_total(terms, weights).backward()
        optimiser.step()

    step()  # warm-up
    with FlopCounterMode(display=False) as counter:
        step()
    times = []
    for _ in range(10):
        started = time.perf_counter()
        step()
        times.append(time.perf_counter() - started)
    seconds = sorted(times)[len(times) // 2]
    flops = counter.get_total_flops()
    peak = matmul_gflops()
    achieved = flops / seconds / 1e9
    return {
        "grid": "x".join(map(str, shape)),
        "batch_pairs": pairs,
        "s_per_step": round(seconds, 3),
        "pairs_per_s": round(pairs / seconds, 2),
        # convolutions and matrix products, forward and backward (torch.utils.flop_counter);
        # grid sampling and elementwise work are not counted
        "step_gflop": round(flops / 1e9, 2),
        "forward_conv_gflop_from_layers": round(
            convolution_flops(network, batch.inputs, batch.condition) / 1e9, 2
        ),
        "achieved_gflops": round(achieved, 1),
        "matmul_2048_gflops": round(peak, 1),
        "ratio_to_matmul": round(achieved / peak, 3),
        "threads": torch.get_num_threads(),
    }


def network_pass() -> dict:
    """One forward pass and a 2-year integration (no gradients), default config and grid."""
    import torch
    from helpers import constant_velocity_model

    batch, shape = _default_batch(1)
    network = constant_velocity_model().network
    network.eval()
    times = []
    with torch.no_grad():
        for _ in range(4):
            started = time.perf_counter()
            velocity = network(batch.inputs, batch.condition)
            network.displacement(velocity, 2.0, shape)
            network.displacement(velocity, -2.0, shape)
            times.append(time.perf_counter() - started)
    return {"grid": "x".join(map(str, shape)), "s_per_pass": round(min(times[1:]), 3)}


BENCHMARKS = {"default_training_step": default_training_step, "network_pass": network_pass}
