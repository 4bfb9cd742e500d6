"""Regional volumes from tissue probabilities and region masks (mL and % of brain volume)."""

from __future__ import annotations

import numpy as np

from predictor.regions import TOTAL_BRAIN, RegionSet


def region_volumes(
    tissue: dict[str, np.ndarray],
    deep: dict[str, np.ndarray],
    voxel_ml: float,
    regions: RegionSet,
    factor: np.ndarray | None = None,
) -> dict[str, float]:
    """Volumes (mL) of every region of ``regions``, optionally weighted voxel by voxel.

    ``tissue`` maps GM/WM/CSF to probability arrays (zero outside the brain
    mask); ``deep`` maps each deep region to its tissue fraction inside the
    region mask; all on one grid. With ``factor`` the Jacobian determinant of a
    forward deformation, the result is the regions' volumes after it. Volumes
    are linear in the maps, so every region is a weighted sum of these
    integrals (:meth:`~predictor.regions.RegionSet.volumes`).
    """

    def total(values):
        product = values if factor is None else values * factor
        return float(product.sum(dtype=np.float64)) * voxel_ml

    integrals = {name: total(values) for name, values in (*tissue.items(), *deep.items())}
    return regions.volumes(integrals)


def unmixed_fraction(intensity: np.ndarray, pure: float, other: float) -> np.ndarray:
    """Two-compartment partial volume: share of the tissue of mean ``pure`` in each voxel.

    A voxel of intensity I between the means of two tissues holds the fraction
    (I - other) / (pure - other) of the first, clipped to [0, 1].
    """
    return np.clip((intensity - other) / (pure - other), 0.0, 1.0).astype(np.float32)


def percent_of_brain(volumes: dict[str, float]) -> dict[str, float]:
    """Each region as % of total brain volume (the region ``brain``: GM + WM)."""
    brain = volumes[TOTAL_BRAIN]
    return {f"{name}_pct_tbv": 100.0 * value / brain for name, value in volumes.items()}
