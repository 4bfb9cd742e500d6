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
    deep: dict[str, np.ndarray],
    voxel_ml: float,
    factor: np.ndarray | None = None,
) -> dict[str, float]:
    """Volumes (mL) of :data:`REGIONS`, optionally weighted voxel by voxel by ``factor``.

    ``tissue`` maps GM/WM/CSF to probability arrays (zero outside the brain
    mask); ``deep`` maps each deep region (hippocampi, ventricles) to its
    tissue fraction inside the region mask; all on one grid. With ``factor``
    the Jacobian determinant of a forward deformation, the result is the
    regions' volumes after it (``factor - 1`` gives the change). Volumes are
    linear in the maps, so the derived regions (cortical GM, brain, ICV) are
    sums and differences of six integrals.
    """

    def total(values):
        product = values if factor is None else values * factor
        return float(product.sum(dtype=np.float64)) * voxel_ml

    gm, wm, csf = (total(tissue[name]) for name in ("GM", "WM", "CSF"))
    left, right, ventricles = (
        total(deep[name]) for name in ("hippocampus_left", "hippocampus_right", "ventricles")
    )
    return {
        "hippocampus_left": left,
        "hippocampus_right": right,
        "ventricles": ventricles,
        "cortical_gm": gm - left - right,
        "total_gm": gm,
        "wm": wm,
        "brain": gm + wm,
        "icv": gm + wm + csf,
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
