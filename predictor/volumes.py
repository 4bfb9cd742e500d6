"""Regional volumes from tissue probabilities and region masks (mL and % of brain volume)."""

from __future__ import annotations

import numpy as np

#: reported regions, in report order
REGIONS = (
    "hippocampus_left",
    "hippocampus_right",
    "ventricles",
    "cortical_gm",
    "total_gm",
    "wm",
    "brain",
    "icv",
)


def region_weights(tissue: dict[str, np.ndarray], deep: dict[str, np.ndarray]) -> dict:
    """Voxel-wise share (0-1) of each of :data:`REGIONS` in every voxel.

    ``tissue`` maps GM/WM/CSF to probability arrays (zero outside the brain
    mask); ``deep`` maps each deep region (hippocampi, ventricles) to its
    tissue fraction inside the region mask. All arrays share one grid.
    """
    gm, wm, csf = tissue["GM"], tissue["WM"], tissue["CSF"]
    left, right = deep["hippocampus_left"], deep["hippocampus_right"]
    return {
        "hippocampus_left": left,
        "hippocampus_right": right,
        "ventricles": deep["ventricles"],
        "cortical_gm": gm - left - right,
        "total_gm": gm,
        "wm": wm,
        "brain": gm + wm,
        "icv": gm + wm + csf,
    }


def integrate(
    weights: dict[str, np.ndarray], voxel_ml: float, factor: np.ndarray | None = None
) -> dict[str, float]:
    """Volumes (mL): each region's share summed over voxels, optionally times a voxel factor.

    With ``factor`` the Jacobian determinant of a forward deformation, the
    result is the regions' volumes after the deformation.
    """
    if factor is None:
        return {
            name: float(values.sum(dtype=np.float64)) * voxel_ml for name, values in weights.items()
        }
    return {
        name: float((values * factor).sum(dtype=np.float64)) * voxel_ml
        for name, values in weights.items()
    }


def unmixed_fraction(intensity: np.ndarray, pure: float, other: float) -> np.ndarray:
    """Two-compartment partial volume: share of the tissue of mean ``pure`` in each voxel.

    A voxel of intensity I between the means of two tissues holds the fraction
    (I - other) / (pure - other) of the first, clipped to [0, 1].
    """
    return np.clip((intensity - other) / (pure - other), 0.0, 1.0).astype(np.float32)


def percent_of_brain(volumes: dict[str, float]) -> dict[str, float]:
    """Each region as % of total brain volume (GM + WM)."""
    return {f"{name}_pct_tbv": 100.0 * value / volumes["brain"] for name, value in volumes.items()}
