"""Conversions between (RAS array, affine) pairs and SimpleITK images, and affine helpers.

nibabel affines map voxel indices to RAS world millimetres; SimpleITK images
live in LPS world millimetres with the array stored z-y-x. Everything else
in the project uses RAS, so only this module knows about LPS.
"""

from __future__ import annotations

import numpy as np
import SimpleITK as sitk

RAS_TO_LPS = np.diag([-1.0, -1.0, 1.0, 1.0])


def to_sitk(array: np.ndarray, affine: np.ndarray) -> sitk.Image:
    """SimpleITK image of a 3D array (i, j, k) with a voxel-to-RAS affine (mm)."""
    image = sitk.GetImageFromArray(np.ascontiguousarray(np.transpose(array, (2, 1, 0))))
    lps = RAS_TO_LPS @ affine
    spacing = np.sqrt((lps[:3, :3] ** 2).sum(axis=0))
    image.SetSpacing(spacing.tolist())
    image.SetOrigin(lps[:3, 3].tolist())
    image.SetDirection((lps[:3, :3] / spacing).ravel().tolist())
    return image


def from_sitk(image: sitk.Image) -> tuple[np.ndarray, np.ndarray]:
    """Array (i, j, k) and voxel-to-RAS affine (mm) of a SimpleITK image."""
    array = np.transpose(sitk.GetArrayFromImage(image), (2, 1, 0))
    lps = np.eye(4)
    lps[:3, :3] = np.asarray(image.GetDirection()).reshape(3, 3) * np.asarray(image.GetSpacing())
    lps[:3, 3] = image.GetOrigin()
    return array, RAS_TO_LPS @ lps


def affine_to_matrix(transform: sitk.Transform) -> np.ndarray:
    """4x4 RAS matrix of an affine SimpleITK transform (fixed/template point -> moving point)."""
    # Probe the transform at four points to read off its matrix in LPS, whatever its type.
    points = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], dtype=float)
    mapped = np.array([transform.TransformPoint(p.tolist()) for p in points])
    lps = np.eye(4)
    lps[:3, 3] = mapped[0]
    lps[:3, :3] = (mapped[1:] - mapped[0]).T
    return RAS_TO_LPS @ lps @ RAS_TO_LPS


def matrix_to_transform(matrix: np.ndarray) -> sitk.AffineTransform:
    """SimpleITK affine transform of a 4x4 RAS point-mapping matrix."""
    lps = RAS_TO_LPS @ matrix @ RAS_TO_LPS
    transform = sitk.AffineTransform(3)
    transform.SetMatrix(lps[:3, :3].ravel().tolist())
    transform.SetTranslation(lps[:3, 3].tolist())
    return transform


def grid_affine(bounds_min: np.ndarray, bounds_max: np.ndarray, spacing_mm: float):
    """RAS affine and shape of an isotropic grid covering a box (mm)."""
    shape = tuple(
        int(np.ceil((hi - lo) / spacing_mm)) for lo, hi in zip(bounds_min, bounds_max, strict=True)
    )
    affine = np.diag([spacing_mm] * 3 + [1.0])
    affine[:3, 3] = np.asarray(bounds_min) + spacing_mm / 2
    return affine, shape
