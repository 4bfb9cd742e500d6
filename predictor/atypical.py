"""Out-of-range anatomy: how far a scan's regional volumes lie from the training
participants' baselines.

Each baseline is described by the log of every region's volume over the head
size (the first reference region, the intracranial volume), so that head size
itself does not count. The training participants' vectors are standardised
(mean and SD per region) and their correlation shrunk by Ledoit and Wolf's
(2004) estimator (scikit-learn's ``LedoitWolf`` on the standardised vectors),
which stays invertible with fewer participants than a well-estimated full
covariance needs and shrinks towards independent regions, not towards one
common variance. A scan's Mahalanobis distance from them
is compared with a threshold calibrated on the training participants: the
largest of their leave-one-out distances (each participant's scans measured
against the mean and covariance of the others'), which a new participant
exchangeable with them exceeds with probability about 1 / (n + 1). Every visit
of a training participant counts, since the network saw each as an input.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pandas as pd

from predictor.regions import RegionSet

#: fewer training participants than this give no reference (and no warning)
MIN_PARTICIPANTS = 10
#: volumes (mL) are floored here before the log, so an empty region is far, not infinite
FLOOR_ML = 1e-3
#: SD (log units) of a region that never varied in training: any difference is far
FLOOR_SD = 1e-6


def features(volumes: pd.DataFrame, names, head_size: str | None) -> np.ndarray:
    """(P, R) log of each region's volume over the head size (mL over mL)."""
    table = np.maximum(volumes[list(names)].to_numpy(float), FLOOR_ML)
    divisor = np.maximum(volumes[head_size].to_numpy(float), FLOOR_ML)[:, None] if head_size else 1
    return np.log(table / divisor)


def _fit(x: np.ndarray) -> dict[str, np.ndarray]:
    """Mean and SD (R,) of the rows of ``x`` and the Ledoit-Wolf precision (R, R) of the
    standardised rows."""
    from sklearn.covariance import LedoitWolf

    mean, sd = x.mean(axis=0), x.std(axis=0, ddof=1)
    sd = np.where(sd > 0, sd, FLOOR_SD)  # a region the same in every training scan
    precision = LedoitWolf(assume_centered=True).fit((x - mean) / sd).precision_
    return {"mean": mean, "sd": sd, "precision": precision}


def mahalanobis(x: np.ndarray, mean: np.ndarray, precision: np.ndarray) -> np.ndarray:
    """Mahalanobis distance of each row of ``x`` (..., R) from ``mean`` under ``precision``."""
    centred = np.asarray(x, float) - mean
    return np.sqrt(np.einsum("...i,ij,...j->...", centred, precision, centred))


def distance(x: np.ndarray, fit: dict) -> np.ndarray:
    """Mahalanobis distance of the standardised rows of ``x`` under a :func:`_fit`."""
    return mahalanobis((np.asarray(x, float) - fit["mean"]) / fit["sd"], 0.0, fit["precision"])


def anatomy_reference(visits: pd.DataFrame, regions: RegionSet) -> dict | None:
    """The training participants' reference from every visit they have (each one a scan the
    network saw as an input; volumes in mL, a participant_id column): regions, head size,
    mean, SD, precision and the threshold, the largest distance of a participant's visits
    from a fit without that participant; None with too few participants."""
    head = regions.head_size
    names = [name for name in regions.names if name != head]
    x = features(visits, names, head)
    people = visits["participant_id"].to_numpy()
    if len(set(people)) < MIN_PARTICIPANTS:
        return None
    left_out = [
        distance(x[people == person], _fit(x[people != person])).max() for person in set(people)
    ]
    fitted = _fit(x)
    return {
        "regions": names,
        "head_size": head,
        "mean": fitted["mean"].tolist(),
        "sd": fitted["sd"].tolist(),
        "precision": fitted["precision"].tolist(),
        "threshold": float(max(left_out)),
        "participants": len(set(people)),
        "scans": len(x),
    }


def anatomy_note(reference: dict | None, volumes: Mapping[str, float]) -> str | None:
    """A warning where the scan's regional volumes (mL) lie beyond the reference's threshold;
    None where they do not or where the model has no reference."""
    if reference is None:
        return None
    row = pd.DataFrame([dict(volumes)])
    x = features(row, reference["regions"], reference["head_size"])[0]
    fit = {key: np.array(reference[key]) for key in ("mean", "sd", "precision")}
    far_from = float(distance(x, fit))
    if far_from <= reference["threshold"]:
        return None
    standard = (x - fit["mean"]) / fit["sd"]
    far = int(np.argmax(np.abs(standard)))
    return (
        f"regional volumes lie far from the training participants' (Mahalanobis distance "
        f"{far_from:.1f} > {reference['threshold']:.1f}, the largest of the "
        f"{reference['participants']} training participants' leave-one-out distances; "
        f"furthest from their mean: {reference['regions'][far]}, {standard[far]:+.1f} SD): the "
        "forecast extrapolates"
    )
