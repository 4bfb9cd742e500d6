"""Ensembles of the network, and calibrated intervals for their regional volumes.

``predictor train --members K`` trains K members into one MODEL folder (the layout
is :mod:`predictor.modelstore`'s): member k takes seed S + k - 1 and a bootstrap of
the training participants (drawn with replacement within each diagnosis,
:func:`predictor.pairs.bootstrap_counts`); every member shares the split, the
validation participants that stop it early and the regional prior. A forecast runs every member; a
region's forecast volume is the member mean and its spread the member SD.

Intervals are normalised split-conformal (Lei, G'Sell, Rinaldo, Tibshirani and
Wasserman 2018, JASA 113:1094, section 5.2, locally weighted conformal). A held-out
pair's score is ``|observed - forecast| / s`` with the scale

    s = sqrt(member SD^2 + sigma^2)   (mL)

where sigma^2 is the residual variance of the model's mixed-effects prior for the
region (the noise of one observed volume, which the members' spread cannot know).
The interval is ``forecast +- q s`` with q the ceil((n + 1) level)-th smallest of n
scores. Scores count once per participant: one pair per participant is drawn at
random (seeded), the subsampling method of Dunn, Wasserman and Ramdas (JASA 2023),
so that, for exchangeable participants, a new participant's random pair is
covered at the level. The quantile is taken apart in each horizon band
(``interval_bands_years`` of ``configs/compare.toml``; Mondrian conformal prediction,
Vovk, Gammerman and Shafer 2005, "Algorithmic Learning in a Random World", chapter 4):
the scale above hardly grows with the horizon while the error does, so one quantile
for every horizon over-covers short horizons and under-covers long ones (measured on
the demo's evaluation: 100% at 1 year, 52-61% at 5). A participant counts once per
band. The coverage is still marginal over diagnoses (measured: AD under-covered;
:func:`coverage_note` says so in a forecast). The scores
come from ``predictor evaluate --members K`` (every score from a fold ensemble that
never saw the participant); ``evaluate`` scores each fold with quantiles from the
other folds, and ``predictor calibrate`` stores the quantiles in the MODEL folder.
Neither is exact split-conformal (the other folds' models trained on the fold
being scored; the calibrated model is not the fold ensembles): a cross-validation
construction like CV+ (Barber et al. 2021), checked by the measured coverage.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pandas as pd

from predictor.errors import DataError
from predictor.files import write_json
from predictor.modelstore import (
    CALIBRATION,
    CHECKPOINT,
    ENSEMBLE_JSON,
    MODEL_JSON,
    PRIOR,
    TrainedModel,
    member_folder,
    member_folders,
    read_model_json,
    write_ensemble_json,
)
from predictor.regression import LEVEL, conformal_quantile, fewest_scores
from predictor.rng import seeded_rng

#: the evaluation's table of conformal scores (``Evaluation.conformal`` as a TSV)
SCORES = "conformal.tsv"
METHOD = (
    "normalised split-conformal (Lei et al. 2018, JASA), scale sqrt(member SD^2 + prior "
    "residual variance), one pair per participant (Dunn et al. 2023, JASA), a quantile "
    "per horizon band (Mondrian, Vovk et al. 2005)"
)


# --- members --------------------------------------------------------------------------------
def train_members(
    work, folder, config, members: int, seed: int | None = None, split=None,
    resume: bool = False, force: bool = False, only: int | None = None,
    epochs: int | None = None, **progress,
) -> dict:  # fmt: skip
    """Train ``members`` members into ``folder`` (all, or member ``only``); returns the last
    member's last log row. One member trains a plain model folder, as ``train`` does.

    ``split`` defaults to the config's seeded split with ``seed``; every member shares
    its validation and test participants. ``epochs`` overrides the config's;
    ``progress``: ``on_step`` and ``on_epoch`` of :func:`predictor.training.train`.
    """
    from predictor.training import default_split, train
    from predictor.workspace import read_workspace

    seed = int(seed if seed is not None else config.training.seed)
    folder = Path(folder)
    if members == 1 and (folder / ENSEMBLE_JSON).is_file():
        raise DataError(f"{folder}: holds an ensemble; pass its --members or use another MODEL")
    if members > 1 and any((folder / name).exists() for name in (MODEL_JSON, CHECKPOINT, PRIOR)):
        raise DataError(f"{folder}: holds a single model; use another MODEL folder for members")
    if members == 1 and only is not None:
        raise DataError("--member needs --members 2 or more")
    if members == 1:
        return train(work, folder, config, epochs, resume, seed, force, split=split, **progress)
    if only is not None and not 1 <= only <= members:
        raise DataError(f"--member must be within 1..{members}, got {only}")
    if (folder / ENSEMBLE_JSON).is_file() and len(member_folders(folder)) != members:
        raise DataError(
            f"{folder}: holds an ensemble of {len(member_folders(folder))} members, not "
            f"{members}; use another MODEL folder"
        )
    if split is None:  # one split for every member (their seeds differ)
        split = default_split(read_workspace(work).volumes, config, seed)
    folder.mkdir(parents=True, exist_ok=True)
    write_ensemble_json(folder, members)
    last = {}
    for k in [only] if only is not None else range(1, members + 1):
        last = train(
            work, member_folder(folder, k), config, epochs, resume, seed + k - 1, force,
            split=split, member=k, **progress,
        )  # fmt: skip
    return last


# --- conformal intervals --------------------------------------------------------------------
def interval_scale(member_sd_ml, residual_var_ml2) -> np.ndarray:
    """The score's scale s (mL): sqrt(member SD^2 + prior residual variance)."""
    return np.sqrt(np.asarray(member_sd_ml, float) ** 2 + np.asarray(residual_var_ml2, float))


