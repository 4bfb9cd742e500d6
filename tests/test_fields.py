"""Deformation conventions (predictor.fields) against analytic maps, SimpleITK and MONAI."""

from __future__ import annotations

import numpy as np
import pytest
import SimpleITK as sitk
import torch
from scipy import ndimage

from predictor.fields import (
    exp_velocity,
    identity_grid,
    jacobian_determinant,
    region_volume_ratio,
    upsample_displacement,
    warp,
)

SHAPE = (17, 19, 21)  # unequal sides so that axis mix-ups fail


def smooth_field(rng, shape=SHAPE, amplitude=1.5, sigma=3.0) -> torch.Tensor:
    """A random smooth vector field (1, 3, D, H, W), voxels (Gaussian-filtered noise)."""
    noise = rng.normal(size=(3, *shape))
    field = np.stack([ndimage.gaussian_filter(c, sigma, mode="nearest") for c in noise])
    field *= amplitude / np.abs(field).max()
    return torch.tensor(field[None], dtype=torch.float32)


def test_one_voxel_shift_moves_the_image_by_one_voxel(rng):
    image = torch.tensor(rng.normal(size=(1, 1, *SHAPE)), dtype=torch.float32)
    shift = torch.zeros(1, 3, *SHAPE)
    shift[:, 1] = 1.0  # out(x) = in(x + e_1): the content moves one voxel down axis 1
    out = warp(image, shift)
    torch.testing.assert_close(out[0, 0, :, :-1], image[0, 0, :, 1:])
    torch.testing.assert_close(warp(image, torch.zeros(1, 3, *SHAPE)), image)


def test_constant_velocity_gives_that_translation():
    # Analytic: exp(t v) of a constant field v is the translation by t v, border padding
    # keeps it exact up to the edges.
    velocity = torch.zeros(1, 3, *SHAPE)
    velocity[:, 0], velocity[:, 1], velocity[:, 2] = 0.3, -0.7, 1.1
    displacement = exp_velocity(velocity, 2.5)
    expected = velocity * 2.5
    torch.testing.assert_close(displacement, expected, atol=1e-5, rtol=0)


def test_linear_velocity_gives_the_exponential_scaling():
    # Analytic: v(x) = a (x - c) integrates to x -> c + exp(a t) (x - c), so the displacement is
    # (exp(a t) - 1)(x - c). Checked where the trajectory stays inside the grid.
    # In float64: in float32 the rounding error doubles with every squaring step.
    a, years = 0.08, 2.0
    centre = torch.tensor([(n - 1) / 2 for n in SHAPE], dtype=torch.float64).view(1, 3, 1, 1, 1)
    offset = identity_grid(SHAPE, torch.float64) - centre
    displacement = exp_velocity(a * offset, years, steps=10)
    expected = (np.exp(a * years) - 1.0) * offset
    inner = (slice(None), slice(None), slice(5, -5), slice(5, -5), slice(5, -5))
    torch.testing.assert_close(displacement[inner], expected[inner], atol=1e-4, rtol=0)


def test_integrated_random_smooth_velocity_does_not_fold(rng):
    velocity = smooth_field(rng, amplitude=6.0, sigma=2.0)
    # used directly as a displacement, the field folds (det <= 0 somewhere) at this amplitude...
    assert jacobian_determinant(velocity).min() <= 0
    # ...scaling and squaring gives a diffeomorphism
    assert jacobian_determinant(exp_velocity(velocity, 1.0)).min() > 0


def sitk_vector_image(field: np.ndarray, spacing: float) -> sitk.Image:
    """SimpleITK displacement image (mm, x-y-z order) of a field (3, D, H, W) in voxels."""
    components = np.moveaxis(field * spacing, 0, -1)  # (D, H, W, 3): axis k -> component k
    image = sitk.GetImageFromArray(
        np.ascontiguousarray(np.transpose(components, (2, 1, 0, 3)), dtype=np.float64),
        isVector=True,
    )
    image.SetSpacing([spacing] * 3)
    return image


def test_jacobian_matches_simpleitk_filter(rng):
    # SimpleITK's DisplacementFieldJacobianDeterminantFilter (input in mm, x-y-z order);
    # its one-sided border differences differ, so compare one voxel in from the edge.
    field = smooth_field(rng)
    spacing = 3.0
    image = sitk_vector_image(field[0].numpy(), spacing)
    reference = sitk.DisplacementFieldJacobianDeterminant(image)
    expected = np.transpose(sitk.GetArrayFromImage(reference), (2, 1, 0))
    ours = jacobian_determinant(field)[0].numpy()
    inner = (slice(1, -1),) * 3
    assert np.abs(ours[inner] - expected[inner]).max() < 1e-3


