"""Every visit of a participant in one within-subject space (a stage of ``prepare``).

Each visit was registered to the template on its own, so two visits' working-
grid images differ by the jitter of two affine registrations as well as by
the change between them (and part of a global atrophy can hide in the later
visit's affine scale). For a participant with two or more prepared visits:

1. Every visit's brain is registered (6 parameters by default; 9 or 12 with
   ``within_subject_parameters``; Mattes mutual information, as the visit-pair
   alignment of :mod:`predictor.longitudinal`) to the participant's mean
   image. The first mean is the first visit; after each round the mean's pose
   is moved to the average of the visits' poses (the mean of their maps, made
   rigid again by its polar decomposition for 6 parameters), so that no visit
   is privileged, and the visits are averaged there. Rounds repeat until the
   mean changes by less than ``within_subject_tolerance`` (RMS over the brain,
   relative to the mean's) or ``within_subject_rounds`` are done.
2. The participant's one transform to the template: each visit's own
   template registration carried into the mean space, averaged. This is the
   registration of the visits' average anatomy to first order; no new
   registration to the template is run.
3. Each visit's normalised T1, brain mask, tissue and region maps are
   resampled once onto the working grid through that shared transform and the
   visit's map from the mean: two visits' working-grid images then differ only
   by the anatomy's change and the noise.
4. With ``jacobian_targets``, for every pair of visits (earlier, later), the
   log-Jacobian determinant of
   a diffeomorphic demons registration of the later visit's working-grid
   image to the earlier's (:func:`predictor.longitudinal.demons_jacobian`, the
   ``target_demons_*`` levels in working-grid voxels; by default one level at
   half the grid's resolution, that of the network's velocity): the measured local change
   the network's own log-Jacobian is trained towards (``jacobian_weight`` in
   ``configs/train.toml``). It is measured on the working grid, where the
   network works, and for every pair training uses (not only baseline pairs).

With 6 parameters, the change stage (:mod:`predictor.longitudinal`) aligns a
participant's pairs of visits through this space too (the later visit's map
from the mean after the inverse of the earlier's) instead of registering each
pair: the pairs share one set of poses, and swapping two visits inverts the
map exactly. A visit's same-day rescan is registered to the mean as the
visits were in the last round (it does not shape the mean), so that its change
from the visit, the noise floor, is measured through the same poses.

The result is cached per participant (``subjects/<key>/``; ``result.json`` is
written last and marks the entry complete) and is what training reads
(``volumes.tsv``'s ``within_subject`` column names the entry). Single-visit
participants and those whose stage fails keep their scans' own working-grid
images (the column is empty; a failure is reported, never fatal).
"""

from __future__ import annotations

import hashlib
import json
import shutil
from dataclasses import asdict, replace
from pathlib import Path

import numpy as np
import pandas as pd

from predictor import __version__
from predictor.errors import PredictorError
from predictor.files import exclusive, write_json
from predictor.longitudinal import (
    Visit,
    demons_jacobian,
    failure_row,
    prepared_rescans,
    rigid_alignment,
)
from predictor.nifti import save_array
from predictor.preprocess import resample
from predictor.regions import RegionSet
from predictor.spatial import to_sitk
from predictor.workspace import Layout, SubjectFiles

#: changes when an entry's content does (2: the first visit's first map is the identity;
#: same-day rescans registered to the mean)
SUBJECT_FORMAT = 2
#: fewest metric samples of a registration to the mean on its coarsest level
MIN_SAMPLES = 300
#: coarsest spacing (mm) of a level of the registration to the mean
COARSEST_MM = 8.0
#: the [longitudinal] settings that shape a within-subject entry
SETTINGS = ("rigid_shrink_factors", "rigid_smoothing_mm", "rigid_iterations",
            "rigid_min_step_mm", "within_subject_parameters", "within_subject_rounds",
            "within_subject_tolerance", "within_subject_sampling_fraction",
            "jacobian_targets")  # fmt: skip