def residual_var(model: TrainedModel, region: str) -> float:
    """The prior's residual variance of ``region`` (mL^2), NaN where it has no fit."""
    fits = getattr(model.prior, "fits_", {})
    return float(fits[region].residual_var) if region in fits else float("nan")


def one_per_participant(participants, seed: int, *key: int) -> np.ndarray:
    """Row indices: one row of each participant, drawn at random (seeded by ``key``)."""
    participants = np.asarray(participants, dtype=object)
    rng = seeded_rng(seed, 47, *key)
    chosen = [rng.choice(np.flatnonzero(participants == p)) for p in np.unique(participants)]
    return np.sort(np.asarray(chosen, dtype=int))


def band_of(years, edges) -> np.ndarray:
    """Horizon band index of each horizon (years): 0 below the first edge, len(edges) at or
    above the last."""
    return np.searchsorted(np.asarray(edges, float), np.asarray(years, float), side="right")


def band_labels(edges) -> list[str]:
    """Every band in words, in order."""
    return [band_label(band, edges) for band in range(len(edges) + 1)]


def band_label(band: int, edges) -> str:
    """A band in words, e.g. '1.5-2.5 y'."""
    if band == 0:
        return f"<{edges[0]:g} y"
    if band == len(edges):
        return f">={edges[-1]:g} y"
    return f"{edges[band - 1]:g}-{edges[band]:g} y"


def quantile(scores: pd.DataFrame, level: float, seed: int, *key: int) -> tuple[float, int]:
    """(q, participants): the conformal quantile of one region's scores, one pair each.

    ``scores`` has ``participant_id`` and ``score`` columns; a missing (NaN) score does
    not count, an infinite one does (it is a pair no finite interval covers).
    """
    known = scores[~np.isnan(scores["score"].to_numpy(float))]
    if known.empty:
        return float("nan"), 0
    rows = one_per_participant(known["participant_id"].to_numpy(), seed, *key)
    return conformal_quantile(known["score"].to_numpy(float)[rows], level), len(rows)


def score_table(forecasts: pd.DataFrame) -> pd.DataFrame:
    """Scores of held-out pairs: ``forecasts`` (participant_id, fold, region, years,
    forecast_ml, observed_ml, scale_ml) gains ``score`` = |observed - forecast| / scale."""
    error = (forecasts["observed_ml"] - forecasts["forecast_ml"]).abs()
    return forecasts.assign(score=error / forecasts["scale_ml"])


def cross_fitted(scores: pd.DataFrame, level: float, seed: int, edges) -> pd.DataFrame:
    """Each fold's intervals from the other folds' scores in the same horizon band (upper
    ``edges``, years; so no participant calibrates its own interval): ``scores`` gains
    ``quantile``, ``lower_ml`` and ``upper_ml``."""
    bands = band_of(scores["years"], edges)
    out = scores.assign(quantile=np.nan)
    for (fold, region, band), rows in scores.groupby(["fold", "region", bands]):
        others = scores[(scores["fold"] != fold) & (scores["region"] == region) & (bands == band)]
        out.loc[rows.index, "quantile"] = quantile(others, level, seed, int(fold), int(band))[0]
    half = out["quantile"] * out["scale_ml"]
    return out.assign(lower_ml=out["forecast_ml"] - half, upper_ml=out["forecast_ml"] + half)