def test_warp_matches_simpleitk_displacement_field_transform(rng):
    # SimpleITK resampling through a DisplacementFieldTransform maps an output point p to the
    # input point p + d(p): the same pull-back convention.
    spacing = 2.0
    image = ndimage.gaussian_filter(rng.normal(size=SHAPE), 1.5).astype(np.float32)
    field = smooth_field(rng, amplitude=2.0)
    moving = sitk.GetImageFromArray(np.transpose(image, (2, 1, 0)))
    moving.SetSpacing([spacing] * 3)
    transform = sitk.DisplacementFieldTransform(sitk_vector_image(field[0].numpy(), spacing))
    expected = sitk.Resample(moving, moving, transform, sitk.sitkLinear, 0.0, sitk.sitkFloat32)
    expected = np.transpose(sitk.GetArrayFromImage(expected), (2, 1, 0))
    ours = warp(torch.tensor(image)[None, None], field, padding="zeros")[0, 0].numpy()
    inner = (slice(3, -3),) * 3  # away from where samples leave the grid
    assert np.abs(ours[inner] - expected[inner]).max() < 1e-4


@pytest.mark.filterwarnings("ignore:monai.networks.blocks.Warp")
def test_warp_and_integration_match_monai(rng):
    # MONAI's Warp and DVF2DDF (with border padding) use the same conventions.
    from monai.networks.blocks import DVF2DDF, Warp

    image = torch.tensor(rng.normal(size=(1, 2, *SHAPE)), dtype=torch.float32)
    field = smooth_field(rng)
    torch.testing.assert_close(warp(image, field), Warp(padding_mode="border")(image, field))
    monai_ddf = DVF2DDF(num_steps=7, padding_mode="border")(field)
    torch.testing.assert_close(exp_velocity(field, 1.0), monai_ddf, atol=1e-5, rtol=0)


def test_jacobian_volume_agrees_with_warped_label_volume():
    # A ventricle-like ellipsoid expanding under a smooth radial velocity: the volume from the
    # Jacobian integral of the forward map agrees within 2% with the volume of the label
    # warped (pulled back through the inverse map) to the follow-up.
    shape = (40, 44, 36)
    centre = torch.tensor([(n - 1) / 2 for n in shape]).view(1, 3, 1, 1, 1)
    offset = identity_grid(shape) - centre
    radius = torch.sqrt(((offset / torch.tensor([9.0, 12.0, 7.0]).view(1, 3, 1, 1, 1)) ** 2).sum(1))
    label = torch.sigmoid((1.0 - radius) * 12.0)[:, None]  # soft-edged ellipsoid
    velocity = 0.06 * offset * torch.exp(-((radius / 1.6) ** 2))[:, None]
    years = 3.0
    forward = exp_velocity(velocity, years)
    backward = exp_velocity(velocity, -years)
    jacobian_volume = region_volume_ratio(label, jacobian_determinant(forward)) * label.sum()
    warped_volume = warp(label, backward).sum()
    assert float(jacobian_volume / label.sum()) > 1.15  # a real expansion was tested
    assert float(jacobian_volume[0, 0]) == pytest.approx(float(warped_volume), rel=0.02)


def test_upsampled_displacement_keeps_an_affine_map():
    # An affine displacement sampled on a coarse grid (fine voxel x at coarse voxel x / 2) and
    # upsampled equals the same physical map sampled on the fine grid, in fine voxels.
    coarse_shape, fine_shape = (9, 11, 8), (18, 22, 16)
    matrix = torch.tensor([[0.02, 0.01, 0.0], [0.0, -0.03, 0.01], [0.01, 0.0, 0.04]])
    coarse = torch.einsum("ij,bjxyz->bixyz", matrix, identity_grid(coarse_shape)) + 0.5
    fine = upsample_displacement(coarse, fine_shape)
    expected = 2 * (torch.einsum("ij,bjxyz->bixyz", matrix, identity_grid(fine_shape) / 2) + 0.5)
    inner = (slice(None), slice(None), slice(0, -2), slice(0, -2), slice(0, -2))  # inside coarse
    torch.testing.assert_close(fine[inner], expected[inner], atol=1e-5, rtol=0)


def test_warp_rejects_mismatched_shapes():
    with pytest.raises(ValueError, match=r"\(B, 3, D, H, W\)"):
        warp(torch.zeros(1, 1, 4, 4, 4), torch.zeros(1, 2, 4, 4, 4))
    with pytest.raises(ValueError, match="grid"):
        warp(torch.zeros(1, 1, 4, 4, 4), torch.zeros(1, 3, 4, 4, 5))