#: those that shape it only with ``jacobian_targets`` (the log-Jacobian maps)
TARGET_SETTINGS = ("target_demons_shrink_factors", "target_demons_iterations",
                   "demons_field_sd_voxels", "histogram_levels")  # fmt: skip


def average_map(maps: list[np.ndarray], rigid: bool) -> np.ndarray:
    """The mean of 4x4 maps; with ``rigid``, its linear part replaced by the nearest
    rotation (polar decomposition by SVD)."""
    mean = np.mean(maps, axis=0)
    if rigid:
        u, _, vt = np.linalg.svd(mean[:3, :3])
        mean[:3, :3] = u @ vt
    return mean


def _mean_image(visits: list[Visit], maps: list[np.ndarray], affine, shape) -> np.ndarray:
    """The visits' brains resampled through ``maps`` (mean point -> visit point), averaged."""
    moved = [resample(v.t1, v.affine, affine, shape, m) for v, m in zip(visits, maps, strict=True)]
    return np.mean(moved, axis=0).astype(np.float32)


def subject_space(
    visits: list[Visit], template_to_native: list[np.ndarray], settings, rescans=()
) -> dict:
    """A participant's within-subject space (see the module docstring).

    ``visits`` (two or more) with each one's own template -> native map (4x4, mm).
    Returns ``mean`` (the mean brain image on the first visit's grid, ``affine``),
    ``mean_to_visit`` (4x4 per visit), ``template_to_mean`` (4x4), ``rounds`` and
    ``mean_change`` (the relative RMS change of the mean per round), and
    ``mean_to_rescan``: each of ``rescans`` (same-day rescans, not visits: they do not
    shape the mean; None for one that could not be read) registered as the visits were
    in the last round, or None where that failed.
    """
    parameters = settings.within_subject_parameters
    affine, shape = visits[0].affine, visits[0].t1.shape
    # levels coarser than COARSEST_MM hold no brain detail (a 4 mm scan shrunk 4 times);
    # at least MIN_SAMPLES metric samples on the coarsest one: too few leave the joint
    # histogram without a range, and the registration fails
    voxel_mm = (visits[0].voxel_ml * 1000.0) ** (1.0 / 3.0)
    levels = [(f, s) for f, s in zip(settings.rigid_shrink_factors, settings.rigid_smoothing_mm,
                                     strict=True) if f * voxel_mm <= COARSEST_MM]  # fmt: skip
    levels = levels or [(settings.rigid_shrink_factors[-1], settings.rigid_smoothing_mm[-1])]
    settings = replace(settings, rigid_shrink_factors=tuple(f for f, _ in levels),
                       rigid_smoothing_mm=tuple(s for _, s in levels))  # fmt: skip
    coarsest = levels[0][0] ** 3 / max(int(visits[0].mask.sum()), 1)
    fraction = min(1.0, max(settings.within_subject_sampling_fraction, MIN_SAMPLES * coarsest))
    mean, maps, history = visits[0].t1, [], []
    for round_ in range(settings.within_subject_rounds):
        reference = Visit(mean, affine, {}, {})
        # the first mean is the first visit on its own grid: its map is the identity
        maps = [np.eye(4) if round_ == 0 and k == 0 else
                rigid_alignment(reference, visit, settings, parameters, fraction)
                for k, visit in enumerate(visits)]  # fmt: skip
        centre = np.linalg.inv(average_map(maps, rigid=settings.rigid_space))
        maps = [m @ centre for m in maps]
        new = _mean_image(visits, maps, affine, shape)
        brain = (new > 0) | (mean > 0)
        history.append(float(np.sqrt(np.mean((new[brain] - mean[brain]) ** 2)
                                     / np.mean(mean[brain] ** 2))))  # fmt: skip
        mean = new
        if history[-1] < settings.within_subject_tolerance:
            break
    to_rescan = []
    for rescan in rescans:
        if rescan is None:
            to_rescan.append(None)
            continue
        try:
            to_rescan.append(rigid_alignment(reference, rescan, settings, parameters, fraction)
                             @ centre)  # fmt: skip
        except RuntimeError:  # the rescan is then aligned to its scan on its own
            to_rescan.append(None)
    carried = [np.linalg.inv(m) @ t for m, t in zip(maps, template_to_native, strict=True)]
    return {
        "mean": mean,
        "affine": affine,
        "mean_to_visit": maps,
        "mean_to_rescan": to_rescan,
        "template_to_mean": average_map(carried, rigid=False),
        "rounds": len(history),
        "mean_change": history,
    }


