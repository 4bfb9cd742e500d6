"""Training data from a prepared workspace: participant split, visit pairs, prior, batches.

* :func:`split_participants`: a seeded participant-level split into train,
  validation and test (no participant in two sets; every test participant
  has a follow-up at least ``test_min_follow_up_years`` after baseline);
* :func:`visit_pairs`: every (earlier -> later) visit pair of a participant set;
* :func:`attach_prior`: the regression prior's forecast ratio and its
  predictive SD for each pair (a mixed-effects model fitted on the training
  participants only);
* :class:`ScanStore`: working-grid arrays of each scan, read lazily from the
  workspace with a bounded cache (memory stays flat as a cohort grows);
* :func:`make_batch`: tensors of a list of pairs, with the augmentation drawn
  from a seeded generator.
"""

from __future__ import annotations

import json
import os
import warnings
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import torch

from predictor.errors import DataError
from predictor.prepare import RESULT, SCANS
from predictor.volumes import REGIONS

#: regions whose volume the network's Jacobian forecasts and the prior constrains
#: (intracranial volume too: the skull does not move, so what tissue loses CSF gains)
PRIOR_REGIONS = ("hippocampus_left", "hippocampus_right", "ventricles", "total_gm", "wm", "icv")
#: -1: may only shrink, +1: may only grow, 0: no direction (the monotone term)
REGION_DIRECTION = (-1.0, -1.0, 1.0, -1.0, -1.0, 0.0)
#: the two regions exchanged by a left-right flip
FLIPPED = {0: 1, 1: 0}
SETS = ("train", "validation", "test")


@dataclass(frozen=True)
class Workspace:
    """A prepared workspace: its volume table and working grid."""

    root: Path
    volumes: pd.DataFrame  # one row per complete scan (volumes.tsv)
    grid_affine: np.ndarray  # (4, 4) RAS mm
    grid_shape: tuple[int, int, int]
    template: str
    prepare_settings: dict


def read_workspace(work: str | os.PathLike[str]) -> Workspace:
    """Read ``volumes.tsv`` and ``prepare.json`` of a prepared workspace."""
    root = Path(work)
    for name in ("volumes.tsv", "prepare.json"):
        if not (root / name).is_file():
            raise DataError(f"{root}: not a prepared workspace ({name} missing); run prepare")
    volumes = pd.read_csv(root / "volumes.tsv", sep="\t", dtype={"key": str})
    if volumes.empty:
        raise DataError(f"{root / 'volumes.tsv'}: no prepared scans")
    prepared = json.loads((root / "prepare.json").read_text())
    first = json.loads((root / SCANS / volumes["key"].iloc[0] / RESULT).read_text())
    diagnostics = first["diagnostics"]
    return Workspace(
        root,
        volumes.sort_values(["participant_id", "age"], kind="stable").reset_index(drop=True),
        np.asarray(diagnostics["grid_affine"], dtype=float),
        tuple(int(n) for n in diagnostics["grid_shape"]),
        prepared["template"],
        prepared["settings"],
    )


def split_participants(
    volumes: pd.DataFrame,
    fractions: tuple[float, float, float],
    min_test_years: float,
    seed: int,
) -> dict[str, list[str]]:
    """Seeded participant-level split into train, validation and test.

    Test participants are drawn, stratified by diagnosis, from those with a
    follow-up at least ``min_test_years`` after baseline; validation from the
    rest of those with any follow-up; everyone else trains.
    """
    from predictor.phantoms.participants import seeded_rng

    rng = seeded_rng(seed, 7)
    span = volumes.groupby("participant_id")["age"].agg(lambda a: a.max() - a.min())
    diagnosis = volumes.groupby("participant_id")["diagnosis"].first()
    count = len(span)
    sizes = [int(round(fractions[k] * count)) for k in (1, 2)]
    sizes = [max(1, size) if fractions[k + 1] > 0 else 0 for k, size in enumerate(sizes)]
    eligible = sorted(span.index[span >= min_test_years])
    if len(eligible) < sizes[1]:
        raise DataError(
            f"only {len(eligible)} participants have a follow-up {min_test_years:g} years or "
            f"more after baseline; {sizes[1]} are needed for the test set"
        )
    test = _stratified_draw(eligible, diagnosis, sizes[1], rng)
    with_follow_up = sorted(set(span.index[span > 0]) - set(test))
    validation = _stratified_draw(with_follow_up, diagnosis, sizes[0], rng)
    train = sorted(set(span.index) - set(test) - set(validation))
    if not train:
        raise DataError(f"{count} participants leave none for training")
    return {"train": train, "validation": validation, "test": test}


