"""Tissue segmentation: a three-class Gaussian mixture fitted by EM with spatial priors.

In the scan's native space and resolution: each brain voxel's intensity is
modelled as a mixture of GM, WM and CSF Gaussians whose mixing weights are the
template's tissue maps carried to the scan (with a small floor). Posteriors
stay fractional, so a region's volume is a sum of probabilities (partial volume).

After EM on the three pure classes, a final step adds two mixed classes
(CSF/GM and GM/WM boundary voxels): a mixed voxel's intensity is modelled as
a uniform blend of its two tissues plus noise, and its share of each tissue is
read from where its intensity lies between the two means. Without them the
broad CSF class swallows dark grey-matter boundary voxels.
"""

from __future__ import annotations

import numpy as np

from predictor.regions import TISSUES


def fit_mixture(
    intensity: np.ndarray,
    priors: np.ndarray,
    iterations: int = 25,
    floor: float = 0.05,
    csf_core: float = 0.0,
) -> tuple[np.ndarray, dict]:
    """EM for a Gaussian mixture with voxel-wise prior weights.

    Parameters
    ----------
    intensity : (N,) normalised intensities of brain voxels
    priors : (N, 3) template tissue probabilities (GM, WM, CSF) at those voxels
    csf_core : when > 0, the CSF mean is held at the median intensity of the
        voxels whose CSF prior exceeds it (pure CSF, e.g. the ventricles):
        estimated freely, the CSF class drifts towards the CSF/GM
        partial-volume voxels of the sulci, and their grey matter is lost

    The class means and SDs are estimated on every k-th voxel, k chosen so that
    at most :data:`FIT_VOXELS` take part (their sampling error is then far
    below a percent); the fractions are computed for every voxel.

    Returns
    -------
    posteriors : (N, 3) float32, rows sum to 1
    parameters : class means and SDs (normalised intensity units)
    """
    weights = np.clip(priors, 0, None)
    weights = weights / np.maximum(weights.sum(axis=1, keepdims=True), 1e-6)
    weights = (1 - floor) * weights + floor / 3
    all_intensity, all_weights = intensity, weights
    stride = max(1, int(np.ceil(len(intensity) / FIT_VOXELS)))
    intensity, weights, priors = intensity[::stride], weights[::stride], priors[::stride]
    posterior = weights.copy()
    # A uniform outlier class (weight OUTLIER_WEIGHT over the intensity range) absorbs voxels
    # that fit no tissue (e.g. skull left in the mask), so that no class's SD can widen to
    # swallow its neighbours while the parameters are estimated.
    outlier = OUTLIER_WEIGHT / max(float(np.ptp(intensity)), 1e-6)
    core = priors[:, 2] > csf_core if csf_core > 0 else np.zeros(len(intensity), bool)
    pure_csf = float(np.median(intensity[core])) if core.sum() >= MIN_CORE_VOXELS else None
    for _ in range(iterations):
        total = posterior.sum(axis=0) + 1e-9
        means = (posterior * intensity[:, None]).sum(axis=0) / total
        if pure_csf is not None:
            means[2] = pure_csf
        variances = (posterior * (intensity[:, None] - means) ** 2).sum(axis=0) / total
        sds = np.sqrt(np.maximum(variances, 1e-6))
        joint = (
            (1 - OUTLIER_WEIGHT)
            * weights
            * np.stack([_gaussian(intensity, means[k], sds[k]) for k in range(3)], axis=1)
        )
        posterior = joint / (joint.sum(axis=1, keepdims=True) + outlier)
    fractions = _with_mixed_classes(all_intensity, all_weights, means, sds)
    parameters = {f"{tissue}_mean": float(m) for tissue, m in zip(TISSUES, means, strict=True)}
    parameters |= {f"{tissue}_sd": float(s) for tissue, s in zip(TISSUES, sds, strict=True)}
    return fractions.astype(np.float32), parameters


#: prior weight of the uniform outlier class used while fitting
OUTLIER_WEIGHT = 0.02
#: at most this many voxels take part in estimating the class means and SDs
FIT_VOXELS = 250_000
#: fewer pure-CSF voxels than this leave the CSF mean free
MIN_CORE_VOXELS = 100
#: mixed classes as (index of the darker tissue, index of the brighter one) in TISSUES order
MIXED = ((2, 0), (0, 1))  # CSF/GM, GM/WM


def _with_mixed_classes(intensity, weights, means, sds) -> np.ndarray:
    """Tissue fractions (N, 3) from pure and mixed-class posteriors (see the module docstring)."""
    columns, likelihoods = [weights[:, k] for k in range(3)], []
    for k in range(3):
        likelihoods.append(_gaussian(intensity, means[k], sds[k]))
    for dark, bright in MIXED:
        columns.append(np.sqrt(weights[:, dark] * weights[:, bright]))
        spread = (sds[dark] ** 2 + sds[bright] ** 2) / 2 + (means[bright] - means[dark]) ** 2 / 12
        likelihoods.append(_gaussian(intensity, (means[dark] + means[bright]) / 2, np.sqrt(spread)))
    joint = np.stack(columns, axis=1) * np.stack(likelihoods, axis=1)
    joint /= np.maximum(joint.sum(axis=1, keepdims=True), 1e-30)
    fractions = joint[:, :3].copy()
    for column, (dark, bright) in enumerate(MIXED, start=3):
        share = np.clip((intensity - means[dark]) / (means[bright] - means[dark]), 0.0, 1.0)
        fractions[:, bright] += joint[:, column] * share
        fractions[:, dark] += joint[:, column] * (1.0 - share)
    return fractions


def _gaussian(x, mean, sd):
    return np.exp(-0.5 * ((x - mean) / sd) ** 2) / (sd * np.sqrt(2 * np.pi))