def pair_log_jacobian(earlier: np.ndarray, later: np.ndarray, grid: np.ndarray,
                      settings) -> np.ndarray:  # fmt: skip
    """log det of the demons map earlier -> later (:func:`demons_jacobian`) between two
    working-grid images (RAS, ``grid``): the follow-up / baseline local volume ratio on
    the earlier visit's grid points, as the network's forward map has it. float32."""
    levels = zip(settings.target_demons_shrink_factors, settings.target_demons_iterations,
                 strict=True)  # fmt: skip
    determinant = demons_jacobian(to_sitk(earlier, grid), to_sitk(later, grid), settings, levels)
    return np.log(np.clip(determinant, 1e-3, None)).astype(np.float32)


def subject_key(keys: list[str], rescans: dict[str, str], settings) -> str:
    """Cache key of a participant's entry: its visits' scan keys, their rescans' (scan key
    -> rescan key), the settings that shape it (:data:`SETTINGS`, and
    :data:`TARGET_SETTINGS` with targets) and the version."""
    names = SETTINGS + (TARGET_SETTINGS if settings.jacobian_targets else ())
    shaping = {name: value for name, value in asdict(settings).items() if name in names}
    pairs = [f"{k}>{rescans[k]}" for k in keys if k in rescans]
    digest = hashlib.sha256(f"{'/'.join(keys + pairs)}/{__version__}/{SUBJECT_FORMAT}".encode())
    digest.update(json.dumps(shaping, sort_keys=True).encode())
    return digest.hexdigest()[:20]


def align_participant(
    work: str, keys: list[str], rescans: dict[str, str], regions_raw: dict, settings
) -> dict:
    """One participant's entry (its visits' scan ``keys``, oldest first; ``rescans``: the
    prepared same-day rescan of a visit, scan key -> rescan key), from the cache or
    computed and cached; ``{"key": ..., "failed": reason}`` when it cannot be made
    (nothing of it is left then).

    Runs in a worker process. The entry is locked while it is checked and written.
    """
    layout = Layout(Path(work))
    key = subject_key(keys, rescans, settings)
    entry = layout.subject(key)
    with exclusive(entry.lock):
        if entry.result.is_file():
            return {"key": key, "cached": True}
        if entry.folder.exists():  # a half-written entry from an interrupted run
            shutil.rmtree(entry.folder)
        try:
            _write_entry(layout, entry, keys, rescans, RegionSet.from_dict(regions_raw),
                         settings)  # fmt: skip
        except (PredictorError, RuntimeError, OSError, ValueError, ArithmeticError) as error:
            shutil.rmtree(entry.folder, ignore_errors=True)
            return {"key": key, "failed": str(error).splitlines()[0]}
    return {"key": key, "cached": False}


