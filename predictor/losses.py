"""Training losses of the velocity-field network (weights in ``configs/train*.toml``).

* similarity of the warped baseline with the real follow-up inside the brain
  (mean squared error, or local normalised cross-correlation);
* smoothness of the velocity (mean squared finite differences, the diffusion
  regulariser);
* monotone: brain tissue may not grow and ventricles may not shrink, voxel by
  voxel (hinge on the log-Jacobian) and region by region between two
  horizons of the same baseline (hinge on the volume change between them);
* regional prior: each region's forecast volume ratio (Jacobian integral over
  the baseline region) against the regression prior's mean, in units of the
  prior's predictive standard deviation (a squared z-score);
* measured change: the network's log-Jacobian at the pair's horizon against
  the pair's measured one (a demons registration of the two visits in their
  within-subject space, :mod:`predictor.within_subject`), mean squared
  difference inside the brain, over the pairs that have one.

All tensors follow :mod:`predictor.fields`; region weights are (B, R, D, H, W)
fractions on the working grid.
"""

from __future__ import annotations

from dataclasses import dataclass

import torch
import torch.nn.functional as F

SIMILARITIES = ("mse", "lncc")


@dataclass(frozen=True)
class LossSettings:
    """Loss choices and weights (``[loss]`` of ``configs/train.toml``)."""

    similarity: str  # 'mse' or 'lncc'
    lncc_window: int  # voxels, odd
    similarity_weight: float
    smoothness_weight: float
    monotone_weight: float
    prior_weight: float
    jacobian_weight: float  # the measured log-Jacobian term
    # the similarity weight rises linearly to its full value over this many epochs
    similarity_warmup_epochs: int
    # the monotone ordering is checked between the pair's horizon and this fraction of it
    earlier_horizon_fraction: float

    def __post_init__(self):
        if self.similarity not in SIMILARITIES:
            raise ValueError(
                f"similarity must be one of {list(SIMILARITIES)}; '{self.similarity}' was given"
            )
        if self.lncc_window < 3 or self.lncc_window % 2 == 0:
            raise ValueError(f"lncc_window must be odd and >= 3, got {self.lncc_window}")
        weights = (
            self.similarity_weight,
            self.smoothness_weight,
            self.monotone_weight,
            self.prior_weight,
            self.jacobian_weight,
        )
        if any(w < 0 for w in weights):
            raise ValueError("loss weights must be >= 0")
        if not 0.0 < self.earlier_horizon_fraction < 1.0:
            raise ValueError("earlier_horizon_fraction must be within (0, 1)")

    def weights(self, epoch: int) -> dict[str, float]:
        """Weight of each term at ``epoch`` (0-based), with the similarity warm-up applied."""
        ramp = min(1.0, (epoch + 1) / (self.similarity_warmup_epochs + 1))
        return {
            "similarity": self.similarity_weight * ramp,
            "smoothness": self.smoothness_weight,
            "monotone": self.monotone_weight,
            "prior": self.prior_weight,
            "jacobian": self.jacobian_weight,
        }


def masked_mse(warped: torch.Tensor, target: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """Mean squared difference of (B, 1, D, H, W) images over a (B, 1, D, H, W) weight mask."""
    return ((warped - target) ** 2 * mask).sum() / mask.sum().clamp(min=1.0)


def masked_lncc(
    warped: torch.Tensor, target: torch.Tensor, mask: torch.Tensor, window: int
) -> torch.Tensor:
    """1 - mean squared local normalised cross-correlation in ``window``^3 boxes, over a mask."""

    def local_mean(x):
        return F.avg_pool3d(x, window, stride=1, padding=window // 2, count_include_pad=False)

    mean_a, mean_b = local_mean(warped), local_mean(target)
    cross = local_mean(warped * target) - mean_a * mean_b
    var_a = (local_mean(warped * warped) - mean_a**2).clamp(min=0)
    var_b = (local_mean(target * target) - mean_b**2).clamp(min=0)
    correlation = cross**2 / (var_a * var_b + 1e-5)
    return 1.0 - (correlation * mask).sum() / mask.sum().clamp(min=1.0)


def similarity(warped, target, mask, settings: LossSettings) -> torch.Tensor:
    """The configured similarity loss (lower is better)."""
    if settings.similarity == "lncc":
        return masked_lncc(warped, target, mask, settings.lncc_window)
    return masked_mse(warped, target, mask)


def smoothness(velocity: torch.Tensor) -> torch.Tensor:
    """Mean squared forward difference of a (B, 3, d, h, w) field along each axis."""
    terms = [torch.diff(velocity, dim=axis).pow(2).mean() for axis in (2, 3, 4)]
    return sum(terms) / 3.0


def monotone_voxels(
    log_jacobian: torch.Tensor, tissue: torch.Tensor, ventricles: torch.Tensor
) -> torch.Tensor:
    """Hinge on growing tissue and shrinking ventricles, voxel by voxel.

    ``log_jacobian`` (B, D, H, W) of the forward map; ``tissue`` and
    ``ventricles`` (B, D, H, W) fractional weights. Returns the weighted mean
    of ``relu(log J)`` in tissue plus that of ``relu(-log J)`` in ventricles.
    """
    grow = (F.relu(log_jacobian) * tissue).sum() / tissue.sum().clamp(min=1.0)
    shrink = (F.relu(-log_jacobian) * ventricles).sum() / ventricles.sum().clamp(min=1.0)
    return grow + shrink


def monotone_regions(
    earlier: torch.Tensor, later: torch.Tensor, direction: torch.Tensor
) -> torch.Tensor:
    """Hinge on region volume ratios (B, R) that move the wrong way between two horizons.

    ``direction`` (R,) is -1 for regions that may only shrink and +1 for
    those that may only grow; ``later`` belongs to the longer horizon.
    """
    return F.relu(-direction * (later - earlier)).sum(dim=1).mean()


def prior_z2(
    ratio: torch.Tensor, prior_ratio: torch.Tensor, prior_sd_ratio: torch.Tensor
) -> torch.Tensor:
    """Mean squared z-score of forecast volume ratios (B, R) against the prior's (B, R)."""
    return (((ratio - prior_ratio) / prior_sd_ratio.clamp(min=1e-4)) ** 2).mean()


def log_jacobian_match(
    predicted: torch.Tensor, measured: torch.Tensor, mask: torch.Tensor, present: torch.Tensor
) -> torch.Tensor:
    """Mean squared difference of log-Jacobians (B, D, H, W) inside ``mask`` (B, D, H, W),
    averaged over the pairs with a measured map (``present`` (B,) 1, else 0)."""
    inside = mask.sum(dim=(1, 2, 3)).clamp(min=1.0)
    per_pair = ((predicted - measured) ** 2 * mask).sum(dim=(1, 2, 3)) / inside
    return (per_pair * present).sum() / present.sum().clamp(min=1.0)
