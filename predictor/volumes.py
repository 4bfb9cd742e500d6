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


def region_volumes(
    tissue: dict[str, np.ndarray],
    region_masks: dict[str, tuple[np.ndarray, np.ndarray]],
    voxel_ml: float,
) -> dict[str, float]:
    """Volumes (mL) of :data:`REGIONS`.

    ``tissue`` maps GM/WM/CSF to probability arrays (zero outside the brain
    mask); ``region_masks`` maps each deep region to (content, weight): the
    voxel-wise fraction of the region's tissue and the region mask in [0, 1],
    both on the same grid.
    """
    total = {name: float(values.sum()) * voxel_ml for name, values in tissue.items()}
    deep = {
        name: float((content * weight).sum()) * voxel_ml
        for name, (content, weight) in region_masks.items()
    }
    return {
        "hippocampus_left": deep["hippocampus_left"],
        "hippocampus_right": deep["hippocampus_right"],
        "ventricles": deep["ventricles"],
        "cortical_gm": total["GM"] - deep["hippocampus_left"] - deep["hippocampus_right"],
        "total_gm": total["GM"],
        "wm": total["WM"],
        "brain": total["GM"] + total["WM"],
        "icv": total["GM"] + total["WM"] + total["CSF"],
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
