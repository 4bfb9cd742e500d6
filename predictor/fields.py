"""Deformation conventions, written once: warping, scaling and squaring, Jacobians.

Conventions (every stage uses these):

* Images on the working grid are tensors ``(B, C, D, H, W)``; array axis
  ``k`` of ``(D, H, W)`` is spatial axis ``k`` (RAS voxel order on the grid).
* A displacement field ``u`` is ``(B, 3, D, H, W)`` in voxels, channel ``k``
  along array axis ``k``. Warping *pulls back*: ``out(x) = in(x + u(x))``
  (the convention of MONAI's ``Warp`` and of SimpleITK's resampling through a
  ``DisplacementFieldTransform``).
* The network predicts a stationary velocity field ``v`` (same layout, voxels
  per year) that moves *tissue forward*: a baseline point ``y`` is at
  ``exp(t v)(y)`` after ``t`` years. Hence

  - the forecast image at horizon ``t`` is the baseline pulled back through
    ``exp(-t v)``: ``forecast(x) = baseline(x + u_back(x))`` with
    ``u_back = displacement of exp(-t v)``;
  - a baseline region ``R`` occupies ``sum_{y in R} det D exp(t v)(y)``
    voxels at horizon ``t``: the Jacobian determinant of the *forward* map,
    evaluated on the baseline grid, is the local volume ratio
    (follow-up / baseline), and its logarithm is the log-Jacobian atrophy map
    (negative where tissue shrinks).

* ``exp`` is integrated by scaling and squaring (Arsigny et al. 2006, MICCAI):
  ``u = t v / 2**N``, then ``N`` times ``u <- u + u o (id + u)``. Values
  outside the grid are taken from its border (zero padding would pull the
  field towards zero at the edges).
"""

from __future__ import annotations

import functools

import torch
import torch.nn.functional as F


def identity_grid(shape: tuple[int, int, int], dtype=torch.float32) -> torch.Tensor:
    """Voxel coordinates of a grid, ``(1, 3, D, H, W)``."""
    axes = [torch.arange(n, dtype=dtype) for n in shape]
    return torch.stack(torch.meshgrid(*axes, indexing="ij"), dim=0)[None]


def warp(
    image: torch.Tensor,
    displacement: torch.Tensor,
    mode: str = "bilinear",
    padding: str = "border",
) -> torch.Tensor:
    """Pull ``image`` (B, C, D, H, W) back through ``displacement`` (B, 3, D, H, W) in voxels.

    ``out(x) = image(x + displacement(x))`` with trilinear interpolation
    (``mode='bilinear'``, PyTorch's name for it in 3D) or ``'nearest'``.
    """
    if displacement.ndim != 5 or displacement.shape[1] != 3:
        raise ValueError(f"displacement must be (B, 3, D, H, W), got {tuple(displacement.shape)}")
    if image.shape[2:] != displacement.shape[2:]:
        raise ValueError(
            f"image grid {tuple(image.shape[2:])} != displacement grid "
            f"{tuple(displacement.shape[2:])}"
        )
    location = _warp_grid(tuple(displacement.shape[2:]), displacement.dtype) + displacement
    return sample_at(image, location, mode, padding)


@functools.lru_cache(maxsize=8)
def _warp_grid(shape: tuple[int, int, int], dtype) -> torch.Tensor:
    """:func:`identity_grid`, kept for the few grids that warps run on again and again
    (scaling and squaring): shared, never to be modified in place."""
    return identity_grid(shape, dtype)


def compose(first: torch.Tensor, second: torch.Tensor) -> torch.Tensor:
    """Displacement of ``x -> first(second(x))``: ``u2(x) + u1(x + u2(x))``, voxels."""
    return second + warp(first, second)


def exp_velocity(velocity: torch.Tensor, years: float | torch.Tensor, steps: int = 7):
    """Displacement (B, 3, D, H, W) of ``exp(years * velocity)`` by scaling and squaring.

    ``years`` is a number or a tensor of shape (B,) (one horizon per sample);
    negative horizons give the inverse map.
    """
    return squarings(velocity, years, steps)[-1]


