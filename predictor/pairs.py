"""Training data from a prepared workspace: participant split, visit pairs, prior, batches.

* :func:`split_participants`: a seeded participant-level split into train,
  validation and test (no participant in two sets; every test participant
  has a follow-up at least ``test_min_follow_up_years`` after baseline);
* :func:`visit_pairs`: every (earlier -> later) visit pair of a participant set;
* :func:`attach_prior`: the regression prior's forecast ratio and its
  predictive SD for each pair (a mixed-effects model fitted on the training
  participants only);
* :func:`grid_entry` / :func:`network_input` / :func:`region_weights`: the one
  builder of the network's input and region maps from a prepared scan, used by
  training and forecasting alike;
* :class:`ScanStore`: working-grid entries of each scan, read lazily from the
  workspace with a bounded cache (memory stays flat as a cohort grows);
* :func:`make_batch`: tensors of a list of pairs, with the augmentation drawn
  from a seeded generator.
"""

from __future__ import annotations

import os
import warnings
from collections import OrderedDict
from dataclasses import dataclass

import nibabel as nib
import numpy as np
import pandas as pd
import torch

from predictor.errors import DataError
from predictor.regions import RegionSet
from predictor.rng import seeded_rng
from predictor.workspace import Layout

SETS = ("train", "validation", "test")


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
    test = stratified_draw(eligible, diagnosis, sizes[1], rng)
    with_follow_up = sorted(set(span.index[span > 0]) - set(test))
    validation = stratified_draw(with_follow_up, diagnosis, sizes[0], rng)
    train = sorted(set(span.index) - set(test) - set(validation))
    if not train:
        raise DataError(f"{count} participants leave none for training")
    return {"train": train, "validation": validation, "test": test}


def bootstrap_counts(participants, diagnosis, seed: int, member: int) -> dict[str, int]:
    """How many times each participant is drawn by ensemble member ``member``'s bootstrap:
    within each diagnosis, as many draws with replacement as the diagnosis has
    participants (a stratified bootstrap: no diagnosis can vanish). 0: not drawn."""
    rng = seeded_rng(seed, 43, member)
    counts = dict.fromkeys(sorted(participants), 0)
    for label in sorted({diagnosis[p] for p in counts}):
        group = [p for p in counts if diagnosis[p] == label]
        for participant in rng.choice(np.asarray(group, dtype=object), size=len(group)):
            counts[str(participant)] += 1
    return counts


def stratified_draw(candidates, diagnosis, size, rng) -> list[str]:
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