def calibrate(
    evaluation: str | os.PathLike[str], model: str | os.PathLike[str],
    level: float = LEVEL, seed: int = 0,
) -> dict:  # fmt: skip
    """Write ``MODEL/calibration.json``: each region's conformal quantile at ``level`` in
    each horizon band from the held-out scores of an ``evaluate --members K`` folder.
    Returns what it wrote (quantiles and participants: region -> one value per band)."""
    evaluation, model = Path(evaluation), Path(model)
    if not 0 < level < 1:
        raise DataError(f"--level must be within (0, 1), got {level}")
    path = evaluation / SCORES
    if not path.is_file():
        raise DataError(
            f"{evaluation}: has no {SCORES}; run `predictor evaluate --members 2` (or more) "
            "to score held-out forecasts of an ensemble"
        )
    try:
        scores = pd.read_csv(path, sep="\t")
    except pd.errors.EmptyDataError:
        scores = pd.DataFrame()
    if scores.empty:
        raise DataError(f"{path}: holds no scores (its folds had single-member networks)")
    data = json.loads((evaluation / "evaluation.json").read_text())
    if "bands_years" not in data:
        raise DataError(
            f"{evaluation}: evaluated without horizon bands (an older version); run "
            "predictor evaluate on it again (finished folds are reused)"
        )
    edges = [float(edge) for edge in data["bands_years"]]
    folders = member_folders(model)
    if len(folders) < 2:
        raise DataError(
            f"{model}: a single-member model has no spread to scale an interval; train it "
            "with --members 2 or more"
        )
    if data.get("members") != len(folders):
        raise DataError(
            f"{evaluation}: its scores come from fold ensembles of {data.get('members')} "
            f"members and this model has {len(folders)}: the spread of another member count "
            "scales intervals differently; evaluate with the model's --members"
        )
    quantiles, counts = {}, {}
    for region, rows in scores.groupby("region", sort=False):
        bands = band_of(rows["years"], edges)
        each = [quantile(rows[bands == band], level, seed, band)
                for band in range(len(edges) + 1)]  # fmt: skip
        quantiles[region], counts[region] = [q for q, _ in each], [n for _, n in each]
    payload = {
        "level": level,
        "bands_years": edges,
        "quantiles": quantiles,
        "participants": counts,
        "method": METHOD,
        "evaluation": str(evaluation.resolve()),
        "observed_change": data.get("observed_change"),
        "members": len(folders),
        "member_sha256": [read_model_json(path).weights_sha256 for path in folders],
        "seed": seed,
        "coverage_by_diagnosis": measured_coverage(evaluation, level, data.get("level")),
    }
    endless = sorted({b for qs in quantiles.values() for b, q in enumerate(qs) if not q < np.inf})
    if endless:
        bands = ", ".join(band_label(b, edges) for b in endless)
        payload["note"] = (
            f"too few participants for a finite {level:g} interval at {bands} "
            f"(a band needs at least {fewest_scores(level)} participants)"
        )
    # JSON has no NaN or infinity: a band without a finite quantile is stored as null
    payload["quantiles"] = {
        region: [q if q < np.inf else None for q in qs] for region, qs in quantiles.items()
    }
    write_json(model / CALIBRATION, payload)
    return payload


def measured_coverage(evaluation: Path, level: float, evaluated_level) -> dict:
    """Diagnosis -> region -> the coverage the evaluation measured for the network's
    cross-fitted intervals (``coverage.tsv``); empty where it has none or measured
    another level. Coverage is marginal over diagnoses: this says where it misses."""
    from predictor.compare import JACOBIAN

    path = evaluation / "coverage.tsv"
    if evaluated_level != level or not path.is_file():
        return {}
    table = pd.read_csv(path, sep="\t", dtype={"group": str})
    rows = table[(table["method"] == JACOBIAN) & (table["grouping"] == "diagnosis")]
    return {
        diagnosis: dict(zip(group["region"], group["coverage"].astype(float), strict=True))
        for diagnosis, group in rows.groupby("group")
    }


def coverage_note(calibration: dict | None, diagnosis: str, margin: float = 0.05) -> str | None:
    """A warning where held-out participants of ``diagnosis`` were covered more than
    ``margin`` away from the level in the evaluation the calibration came from (85-95%
    for 90%, the tolerance of common practice); None otherwise."""
    if calibration is None:
        return None
    measured = calibration.get("coverage_by_diagnosis", {}).get(diagnosis, {})
    level = calibration["level"]
    off = {region: c for region, c in measured.items() if abs(c - level) > margin}
    if not off:
        return None
    shown = ", ".join(f"{region} {100 * c:.0f}%" for region, c in off.items())
    return (
        f"the network's {100 * level:g}% intervals covered held-out {diagnosis} participants' "
        f"follow-ups at {shown} in the evaluation they were calibrated on: for {diagnosis} "
        "read them as too narrow where below, too wide where above"
    )


def calibrated_quantile(calibration: dict | None, region: str, years: float) -> float:
    """The stored conformal quantile of ``region`` at a horizon (NaN: none)."""
    if calibration is None or years <= 0 or region not in calibration["quantiles"]:
        return float("nan")
    band = int(band_of(years, calibration["bands_years"]))
    return float(calibration["quantiles"][region][band])


def uncalibrated_note(members: int, calibration: dict | None) -> str | None:
    """Why a forecast's volumes carry no interval (None when they do)."""
    if members < 2:
        return (
            "no interval for the network's volumes: a single-member model has no spread "
            "(train with --members 2 or more, then predictor calibrate)"
        )
    if calibration is None:
        return (
            "no interval for the network's volumes: the model is not calibrated (run "
            "predictor calibrate with an evaluate --members folder)"
        )
    return None
