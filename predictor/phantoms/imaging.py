"""Image formation for phantoms: pose, partial volume, T1 contrast, bias field, Rician noise.

A scan is rendered on a scanner grid (RAS, isotropic voxels, centred on the
scanner origin). The head sits at a rigid pose: scanner point ``w`` shows
the anatomy at ``R.T @ (w - t)``. Each voxel's intensity is the mean over
``s**3`` sub-voxel samples (partial volume); the label map takes the label at
the voxel centre.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage
from scipy.spatial.transform import Rotation

from predictor.phantoms.anatomy import Anatomy, Progression
from predictor.phantoms.scenario import Size

CHUNK_POINTS = 1 << 20
BIAS_TERMS = 9  # monomials of degree 1 and 2 in x, y, z


@dataclass(frozen=True)
class Pose:
    """Rigid placement of the head in the scanner: rotation (3, 3) and translation (mm)."""

    rotation: np.ndarray
    translation: np.ndarray

    @classmethod
    def draw(cls, rng: np.random.Generator, max_degrees: float, max_mm: float) -> Pose:
        angles = rng.uniform(-max_degrees, max_degrees, 3)
        return cls(
            Rotation.from_euler("xyz", angles, degrees=True).as_matrix(),
            rng.uniform(-max_mm, max_mm, 3),
        )

    @classmethod
    def identity(cls) -> Pose:
        return cls(np.eye(3), np.zeros(3))

    def to_anatomy(self, scanner_points: np.ndarray) -> np.ndarray:
        return (scanner_points - self.translation) @ self.rotation


def scanner_grid(size: Size) -> tuple[np.ndarray, tuple[int, int, int]]:
    """RAS voxel-to-scanner affine (mm) and shape of a centred isotropic grid."""
    shape = size.shape
    affine = np.diag([size.voxel_mm] * 3 + [1.0])
    affine[:3, 3] = -(np.array(shape) - 1) / 2.0 * size.voxel_mm
    return affine, shape


def scanner_points(size: Size) -> np.ndarray:
    """Scanner coordinates (N, 3) mm of every voxel centre of the grid, C order."""
    affine, shape = scanner_grid(size)
    index = np.indices(shape).reshape(3, -1).T.astype(float)
    return index @ affine[:3, :3].T + affine[:3, 3]


def tissue_intensities(imaging: dict) -> np.ndarray:
    """Relative T1 intensity of each label value (see anatomy.LABELS), shape (10,)."""
    csf, gm, wm = imaging["csf"], imaging["gm"], imaging["wm"]
    return np.array([0.0, csf, gm, wm, gm, gm, csf, csf, imaging["skull"], imaging["scalp"]])


def bias_field(points_mm: np.ndarray, coefficients: np.ndarray) -> np.ndarray:
    """Smooth multiplicative field exp(sum of products of powers <= 2 of x/100 mm), (N,)."""
    scaled = points_mm / 100.0
    powers = [(i, j, k) for i in range(3) for j in range(3) for k in range(3) if 0 < i + j + k <= 2]
    log_field = np.zeros(len(points_mm))
    for coefficient, (i, j, k) in zip(coefficients, powers, strict=True):
        log_field += coefficient * scaled[:, 0] ** i * scaled[:, 1] ** j * scaled[:, 2] ** k
    return np.exp(log_field)


def sample(anatomy: Anatomy, progression: Progression | None, points: np.ndarray) -> np.ndarray:
    """Labels at anatomical follow-up points (N, 3) mm; ``progression=None`` is the baseline."""
    if progression is None:
        return anatomy.labels(points)
    return progression.labels(points)


def render(
    anatomy: Anatomy,
    progression: Progression | None,
    size: Size,
    pose: Pose,
    supersample: int,
    intensities: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Noise-free partial-volume image, centre labels and label fractions on the scanner grid.

    Sub-voxel samples are taken only where a voxel's 3x3x3 neighbourhood holds
    more than one centre label; elsewhere the voxel is pure.

    Returns
    -------
    image : float32 (X, Y, Z), relative intensity (white matter = 1)
    labels : uint8 (X, Y, Z), label at each voxel centre
    fractions : float32 (X, Y, Z, L), share of each label value among the samples
    """
    shape = size.shape
    centres = scanner_points(size)
    labels = np.empty(len(centres), dtype=np.uint8)
    for start in range(0, len(centres), CHUNK_POINTS):
        block = centres[start : start + CHUNK_POINTS]
        labels[start : start + len(block)] = sample(anatomy, progression, pose.to_anatomy(block))
    volume = labels.reshape(shape)
    mixed = np.flatnonzero(
        ndimage.maximum_filter(volume, size=3) != ndimage.minimum_filter(volume, size=3)
    )
    fractions = np.zeros((len(centres), len(intensities)), dtype=np.float32)
    fractions[np.arange(len(centres)), labels] = 1.0
    steps = (np.arange(supersample) + 0.5) / supersample - 0.5
    offsets = np.stack(np.meshgrid(steps, steps, steps, indexing="ij"), -1).reshape(-1, 3)
    offsets = offsets * size.voxel_mm
    per_chunk = max(1, CHUNK_POINTS // len(offsets))
    for start in range(0, len(mixed), per_chunk):
        chosen = mixed[start : start + per_chunk]
        points = (centres[chosen][:, None, :] + offsets[None, :, :]).reshape(-1, 3)
        sub = sample(anatomy, progression, pose.to_anatomy(points)).reshape(len(chosen), -1)
        flat = (np.arange(len(chosen))[:, None] * len(intensities) + sub).ravel()
        counts = np.bincount(flat, minlength=len(chosen) * len(intensities))
        fractions[chosen] = counts.reshape(len(chosen), -1) / len(offsets)
    image = fractions @ intensities.astype(np.float32)
    return (
        image.reshape(shape),
        volume,
        fractions.reshape(shape + (len(intensities),)),
    )


def acquire(
    clean: np.ndarray,
    size: Size,
    imaging: dict,
    rng: np.random.Generator,
) -> tuple[np.ndarray, dict]:
    """Scanner output from a clean image: gain, bias field and Rician noise; int16 (X, Y, Z).

    Rician noise is the magnitude of the signal plus complex Gaussian noise
    (Gudbjartsson and Patz 1995, Magnetic Resonance in Medicine).
    Returns the image and the drawn parameters.
    """
    shape = size.shape
    gain = float(rng.normal(1.0, imaging["gain_sd"]))
    coefficients = rng.normal(0.0, imaging["bias_sd"], BIAS_TERMS)
    field = bias_field(scanner_points(size), coefficients).reshape(shape)
    signal = clean * field * gain * imaging["scale"]
    sigma = imaging["noise_fraction"] * imaging["scale"]
    real = signal + rng.normal(0.0, sigma, shape)
    imaginary = rng.normal(0.0, sigma, shape)
    magnitude = np.sqrt(real**2 + imaginary**2)
    image = np.clip(np.rint(magnitude), 0, np.iinfo(np.int16).max).astype(np.int16)
    return image, {"gain": gain, "bias_coefficients": coefficients.tolist(), "noise_sd": sigma}