def _write_entry(layout: Layout, entry: SubjectFiles, keys: list[str], rescans: dict[str, str],
                 regions: RegionSet, settings) -> None:  # fmt: skip
    """Compute and write a participant's entry; result.json last (it marks it complete)."""
    from predictor.prepare import GRID_FIELDS, grid_arrays, save_grid

    read = [Visit.read_with_head(layout.scan(k).folder, regions) for k in keys]
    results = [layout.scan(k).read_result() for k in keys]
    rescan_keys = [rescans[k] for k in keys if k in rescans]
    space = subject_space(
        [visit for visit, _ in read],
        [np.asarray(r["template_to_native"], dtype=float) for r in results],
        settings,
        [_rescan(layout, k, regions) for k in rescan_keys],
    )
    grid = np.asarray(results[0]["diagnostics"]["grid_affine"], dtype=float)
    shape = tuple(results[0]["diagnostics"]["grid_shape"])
    visits, images = {}, {}
    for k, (visit, head), to_visit in zip(keys, read, space["mean_to_visit"], strict=True):
        shared = to_visit @ space["template_to_mean"]
        arrays = grid_arrays(head, visit.mask, visit.tissue, list(visit.deep.values()),
                             visit.affine, shared, grid, shape)  # fmt: skip
        save_grid({name: arrays[name] for name in GRID_FIELDS}, grid, entry.visit(k))
        visits[k] = {"mean_to_visit": to_visit.tolist(), "template_to_native": shared.tolist()}
        images[k] = arrays["grid_t1"]
    missing = []  # a pair whose target fails has none; the space itself stands
    for i, earlier in enumerate(keys if settings.jacobian_targets else []):
        for later in keys[i + 1 :]:
            try:
                measured = pair_log_jacobian(images[earlier], images[later], grid, settings)
            except (RuntimeError, ValueError, ArithmeticError) as error:
                missing.append([earlier, later, str(error).splitlines()[0]])
                continue
            save_array(measured, grid, entry.log_jacobian(earlier, later))
    save_array(space["mean"], space["affine"], entry.mean)
    write_json(
        entry.result,
        {
            "visits": visits,
            "rescans": {k: {"mean_to_visit": m.tolist()}
                        for k, m in zip(rescan_keys, space["mean_to_rescan"], strict=True)
                        if m is not None},  # fmt: skip
            "template_to_mean": space["template_to_mean"].tolist(),
            "rounds": space["rounds"],
            "mean_change": space["mean_change"],
            "targets_failed": missing,
        },
    )


def _rescan(layout: Layout, key: str, regions: RegionSet) -> Visit | None:
    """A rescan's prepared visit, or None where its files cannot be read (it is then
    aligned to its scan on its own; the participant's space stands)."""
    try:
        return Visit.read(layout.scan(key).folder, regions)
    except (OSError, ValueError, KeyError):
        return None


def align_participants(
    work: str | Path, volumes: pd.DataFrame, regions: RegionSet, settings, jobs: int = 1,
    progress=None,
) -> tuple[dict[str, str], list[dict]]:  # fmt: skip
    """Every participant's within-subject entry (those with two or more visits in the
    volume table ``volumes``).

    Returns the entry's key of each visit's scan key, and the participants whose stage
    failed (rows for failures.tsv).
    """
    from predictor.parallel import run_all
    from predictor.preprocess import single_threaded_itk

    # a rescan's map from the mean is used only when the space is rigid (see
    # predictor.longitudinal.shared_space)
    rescans = prepared_rescans(Layout(Path(work))) if settings.rigid_space else {}
    groups = [
        (participant, visits["key"].tolist())
        for participant, visits in volumes.sort_values("age", kind="stable").groupby(
            "participant_id", sort=True
        )
        if len(visits) > 1
    ]
    arguments = [(str(work), keys, {k: rescans[k] for k in keys if k in rescans}, regions.raw,
                  settings) for _, keys in groups]  # fmt: skip
    results = run_all(align_participant, arguments, jobs, progress, single_threaded_itk)
    spaces, failures = {}, []
    for (participant, keys), result in zip(groups, results, strict=True):
        if "failed" in result:
            failures.append(failure_row(participant, "", "within-subject space", result))
            continue
        spaces |= dict.fromkeys(keys, result["key"])
    return spaces, failures