def squarings(velocity: torch.Tensor, years: float | torch.Tensor, steps: int = 7) -> list:
    """Every stage of :func:`exp_velocity`: the displacements of ``exp(years * velocity /
    2**k)`` for k = steps, ..., 1, 0 (the last is the full horizon, the one before it the
    half horizon, integrated with one squaring fewer)."""
    if isinstance(years, torch.Tensor):
        scale = years.to(velocity.dtype).view(-1, 1, 1, 1, 1)
    else:
        scale = float(years)
    stages = [velocity * scale / (2**steps)]
    for _ in range(steps):
        stages.append(compose(stages[-1], stages[-1]))
    return stages


def jacobian_determinant(displacement: torch.Tensor) -> torch.Tensor:
    """det(I + grad u) of a displacement (B, 3, D, H, W) in voxels; returns (B, D, H, W).

    Derivatives by central differences (one-sided at the border), as
    ``numpy.gradient``; isotropic voxels are assumed (the working grid is).
    """
    rows = []
    for k in range(3):
        gradients = torch.gradient(displacement[:, k], dim=(1, 2, 3))
        rows.append([g + (1.0 if j == k else 0.0) for j, g in enumerate(gradients)])
    (a, b, c), (d, e, f), (g, h, i) = rows
    return a * (e * i - f * h) - b * (d * i - f * g) + c * (d * h - e * g)


def log_jacobian(displacement: torch.Tensor, floor: float = 1e-3) -> torch.Tensor:
    """log det(I + grad u), (B, D, H, W); determinants below ``floor`` are clamped to it."""
    return torch.log(torch.clamp(jacobian_determinant(displacement), min=floor))


def region_volume_ratio(weights: torch.Tensor, determinant: torch.Tensor) -> torch.Tensor:
    """Follow-up / baseline volume of regions: ``sum(w det) / sum(w)``.

    ``weights`` (B, R, D, H, W) are fractional region memberships on the
    baseline grid, ``determinant`` (B, D, H, W) that of the forward map;
    returns (B, R).
    """
    total = weights.sum(dim=(2, 3, 4)).clamp(min=1e-6)
    return torch.einsum("brxyz,bxyz->br", weights, determinant) / total


def sample_at(image, location, mode="bilinear", padding="border") -> torch.Tensor:
    """Samples of ``image`` (B, C, D, H, W) at voxel coordinates ``location`` (B, 3, d, h, w).

    Trilinear (``mode='bilinear'``) or nearest; outside the grid the border
    value (``padding='border'``) or zero (``'zeros'``). Returns (B, C, d, h, w).
    """
    # grid_sample wants (x, y, z) = (W, H, D) order, normalised to [-1, 1] (align_corners=True)
    scale = torch.tensor([max(n - 1, 1) for n in image.shape[2:]], dtype=location.dtype)
    normalised = 2.0 * location / scale.view(1, 3, 1, 1, 1) - 1.0
    grid = normalised.permute(0, 2, 3, 4, 1).flip(-1)
    return F.grid_sample(image, grid, mode=mode, padding_mode=padding, align_corners=True)


def upsample_displacement(
    displacement: torch.Tensor, shape: tuple[int, int, int], factor: int = 2
) -> torch.Tensor:
    """A displacement on a grid ``factor`` times coarser, on the fine grid of ``shape``.

    Fine voxel ``x`` lies at coarse voxel ``x / factor`` (the grid of a
    stride-``factor`` convolution), and one coarse voxel is ``factor`` fine
    voxels; beyond the last coarse voxel the border value holds. Input
    (B, 3, d, h, w), output (B, 3, *shape), both in their own voxels.

    Separable trilinear interpolation (``F.interpolate``, ``align_corners=True``) onto
    ``factor * (n - 1) + 1`` voxels puts fine voxel ``x`` at exactly ``x / factor``;
    the result is cropped, or border-padded, to ``shape``. It equals sampling at
    ``x / factor`` (:func:`sample_at`) at a fraction of the cost.
    """
    exact = [factor * (n - 1) + 1 for n in displacement.shape[2:]]
    fine = F.interpolate(displacement, size=exact, mode="trilinear", align_corners=True)
    fine = fine[:, :, : shape[0], : shape[1], : shape[2]]
    padding = []
    for have, want in zip(reversed(fine.shape[2:]), reversed(shape), strict=True):
        padding += [0, want - have]  # F.pad lists the last axis first
    if any(padding):
        fine = F.pad(fine, padding, mode="replicate")
    return factor * fine
