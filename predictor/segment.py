"""Tissue segmentation: a three-class Gaussian mixture fitted by EM with spatial priors.

In the scan's native space and resolution: each brain voxel's intensity is
modelled as a mixture of GM, WM and CSF Gaussians whose mixing weights are the
template's tissue maps carried to the scan (with a small floor). Posteriors
stay fractional, so a region's volume is a sum of probabilities (partial volume).
"""

from __future__ import annotations

import numpy as np

from predictor.templates import TISSUES


def fit_mixture(
    intensity: np.ndarray, priors: np.ndarray, iterations: int = 25, floor: float = 0.05
) -> tuple[np.ndarray, dict]:
    """EM for a Gaussian mixture with voxel-wise prior weights.

    Parameters
    ----------
    intensity : (N,) normalised intensities of brain voxels
    priors : (N, 3) template tissue probabilities (GM, WM, CSF) at those voxels

    Returns
    -------
    posteriors : (N, 3) float32, rows sum to 1
    parameters : class means and SDs (normalised intensity units)
    """
    weights = np.clip(priors, 0, None)
    weights = weights / np.maximum(weights.sum(axis=1, keepdims=True), 1e-6)
    weights = (1 - floor) * weights + floor / 3
    posterior = weights.copy()
    for _ in range(iterations):
        total = posterior.sum(axis=0) + 1e-9
        means = (posterior * intensity[:, None]).sum(axis=0) / total
        variances = (posterior * (intensity[:, None] - means) ** 2).sum(axis=0) / total
        sds = np.sqrt(np.maximum(variances, 1e-6))
        log_likelihood = -0.5 * ((intensity[:, None] - means) / sds) ** 2 - np.log(sds)
        log_posterior = np.log(weights) + log_likelihood
        log_posterior -= log_posterior.max(axis=1, keepdims=True)
        posterior = np.exp(log_posterior)
        posterior /= posterior.sum(axis=1, keepdims=True)
    parameters = {f"{tissue}_mean": float(m) for tissue, m in zip(TISSUES, means, strict=True)}
    parameters |= {f"{tissue}_sd": float(s) for tissue, s in zip(TISSUES, sds, strict=True)}
    return posterior.astype(np.float32), parameters