def visit_pairs(
    volumes: pd.DataFrame, participants, regions: RegionSet, covariates: tuple[str, ...] = ()
) -> pd.DataFrame:
    """Every (earlier -> later) visit pair of the given participants.

    Columns: participant_id, sex, diagnosis, age (baseline of the pair,
    years), years (interval), base_key, follow_key, the ``covariates`` at the pair's
    earlier visit, and for every region: ``<region>`` (baseline mL) and
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
                } | {name: base[name] for name in covariates}
                for region in regions.names:
                    row[region] = float(base[region])
                    row[f"{region}_follow"] = float(follow[region])
                rows.append(row)
    return pd.DataFrame(rows)


def fit_prior(volumes: pd.DataFrame, participants, regions: RegionSet, coding):
    """Mixed-effects model of every region fitted on ``participants`` only.

    The diagnosis-by-time design (no age-by-time term: with it, the tiny test cohort's
    16 training participants gave a network that forecast hippocampal growth in AD); too
    few participants for it get the rate design, with a warning. Returns (model,
    warnings). Training constrains the prior regions with it; forecasts report it beside
    the network for every region. ``coding`` is the
    workspace's :class:`~predictor.config.CohortSettings`.
    """
    from predictor.regression import MixedEffectsForecaster

    table = volumes[volumes["participant_id"].isin(set(participants))]
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", RuntimeWarning)
        model = MixedEffectsForecaster(
            coding=coding, design="diagnosis-by-time", fallback=True
        ).fit(table, list(regions.names))
    return model, [str(w.message) for w in caught if issubclass(w.category, RuntimeWarning)]


def attach_prior(pairs: pd.DataFrame, prior, names) -> pd.DataFrame:
    """Add ``<region>_prior`` (forecast / baseline volume) and ``<region>_prior_sd`` to pairs.

    ``names`` are the prior regions (:attr:`~predictor.regions.RegionSet.prior`).
    """
    request = pairs.reset_index(drop=True)
    forecast = prior.predict_each(request)
    ratio, spread = {}, {}
    for region in names:
        values, baseline = forecast[forecast["region"] == region], request[region].to_numpy()
        ratio[f"{region}_prior"] = values["mean_ml"].to_numpy() / baseline
        spread[f"{region}_prior_sd"] = values["sd_ml"].to_numpy() / baseline
    return request.assign(**ratio, **spread)


def grid_entry(t1, mask, tissue, deep) -> torch.Tensor:
    """One prepared scan's working-grid arrays as one float32 tensor (5 + n, D, H, W).

    Channels: T1, brain mask, GM, WM, CSF, then the n deep regions; ``tissue``
    (D, H, W, 3) and ``deep`` (D, H, W, n) as :class:`~predictor.prepare.PreparedScan`
    holds them. Training (from the workspace files) and forecasting (from a
    prepared scan in memory) both build their inputs from this.
    """
    arrays = [
        np.asarray(t1, dtype=np.float32)[None],
        np.asarray(mask, dtype=np.float32)[None],
        np.moveaxis(np.asarray(tissue, dtype=np.float32), -1, 0),
        np.moveaxis(np.asarray(deep, dtype=np.float32), -1, 0),
    ]
    return torch.from_numpy(np.ascontiguousarray(np.concatenate(arrays, axis=0)))


_TEMPLATE_ENTRIES: dict[tuple, torch.Tensor] = {}


def template_entry(template: str, regions: RegionSet, prepare_settings: dict) -> torch.Tensor:
    """The template as a :func:`grid_entry` on the working grid (kept for the process).

    The image input of a population-field model (``image_input = "template"``).
    """
    import json

    from predictor.prepare import PrepareSettings, cached_template, template_on_grid

    key = (template, regions.fingerprint, json.dumps(prepare_settings, sort_keys=True))
    if key not in _TEMPLATE_ENTRIES:
        settings = PrepareSettings.from_dict(prepare_settings)
        arrays = template_on_grid(cached_template(template, regions), settings)
        _TEMPLATE_ENTRIES.clear()  # one at a time: a process works with one workspace
        _TEMPLATE_ENTRIES[key] = grid_entry(*arrays)
    return _TEMPLATE_ENTRIES[key]


def network_input(entry: torch.Tensor, tissue_channels: bool, gain: float = 1.0) -> torch.Tensor:
    """The network's input (C, D, H, W) from a :func:`grid_entry`: T1 x gain [, GM, WM, CSF]."""
    t1 = entry[:1] * gain if gain != 1.0 else entry[:1]
    return torch.cat([t1, entry[2:5]]) if tissue_channels else t1


def region_weights(entry: torch.Tensor, regions: RegionSet, names) -> torch.Tensor:
    """Weight maps (R, D, H, W) of the regions ``names`` from a :func:`grid_entry`."""
    return regions.maps(entry[2:], names)


class ScanStore:
    """Working-grid entries (:func:`grid_entry`) of prepared scans, read on demand.

    ``spaces`` gives a scan key's within-subject entry (volumes.tsv's
    ``within_subject``): its images are read from there, so a participant's
    visits share one transform to the template. At most ``capacity`` are kept, so
    memory stays flat as a cohort grows.
    """

    def __init__(self, work: str | os.PathLike[str], spaces: dict | None = None,
                 capacity: int = 64):  # fmt: skip
        self.layout = Layout(work)
        self.spaces = spaces or {}
        self.capacity = capacity
        self._cache: OrderedDict[str, torch.Tensor] = OrderedDict()

    def __getitem__(self, key: str) -> torch.Tensor:
        files = self.layout.grid(key, self.spaces.get(key))
        return self._cached(key, files.folder, lambda: grid_entry(
            *(nib.load(path).dataobj for path in (files.t1, files.mask)),
            *(nib.load(path).dataobj for path in (files.tissue, files.regions)),
        ))  # fmt: skip

    def log_jacobian(self, base: str, follow: str) -> torch.Tensor | None:
        """The pair's measured log-Jacobian map (D, H, W) on the working grid; None for a
        pair outside a within-subject entry or whose measurement failed."""
        space = self.spaces.get(base)
        if not (isinstance(space, str) and space and self.spaces.get(follow) == space):
            return None
        path = self.layout.subject(space).log_jacobian(base, follow)
        if not path.is_file():  # its measurement failed (the entry's targets_failed)
            return None
        return self._cached(f"{base}/{follow}", path, lambda: torch.from_numpy(
            np.asarray(nib.load(path).dataobj, dtype=np.float32)
        ))  # fmt: skip

    def _cached(self, key: str, where, load) -> torch.Tensor:
        """``load()``, kept under ``key`` (least recently used dropped first)."""
        if key in self._cache:
            self._cache.move_to_end(key)
            return self._cache[key]
        try:
            tensor = load()
        except (OSError, ValueError) as error:
            raise DataError(f"{where}: working-grid files unreadable ({error}); rerun prepare") \
                from error  # fmt: skip
        self._cache[key] = tensor
        if len(self._cache) > self.capacity:
            self._cache.popitem(last=False)
        return tensor