def _stratified_draw(candidates, diagnosis, size, rng) -> list[str]:
    """``size`` candidates, diagnosis groups taking turns in a seeded order."""
    groups = {}
    for participant in rng.permutation(np.asarray(candidates, dtype=object)):
        groups.setdefault(diagnosis[participant], []).append(participant)
    chosen, order = [], sorted(groups)
    while len(chosen) < size and any(groups.values()):
        for label in order:
            if groups[label] and len(chosen) < size:
                chosen.append(groups[label].pop())
    return sorted(chosen)


def visit_pairs(volumes: pd.DataFrame, participants) -> pd.DataFrame:
    """Every (earlier -> later) visit pair of the given participants.

    Columns: participant_id, sex, diagnosis, age (baseline of the pair,
    years), years (interval), base_key, follow_key, and for every region of
    :data:`~predictor.volumes.REGIONS`: ``<region>`` (baseline mL) and
    ``<region>_follow`` (follow-up mL).
    """
    rows = []
    chosen = volumes[volumes["participant_id"].isin(set(participants))]
    for participant, visits in chosen.groupby("participant_id", sort=True):
        visits = visits.sort_values("age").to_dict("records")
        for i, base in enumerate(visits):
            for follow in visits[i + 1 :]:
                if follow["age"] <= base["age"]:
                    continue
                row = {
                    "participant_id": participant,
                    "sex": base["sex"],
                    "diagnosis": base["diagnosis"],
                    "age": float(base["age"]),
                    "years": float(follow["age"] - base["age"]),
                    "base_key": base["key"],
                    "follow_key": follow["key"],
                }
                for region in REGIONS:
                    row[region] = float(base[region])
                    row[f"{region}_follow"] = float(follow[region])
                rows.append(row)
    return pd.DataFrame(rows)


def fit_prior(volumes: pd.DataFrame, participants):
    """Mixed-effects model of every region fitted on ``participants`` only.

    Returns (model, warnings). Training constrains :data:`PRIOR_REGIONS` with
    it; forecasts report it beside the network for every region.
    """
    from predictor.regression import MixedEffectsForecaster

    table = volumes[volumes["participant_id"].isin(set(participants))]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", RuntimeWarning)
        model = MixedEffectsForecaster().fit(table, list(REGIONS))
    return model, [str(w.message) for w in caught if issubclass(w.category, RuntimeWarning)]


def attach_prior(pairs: pd.DataFrame, prior) -> pd.DataFrame:
    """Add ``<region>_prior`` (forecast / baseline volume) and ``<region>_prior_sd`` to pairs."""
    request = pairs.reset_index(drop=True)
    request = request.assign(participant_id=[f"pair{k}" for k in range(len(request))])
    ratio = {region: np.zeros(len(request)) for region in PRIOR_REGIONS}
    spread = {region: np.zeros(len(request)) for region in PRIOR_REGIONS}
    for years, index in request.groupby("years").groups.items():
        subset = request.loc[index]
        forecast = prior.predict(subset, [years]).set_index(["region", "participant_id"])
        for region in PRIOR_REGIONS:
            values = forecast.loc[region].loc[subset["participant_id"]]
            baseline = subset[region].to_numpy()
            ratio[region][index] = values["mean_ml"].to_numpy() / baseline
            spread[region][index] = values["sd_ml"].to_numpy() / baseline
    columns = {f"{region}_prior": ratio[region] for region in PRIOR_REGIONS}
    columns |= {f"{region}_prior_sd": spread[region] for region in PRIOR_REGIONS}
    return pairs.reset_index(drop=True).assign(**columns)


class ScanStore:
    """Working-grid arrays of prepared scans, read on demand, at most ``capacity`` kept.

    Each entry is a float32 tensor (8, D, H, W): T1, brain mask, GM, WM, CSF,
    left and right hippocampus, ventricles.
    """

    def __init__(self, work: str | os.PathLike[str], capacity: int = 64):
        self.root = Path(work) / SCANS
        self.capacity = capacity
        self._cache: OrderedDict[str, torch.Tensor] = OrderedDict()

    def __getitem__(self, key: str) -> torch.Tensor:
        if key in self._cache:
            self._cache.move_to_end(key)
            return self._cache[key]
        folder = self.root / key
        try:
            arrays = [
                np.asarray(nib.load(folder / "grid_T1w.nii.gz").dataobj, dtype=np.float32)[None],
                np.asarray(nib.load(folder / "grid_mask.nii.gz").dataobj, dtype=np.float32)[None],
                np.moveaxis(_read4d(folder / "grid_probseg.nii.gz"), -1, 0),
                np.moveaxis(_read4d(folder / "grid_regions.nii.gz"), -1, 0),
            ]
        except (OSError, ValueError) as error:
            raise DataError(
                f"{folder}: working-grid files unreadable ({error}); rerun prepare"
            ) from error
        tensor = torch.from_numpy(np.ascontiguousarray(np.concatenate(arrays, axis=0)))
        self._cache[key] = tensor
        if len(self._cache) > self.capacity:
            self._cache.popitem(last=False)
        return tensor


