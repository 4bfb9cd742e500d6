"""The conditional velocity-field network: baseline scan + age, sex, diagnosis (+ declared
covariates) -> velocity.

A compact 3D U-Net. Every convolution block is modulated feature-wise by the
conditioning vector (FiLM: Perez et al. 2018, AAAI): each channel is scaled
by ``1 + gamma(c)`` and shifted by ``beta(c)``. The decoder stops at half the
working-grid resolution: the velocity lives on that coarse grid (coarse voxel
``i`` at working-grid voxel ``2 i``), is integrated there by scaling and
squaring, and the resulting displacement is upsampled trilinearly to the
working grid (:meth:`VelocityNet.displacement`). This keeps the field smooth
and makes the integration eight times cheaper. The output layer starts at
zero, so an untrained network forecasts no change.

Shapes: image ``(B, C, D, H, W)`` with ``C = 1`` (normalised T1) or ``4``
(T1, GM, WM, CSF probabilities); condition ``(B, S + L + C)`` from
:func:`encode_condition`; velocity ``(B, 3, d, h, w)`` on the coarse grid in
coarse voxels per year; displacements ``(B, 3, D, H, W)`` in working-grid
voxels (see :mod:`predictor.fields`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from predictor.fields import exp_velocity, squarings, upsample_displacement

#: the velocity grid is this many times coarser than the working grid
COARSE_FACTOR = 2


@dataclass(frozen=True)
class NetworkSettings:
    """Network size (``[network]`` of ``configs/train.toml``)."""

    channels: tuple[int, ...]  # features per level, full resolution first
    tissue_channels: bool  # GM, WM, CSF probabilities as extra input channels
    condition_width: int  # width of the conditioning embedding
    integration_steps: int  # scaling-and-squaring steps (2**steps sub-steps)

    def __post_init__(self):
        if len(self.channels) < 2 or any(int(c) < 1 for c in self.channels):
            raise ValueError(f"channels must list at least 2 positive sizes, got {self.channels}")
        if not 1 <= self.integration_steps <= 12:
            raise ValueError(f"integration_steps must be 1-12, got {self.integration_steps}")

    @property
    def input_channels(self) -> int:
        return 4 if self.tissue_channels else 1


def condition_size(coding, covariates: int = 0) -> int:
    """Width of the conditioning vector: 1 + (S - 1) + L, plus ``covariates`` encoded
    covariate columns (:attr:`predictor.covariates.Encoder.width`)."""
    return len(coding.sex_codes) + len(coding.diagnosis_labels) + covariates


def encode_condition(
    age_years, sex, diagnosis, coding, age_mean: float, age_sd: float, covariates=None
) -> torch.Tensor:
    """Conditioning vectors (B, S + L + C): standardised age, sex indicators, diagnosis
    one-hot, then ``covariates`` (B, C), the encoded covariates (None: C = 0).

    ``sex`` and ``diagnosis`` are codes of ``coding`` (a
    :class:`~predictor.config.CohortSettings`); each sex code after the first
    (the reference) has an indicator centred at 0 (+-0.5).
    """
    age = (np.asarray(age_years, dtype=np.float32) - age_mean) / age_sd
    indicators = coding.sex_indicators(sex).astype(np.float32) - 0.5
    labels = list(coding.diagnosis_labels)
    index = [labels.index(label) for label in diagnosis]
    one_hot = np.eye(len(labels), dtype=np.float32)[np.asarray(index, dtype=int)]
    extra = np.zeros((len(age), 0)) if covariates is None else np.asarray(covariates)
    columns = np.column_stack([age, indicators, one_hot, extra])
    return torch.from_numpy(columns.astype(np.float32))


class ConditionedBlock(nn.Module):
    """3x3x3 convolution, FiLM modulation by the condition embedding, leaky ReLU."""

    def __init__(self, inputs: int, outputs: int, width: int, stride: int = 1):
        super().__init__()
        self.conv = nn.Conv3d(inputs, outputs, 3, stride=stride, padding=1)
        self.film = nn.Linear(width, 2 * outputs)
        nn.init.zeros_(self.film.weight)
        nn.init.zeros_(self.film.bias)

    def forward(self, features: torch.Tensor, embedding: torch.Tensor) -> torch.Tensor:
        out = self.conv(features)
        gamma, beta = self.film(embedding)[:, :, None, None, None].chunk(2, dim=1)
        return F.leaky_relu(out * (1.0 + gamma) + beta, 0.2)


class VelocityNet(nn.Module):
    """Conditional 3D U-Net predicting an annualised stationary velocity field."""

    def __init__(self, settings: NetworkSettings, condition_size: int):
        super().__init__()
        self.settings = settings
        self.condition_size = condition_size
        channels, width = [int(c) for c in settings.channels], settings.condition_width
        self.embed = nn.Sequential(
            nn.Linear(condition_size, width),
            nn.LeakyReLU(0.2),
            nn.Linear(width, width),
            nn.LeakyReLU(0.2),
        )
        self.encoder = nn.ModuleList(
            [ConditionedBlock(settings.input_channels, channels[0], width)]
            + [
                ConditionedBlock(channels[i - 1], channels[i], width, stride=2)
                for i in range(1, len(channels))
            ]
        )
        self.decoder = nn.ModuleList(
            ConditionedBlock(channels[i + 1] + channels[i], channels[i], width)
            for i in range(len(channels) - 2, 0, -1)
        )
        self.head = nn.Conv3d(channels[1], 3, 3, padding=1)
        nn.init.zeros_(self.head.weight)
        nn.init.zeros_(self.head.bias)

    @property
    def multiple(self) -> int:
        """Grid sides are padded to a multiple of this (one halving per level)."""
        return 2 ** (len(self.settings.channels) - 1)

    def forward(self, image: torch.Tensor, condition: torch.Tensor) -> torch.Tensor:
        expected = self.settings.input_channels
        if image.ndim != 5 or image.shape[1] != expected:
            raise ValueError(f"image must be (B, {expected}, D, H, W), got {tuple(image.shape)}")
        if condition.shape != (image.shape[0], self.condition_size):
            raise ValueError(
                f"condition must be ({image.shape[0]}, {self.condition_size}), "
                f"got {tuple(condition.shape)}"
            )
        padding = []
        for side in reversed(image.shape[2:]):  # F.pad lists the last axis first
            padding += [0, (-side) % self.multiple]
        # channels-last (N, D, H, W, C) storage: oneDNN's 3D convolutions run about 3 times
        # faster on a CPU in it (tests/benchmarks/bench_training.py)
        features = F.pad(image, padding).contiguous(memory_format=torch.channels_last_3d)
        embedding = self.embed(condition)
        skips = []
        for block in self.encoder:
            features = block(features, embedding)
            skips.append(features)
        for block, skip in zip(self.decoder, reversed(skips[1:-1]), strict=True):
            features = F.interpolate(features, size=skip.shape[2:], mode="trilinear")
            features = block(torch.cat([features, skip], dim=1), embedding)
        return self.head(features).contiguous()

    def displacement(
        self, velocity: torch.Tensor, years: float | torch.Tensor, shape: tuple[int, int, int]
    ) -> torch.Tensor:
        """Working-grid displacement (B, 3, *shape) of ``exp(years * velocity)``, voxels.

        ``years`` is a number or (B,); negative horizons give the inverse map.
        """
        coarse = exp_velocity(velocity, years, self.settings.integration_steps)
        return upsample_displacement(coarse, tuple(shape), COARSE_FACTOR)

    def displacement_and_half(
        self, velocity: torch.Tensor, years: float | torch.Tensor, shape: tuple[int, int, int]
    ) -> tuple[torch.Tensor, torch.Tensor]:
        """:meth:`displacement` at ``years`` and at ``years / 2`` from one integration
        (the half horizon is the scaling-and-squaring stage before the last)."""
        stages = squarings(velocity, years, self.settings.integration_steps)
        return tuple(
            upsample_displacement(coarse, tuple(shape), COARSE_FACTOR)
            for coarse in (stages[-1], stages[-2])
        )