@dataclass(frozen=True)
class Batch:
    """Tensors of a list of pairs (B pairs) on the working grid (D, H, W)."""

    inputs: torch.Tensor  # (B, C, D, H, W) network input (augmented)
    baseline: torch.Tensor  # (B, 1, D, H, W) baseline T1 (not intensity-augmented)
    followup: torch.Tensor  # (B, 1, D, H, W)
    mask: torch.Tensor  # (B, 1, D, H, W) union of both brain masks
    tissue: torch.Tensor  # (B, D, H, W) GM + WM fraction of the baseline
    regions: torch.Tensor  # (B, R, D, H, W) prior-region weights of the baseline
    condition: torch.Tensor  # (B, K)
    years: torch.Tensor  # (B,)
    prior: torch.Tensor  # (B, R) forecast/baseline volume ratio
    prior_sd: torch.Tensor  # (B, R)
    log_jacobian: torch.Tensor  # (B, D, H, W) the pair's measured log-Jacobian (0: none)
    measured: torch.Tensor  # (B,) 1 where the pair has a measured log-Jacobian, else 0


def make_batch(
    pairs: pd.DataFrame,
    store: ScanStore,
    condition: torch.Tensor,
    tissue_channels: bool,
    regions: RegionSet,
    rngs: list[np.random.Generator] | None = None,
    gain_sd: float = 0.0,
    flip_probability: float = 0.0,
    image: torch.Tensor | None = None,
    log_jacobians: bool = False,
) -> Batch:
    """Stack the pairs' arrays; with ``rngs`` (one per pair), draw a flip and an input gain.

    A left-right flip mirrors every array along the first (R-L) axis and
    swaps mirror partners (e.g. the hippocampi) in the regions and the prior;
    the gain multiplies only the network's input T1, never the images the
    loss compares. The regions are ``regions.prior``. ``image`` (a
    :func:`template_entry`) replaces the baseline as the network's input of
    every pair (a population field); regions and losses stay the pair's own.
    With ``log_jacobians``, each pair's measured log-Jacobian map is read (flipped
    with the pair) where its participant has a within-subject entry.
    """
    names = regions.prior
    items = []
    for k, pair in enumerate(pairs.itertuples(index=False)):
        base, follow = store[pair.base_key], store[pair.follow_key]
        measured = store.log_jacobian(pair.base_key, pair.follow_key) if log_jacobians else None
        present = measured is not None
        if measured is None:
            measured = torch.zeros(base.shape[1:])
        order = list(range(len(names)))
        gain, flip = 1.0, False
        if rngs is not None:
            gain = float(np.exp(rngs[k].normal(0.0, gain_sd)))
            flip = bool(rngs[k].random() < flip_probability)
        seen = base if image is None else image
        if flip:
            base, follow, seen = base.flip(1), follow.flip(1), seen.flip(1)
            measured = measured.flip(0)
            order = regions.mirrored(names)
        prior = np.array([getattr(pair, f"{r}_prior") for r in names])[order]
        prior_sd = np.array([getattr(pair, f"{r}_prior_sd") for r in names])[order]
        items.append(
            (
                network_input(seen, tissue_channels, gain),
                base[:1],
                follow[:1],
                torch.maximum(base[1:2], follow[1:2]),
                base[2] + base[3],
                region_weights(base, regions, names)[order],
                condition[k],
                pair.years,
                prior,
                prior_sd,
                measured,
                float(present),
            )
        )
    columns = list(zip(*items, strict=True))
    return Batch(
        *(torch.stack(column) for column in columns[:7]),
        torch.tensor(columns[7], dtype=torch.float32),
        torch.tensor(np.stack(columns[8]), dtype=torch.float32),
        torch.tensor(np.stack(columns[9]), dtype=torch.float32),
        torch.stack(columns[10]),
        torch.tensor(columns[11], dtype=torch.float32),
    )