def region_maps(arrays: torch.Tensor) -> torch.Tensor:
    """:data:`PRIOR_REGIONS` weights (R, D, H, W) of a :class:`ScanStore` entry."""
    return prior_region_weights(arrays[5:8], arrays[2:5])


def prior_region_weights(deep: torch.Tensor, tissue: torch.Tensor) -> torch.Tensor:
    """:data:`PRIOR_REGIONS` weights (R, D, H, W) from the deep regions and the tissues.

    ``deep`` (3, D, H, W) are the hippocampi and ventricles, ``tissue`` (3, D, H, W)
    GM, WM and CSF; the intracranial volume is the sum of the three tissues.
    """
    gm, wm, csf = tissue
    return torch.cat([deep, torch.stack([gm, wm, gm + wm + csf])])


def _read4d(path: Path) -> np.ndarray:
    return np.asarray(nib.load(path).dataobj, dtype=np.float32)


@dataclass(frozen=True)
class Batch:
    """Tensors of a list of pairs (B pairs) on the working grid (D, H, W)."""

    inputs: torch.Tensor  # (B, C, D, H, W) network input (augmented)
    baseline: torch.Tensor  # (B, 1, D, H, W) baseline T1 (not intensity-augmented)
    followup: torch.Tensor  # (B, 1, D, H, W)
    mask: torch.Tensor  # (B, 1, D, H, W) union of both brain masks
    tissue: torch.Tensor  # (B, D, H, W) GM + WM fraction of the baseline
    regions: torch.Tensor  # (B, R, D, H, W) PRIOR_REGIONS weights of the baseline
    condition: torch.Tensor  # (B, K)
    years: torch.Tensor  # (B,)
    prior: torch.Tensor  # (B, R) forecast/baseline volume ratio
    prior_sd: torch.Tensor  # (B, R)


def make_batch(
    pairs: pd.DataFrame,
    store: ScanStore,
    condition: torch.Tensor,
    tissue_channels: bool,
    rngs: list[np.random.Generator] | None = None,
    gain_sd: float = 0.0,
    flip_probability: float = 0.0,
) -> Batch:
    """Stack the pairs' arrays; with ``rngs`` (one per pair), draw a flip and an input gain.

    A left-right flip mirrors every array along the first (R-L) axis and
    swaps the hippocampi in the regions and the prior; the gain multiplies
    only the network's input T1, never the images the loss compares.
    """
    items = []
    for k, pair in enumerate(pairs.itertuples(index=False)):
        base, follow = store[pair.base_key], store[pair.follow_key]
        order = list(range(len(PRIOR_REGIONS)))
        gain, flip = 1.0, False
        if rngs is not None:
            gain = float(np.exp(rngs[k].normal(0.0, gain_sd)))
            flip = bool(rngs[k].random() < flip_probability)
        if flip:
            base, follow = base.flip(1), follow.flip(1)
            order = [FLIPPED.get(i, i) for i in order]
        prior = np.array([getattr(pair, f"{r}_prior") for r in PRIOR_REGIONS])[order]
        prior_sd = np.array([getattr(pair, f"{r}_prior_sd") for r in PRIOR_REGIONS])[order]
        regions = region_maps(base)[order]
        inputs = torch.cat([base[:1] * gain, base[2:5]]) if tissue_channels else base[:1] * gain
        items.append(
            (
                inputs,
                base[:1],
                follow[:1],
                torch.maximum(base[1:2], follow[1:2]),
                base[2] + base[3],
                regions,
                condition[k],
                pair.years,
                prior,
                prior_sd,
            )
        )
    columns = list(zip(*items, strict=True))
    return Batch(
        *(torch.stack(column) for column in columns[:7]),
        torch.tensor(columns[7], dtype=torch.float32),
        torch.tensor(np.stack(columns[8]), dtype=torch.float32),
        torch.tensor(np.stack(columns[9]), dtype=torch.float32),
    )
