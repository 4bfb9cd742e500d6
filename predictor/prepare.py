"""``predictor prepare``: a cohort -> a workspace of prepared scans, with a content cache.

The workspace's files are named by :mod:`predictor.workspace`. The cache key
hashes the image (and mask) bytes, the settings, the template and the region
set, so a second run does no work for unchanged scans, and a shard of a
cluster array job (``--shard K/N``) writes only its own entries.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from predictor import __version__
from predictor.config import CohortSettings, load_settings
from predictor.errors import CohortError, ConfigError, PredictorError, ScanError
from predictor.files import exclusive, redact_folders, sha256_file, write_json, write_tsv
from predictor.nifti import Scan, load_scan, save_array
from predictor.parallel import run_all
from predictor.preprocess import (
    Registration,
    grow_region,
    head_mask,
    n4_correct,
    refine_brain_mask,
    register_affine,
    resample,
    single_threaded_itk,
    white_matter_scale,
)
from predictor.regions import TISSUES, TOTAL_BRAIN, RegionSet
from predictor.segment import fit_mixture
from predictor.spatial import grid_affine
from predictor.templates import Template, load_template
from predictor.volumes import region_volumes, unmixed_fraction
from predictor.workspace import WITHIN_SUBJECT, Layout, ScanFiles, volume_table


@dataclass(frozen=True)
class N4Settings:
    """N4 bias-field correction (``[n4]`` of ``configs/prepare.toml``)."""

    shrink_factor: int
    fit_spacing_mm: float
    iterations: tuple[int, ...]
    convergence: float


@dataclass(frozen=True)
class RegistrationSettings:
    """Affine registration to the template (``[registration]``)."""

    template_mm: float
    histogram_bins: int
    sampling_fraction: float
    shrink_factors: tuple[int, ...]
    smoothing_mm: tuple[float, ...]
    iterations: int
    learning_rate: float
    min_step_mm: float
    max_metric: float
    max_affine_volume_change: float
    volume_scale: tuple[float, float]

    def __post_init__(self):
        if len(self.shrink_factors) != len(self.smoothing_mm) or len(self.shrink_factors) < 2:
            raise ValueError("'shrink_factors' and 'smoothing_mm' need one entry per level (>= 2)")


@dataclass(frozen=True)
class MaskSettings:
    """Brain-mask refinement (``[mask]``)."""

    threshold_of_wm: float
    dilate_mm: float


@dataclass(frozen=True)
class SegmentationSettings:
    """Tissue mixture fitted by EM (``[segmentation]``)."""

    em_iterations: int
    prior_floor: float
    csf_core_prior: float


@dataclass(frozen=True)
class ChecksSettings:
    """Plausibility checks (``[checks]``)."""

    brain_ml: tuple[float, float]


@dataclass(frozen=True)
class LongitudinalSettings:
    """Change between visits by registration (``[longitudinal]``; predictor.longitudinal)."""

    enabled: bool
    demons: bool  # False: regions without a boundary get no change by registration
    rigid_shrink_factors: tuple[int, ...]
    rigid_smoothing_mm: tuple[float, ...]
    rigid_iterations: int
    rigid_min_step_mm: float
    demons_shrink_factors: tuple[int, ...]
    demons_iterations: tuple[int, ...]
    demons_field_sd_voxels: float
    histogram_levels: int
    differential_bias_mm: float  # 0: none; else its median window (predictor.longitudinal)
    within_subject: bool  # every visit of a participant in one space (predictor.within_subject)
    within_subject_parameters: int  # 6 (rigid), 9 (and three scales) or 12 (affine)
    within_subject_rounds: int
    within_subject_tolerance: float
    within_subject_sampling_fraction: float
    jacobian_targets: bool  # each pair of visits' log-Jacobian map (a training target)
    target_demons_shrink_factors: tuple[int, ...]  # the pairs' log-Jacobian training targets
    target_demons_iterations: tuple[int, ...]

    @property
    def rigid_space(self) -> bool:
        """The registrations to a participant's mean are rigid (6 parameters): their maps
        are poses only, so they may align the change between two of its scans."""
        return self.within_subject_parameters == 6

    def __post_init__(self):
        if len(self.rigid_shrink_factors) != len(self.rigid_smoothing_mm):
            raise ValueError("'rigid_shrink_factors' and 'rigid_smoothing_mm' need equal lengths")
        if self.within_subject_parameters not in (6, 9, 12):
            raise ValueError("'within_subject_parameters' must be 6, 9 or 12, got "
                             f"{self.within_subject_parameters}")  # fmt: skip
        if self.within_subject_rounds < 1:
            raise ValueError("'within_subject_rounds' must be at least 1")
        levels = (self.target_demons_shrink_factors, self.target_demons_iterations)
        if not levels[0] or len(levels[0]) != len(levels[1]):
            raise ValueError("'target_demons_shrink_factors' and 'target_demons_iterations' "
                             "need equal, non-zero lengths")  # fmt: skip
        if min(levels[0]) < 1 or min(levels[1]) < 1:
            raise ValueError("target demons shrink factors and iterations must be at least 1")
        if not 0.0 < self.within_subject_sampling_fraction <= 1.0:
            raise ValueError("'within_subject_sampling_fraction' must be within (0, 1]")
        if self.differential_bias_mm < 0:
            raise ValueError("'differential_bias_mm' must be 0 (off) or a width in mm")
        if len(self.demons_shrink_factors) != len(self.demons_iterations):
            raise ValueError("'demons_shrink_factors' and 'demons_iterations' need equal lengths")


@dataclass(frozen=True)
class PrepareSettings:
    """All settings of the prepare stage (``configs/prepare.toml``)."""

    grid_mm: float
    grid_margin_mm: float
    n4: N4Settings
    registration: RegistrationSettings
    mask: MaskSettings
    segmentation: SegmentationSettings
    checks: ChecksSettings
    longitudinal: LongitudinalSettings

    def __post_init__(self):
        if not 1.0 <= self.grid_mm <= 8.0:
            raise ValueError(f"'grid_mm' must be within 1-8 mm, got {self.grid_mm}")

    @classmethod
    def from_toml(cls, path: str | os.PathLike[str] | None = None, **overrides) -> PrepareSettings:
        """``configs/prepare.toml`` with the file at ``path`` over it, then ``overrides``
        (keyword per key, a dict per section)."""
        given = {key: value for key, value in overrides.items() if value is not None}
        return load_settings(cls, "prepare.toml", path, overrides=given)

    @classmethod
    def from_dict(cls, stored: dict) -> PrepareSettings:
        """Settings recorded by a run (e.g. in model.json), completed with today's defaults.

        ``[longitudinal] boundary_width_voxels`` of earlier versions is dropped: the band
        is now each region's ``boundary`` setting, whose default (2 voxels, no trim) is
        what that setting was. A run recorded before ``differential_bias_mm`` existed
        measured without that correction: 0 (off), not today's default.
        """
        stored = dict(stored)
        if "longitudinal" in stored:
            longitudinal = dict(stored["longitudinal"])
            longitudinal.pop("boundary_width_voxels", None)
            longitudinal.setdefault("differential_bias_mm", 0.0)
            stored["longitudinal"] = longitudinal
        return load_settings(cls, "prepare.toml", overrides=stored)

    def fingerprint(self) -> str:
        """The settings that shape one scan's entry (the longitudinal stage has its own)."""
        per_scan = {k: v for k, v in asdict(self).items() if k != "longitudinal"}
        return json.dumps(per_scan, sort_keys=True)


@dataclass(frozen=True, eq=False)
class PreparedScan:
    """Everything computed for one scan (arrays in RAS order)."""

    volumes: dict[str, float]
    template_to_native: np.ndarray
    grid_t1: np.ndarray
    grid_mask: np.ndarray
    grid_tissue: np.ndarray  # (X, Y, Z, 3) GM, WM, CSF
    grid_regions: np.ndarray  # (X, Y, Z, 3) templates.DEEP_REGIONS
    native_tissue: dict[str, np.ndarray]  # GM, WM, CSF probabilities, the scan's RAS grid
    native_deep: dict[str, np.ndarray]  # each deep region's tissue fraction, same grid
    native_labels: np.ndarray  # uint8, the scan's RAS grid
    native_t1: np.ndarray  # bias-corrected, white matter 1, the scan's RAS grid, 0 off the brain
    native_head: np.ndarray  # the same over the whole head (what the working grid shows)
    native_affine: np.ndarray
    diagnostics: dict


def working_grid(template: Template, settings: PrepareSettings):
    """RAS affine and shape of the working grid: the template brain box plus a margin."""
    index = np.argwhere(template.brain_mask)
    corners = np.stack([index.min(axis=0), index.max(axis=0)]).astype(float)
    world = np.c_[corners, np.ones(2)] @ template.affine.T
    low, high = world[:, :3].min(axis=0), world[:, :3].max(axis=0)
    margin = settings.grid_margin_mm
    return grid_affine(low - margin, high + margin, settings.grid_mm)


def prepare_scan(
    scan: Scan,
    template: Template,
    settings: PrepareSettings,
    given_mask: np.ndarray | None = None,
    registration: Registration | None = None,
) -> PreparedScan:
    """Bias correction, registration, brain mask, normalisation, segmentation, volumes.

    A known ``registration`` (template -> native) skips the registration step.
    Regions are those of ``template.region_set``. For sums that repeat bit for
    bit, run :func:`~predictor.preprocess.single_threaded_itk` once per process
    first (the cohort's workers and the forecast do).
    """
    data, affine = scan.data, scan.affine
    head = head_mask(data) if given_mask is None else given_mask
    corrected, _ = n4_correct(data, affine, head, settings.n4)
    registration = _checked_registration(corrected, affine, template, settings, registration)
    native_to_template = np.linalg.inv(registration.template_to_native)

    def to_native(array):
        return resample(array, template.affine, affine, data.shape, native_to_template)

    priors = np.stack([to_native(template.priors[tissue]) for tissue in TISSUES], axis=-1)
    brain = given_mask
    if brain is None:
        brain = _brain_mask(scan, corrected, priors, template, to_native, settings)
    if brain.sum() == 0:
        raise ScanError("the brain mask is empty")
    normalised = corrected / white_matter_scale(corrected, priors[..., 1], brain)
    posterior, mixture = fit_mixture(
        normalised[brain],
        priors[brain],
        settings.segmentation.em_iterations,
        settings.segmentation.prior_floor,
        settings.segmentation.csf_core_prior,
    )
    tissue = {name: np.zeros(data.shape, np.float32) for name in TISSUES}
    for index, name in enumerate(TISSUES):
        tissue[name][brain] = posterior[:, index]
    deep = _deep_regions(template, tissue, normalised, brain, mixture, to_native, scan)
    volumes = region_volumes(tissue, deep, scan.voxel_volume_ml, template.region_set)
    low, high = settings.checks.brain_ml
    if not low <= volumes[TOTAL_BRAIN] <= high:
        raise ScanError(
            f"brain volume {volumes[TOTAL_BRAIN]:.0f} mL is outside {low:g}-{high:g} mL"
        )
    labels = np.zeros(data.shape, np.uint8)
    labels[brain] = np.argmax(posterior, axis=1).astype(np.uint8) + 1
    grid, shape = working_grid(template, settings)
    deep_names = template.region_set.deep
    on_grid = grid_arrays(normalised, brain, tissue, [deep[name] for name in deep_names], affine,
                          registration.template_to_native, grid, shape)  # fmt: skip
    return PreparedScan(
        volumes=volumes,
        template_to_native=registration.template_to_native,
        **on_grid,
        native_tissue=tissue,
        native_deep=deep,
        native_labels=labels,
        native_t1=np.where(brain, normalised, 0.0).astype(np.float32),
        native_head=normalised.astype(np.float32),
        native_affine=affine,
        diagnostics={
            "registration_metric": registration.metric,
            "registration_iterations": registration.iterations,
            "registration_stop": registration.stop,
            "mixture": mixture,
            "grid_affine": grid.tolist(),
            "grid_shape": list(shape),
        },
    )


#: the working-grid fields of a :class:`PreparedScan`, as :func:`grid_arrays` returns them
GRID_FIELDS = ("grid_t1", "grid_mask", "grid_tissue", "grid_regions")


def grid_arrays(head, brain, tissue: dict, deep: list, affine, template_to_native, grid, shape):
    """A visit's working-grid arrays (:data:`GRID_FIELDS`).

    ``head`` (normalised T1), ``brain`` (mask), the ``tissue`` maps (GM, WM, CSF) and
    the ``deep`` regions' maps (in the regions file's order) lie on the scan's RAS grid
    (``affine``); each is resampled once, linearly, through ``template_to_native``
    (template point -> scan point, mm) onto the working grid (``grid``, ``shape``).
    """

    def onto_grid(array):
        return resample(array, affine, grid, shape, template_to_native)

    return {
        "grid_t1": onto_grid(head),
        "grid_mask": onto_grid(brain.astype(np.float32)) > 0.5,
        "grid_tissue": np.stack([onto_grid(tissue[name]) for name in TISSUES], axis=-1),
        "grid_regions": np.stack([onto_grid(array) for array in deep], axis=-1),
    }


def save_grid(arrays: dict, grid: np.ndarray, files: ScanFiles) -> None:
    """Write :func:`grid_arrays`' arrays as ``files``' working-grid images."""
    save_array(arrays["grid_t1"], grid, files.t1)
    save_array(arrays["grid_mask"].astype(np.uint8), grid, files.mask, np.uint8)
    save_array(arrays["grid_tissue"], grid, files.tissue)
    save_array(arrays["grid_regions"], grid, files.regions)


def template_on_grid(template: Template, settings: PrepareSettings):
    """The template itself as a prepared scan would be on the working grid.

    Returns (T1, brain mask, tissue (D, H, W, 3), deep regions (D, H, W, n)): the
    image input of a population-field model, which sees the same template for
    every participant and so learns from age, sex and diagnosis alone.
    """
    grid, shape = working_grid(template, settings)

    def onto_grid(array):
        return resample(array, template.affine, grid, shape, np.eye(4))

    tissue = {name: onto_grid(template.priors[name]) for name in TISSUES}
    deep = [
        onto_grid(spec.mask.astype(np.float32) * template.priors[spec.tissue])
        for spec in template.regions
    ]
    return (
        onto_grid(template.t1),
        onto_grid(template.brain_mask.astype(np.float32)) > 0.5,
        np.stack([tissue[name] for name in TISSUES], axis=-1),
        np.stack(deep, axis=-1),
    )


def _checked_registration(corrected, affine, template, settings, registration) -> Registration:
    """The template -> native registration (computed unless given), checked for plausibility."""
    if registration is None:
        registration = register_affine(corrected, affine, template, settings.registration)
    if registration.metric > settings.registration.max_metric:
        raise ScanError(f"registration did not converge (metric {registration.metric:.3f})")
    scale = abs(float(np.linalg.det(registration.template_to_native[:3, :3])))
    low, high = settings.registration.volume_scale
    if not low <= scale <= high:
        raise ScanError(f"registration implausible: template volume scaled by {scale:.2f}")
    return registration


def _brain_mask(scan, corrected, priors, template, to_native, settings) -> np.ndarray:
    """The template brain mask carried to the scan and refined on its intensities."""
    carried = to_native(template.brain_mask.astype(np.float32))
    rough = corrected / white_matter_scale(corrected, priors[..., 1], carried > 0.5)
    return refine_brain_mask(carried, rough, float(scan.voxel_size_mm.mean()), settings.mask)


def _deep_regions(template, tissue, normalised, brain, mixture, to_native, scan) -> dict:
    """Each deep region's tissue fraction inside its carried mask (native grid).

    A grown region (with its partial-volume rim) is not also part of another.
    """
    voxel_mm = float(scan.voxel_size_mm.mean())
    regions = {}
    for spec in template.regions:
        content = tissue[spec.tissue]
        if spec.unmix_with:
            pure, other = mixture[f"{spec.tissue}_mean"], mixture[f"{spec.unmix_with}_mean"]
            content = np.where(brain, unmixed_fraction(normalised, pure, other), 0.0)
        weight = to_native(spec.mask.astype(np.float32))
        if spec.grow_mm:
            weight = grow_region(weight > 0.5, content, voxel_mm, spec.grow_mm)
        regions[spec.name] = (content, weight)
    grown = [regions[spec.name][1] for spec in template.regions if spec.grow_mm]
    if grown:
        claimed = np.max(grown, axis=0)
        for spec in template.regions:
            if not spec.grow_mm:
                content, weight = regions[spec.name]
                regions[spec.name] = (content, weight * (1.0 - claimed))
    return {name: content * weight for name, (content, weight) in regions.items()}


# --- workspace: cache, parallel scans, shards -------------------------------------------------
#: bumped whenever a cache entry gains or changes a file, so older entries are redone
CACHE_FORMAT = 5
_TEMPLATES: dict[tuple[str, str], Template] = {}


def scan_key(row, settings: PrepareSettings, template: Template) -> str:
    """Cache key: hash of the image (and mask) bytes, the settings, template, regions, version."""
    digest = hashlib.sha256()
    digest.update(sha256_file(row["image"]).encode())
    if row.get("brain_mask"):
        digest.update(sha256_file(row["brain_mask"]).encode())
    digest.update(settings.fingerprint().encode())
    digest.update(template.checksum.encode())
    digest.update(template.region_set.fingerprint.encode())
    digest.update(f"{__version__}/{CACHE_FORMAT}".encode())
    return digest.hexdigest()[:20]


def cached_template(spec: str, regions: RegionSet) -> Template:
    """:func:`~predictor.templates.load_template`, kept for the process (two at most).

    Keyed by the template and the region set's content, so a model or workspace
    with other regions never reuses masks made for these.
    """
    key = (str(spec), regions.fingerprint)
    if key not in _TEMPLATES:
        while len(_TEMPLATES) >= 2:
            _TEMPLATES.pop(next(iter(_TEMPLATES)))
        _TEMPLATES[key] = load_template(spec, regions)
    return _TEMPLATES[key]


def parse_shard(text: str | None) -> tuple[int, int]:
    """'K/N' -> (K, N) with 1 <= K <= N; None -> (1, 1)."""
    if text is None:
        return 1, 1
    try:
        part, parts = (int(value) for value in text.split("/"))
    except ValueError:
        raise ConfigError(f"--shard must look like K/N (e.g. 3/10), got '{text}'") from None
    if not 1 <= part <= parts:
        raise ConfigError(f"--shard {text}: K must be within 1..N")
    return part, parts


def _run_scan(row: dict, folder: str, template_spec: str, regions: dict, settings) -> dict:
    """Prepare one scan into its cache folder; return its result or its failure reason.

    Runs in a worker process (ITK made single-threaded there, once). The entry
    is locked while it is checked and written, so two runs on one workspace
    take turns on a scan instead of deleting each other's work.
    """
    files = ScanFiles(Path(folder))
    with exclusive(files.lock):
        if files.result.is_file():
            return files.read_result() | {"cached": True}
        if files.folder.exists():  # a half-written entry from an interrupted run is never trusted
            shutil.rmtree(files.folder)
        template = cached_template(template_spec, RegionSet.from_dict(regions))
        return _prepare_entry(row, files, template, settings)


def _load_row(row: dict) -> tuple[Scan, np.ndarray | None]:
    """The scan of a cohort row and its given brain mask (or None)."""
    scan = load_scan(row["image"])
    if not row.get("brain_mask"):
        return scan, None
    mask_scan = load_scan(row["brain_mask"])
    if mask_scan.data.shape != scan.data.shape:
        raise ScanError(
            f"{Path(row['brain_mask']).name}: brain mask shape "
            f"{mask_scan.data.shape} differs from the scan's {scan.data.shape}"
        )
    return scan, mask_scan.data > 0.5


def native_maps(files: ScanFiles, regions: RegionSet) -> tuple[dict, dict]:
    """A cached entry's native region maps as written by :func:`_prepare_entry`: GM, WM,
    CSF probabilities and each deep region's tissue fraction (float32, RAS order)."""
    import nibabel as nib

    maps = np.asarray(nib.load(files.native_maps).dataobj, dtype=np.float32)
    tissue = {name: maps[..., k] for k, name in enumerate(TISSUES)}
    deep = {name: maps[..., len(TISSUES) + k] for k, name in enumerate(regions.deep)}
    return tissue, deep


def read_prepared(files: ScanFiles, scan: Scan, regions: RegionSet) -> PreparedScan:
    """A scan's preparation as the workspace cached it (what :func:`_prepare_entry` wrote),
    so a forecast of a prepared scan need not prepare it again. ``scan`` is the scan
    itself (its RAS affine is taken exactly, not from the float32 NIfTI header)."""
    import nibabel as nib

    def array(path, dtype=np.float32):
        return np.asarray(nib.load(path).dataobj, dtype=dtype)

    result = files.read_result()
    tissue, deep = native_maps(files, regions)
    grid_t1 = array(files.t1)
    labels = array(files.labels, np.uint8)
    head = array(files.native_t1)
    return PreparedScan(
        volumes=result["volumes_ml"],
        template_to_native=np.asarray(result["template_to_native"], dtype=float),
        grid_t1=grid_t1,
        grid_mask=array(files.mask, np.uint8) > 0,
        grid_tissue=array(files.tissue),
        grid_regions=array(files.regions).reshape(*grid_t1.shape, -1),
        native_tissue=tissue,
        native_deep=deep,
        native_labels=labels,
        native_t1=np.where(labels > 0, head, 0.0).astype(np.float32),
        native_head=head,
        native_affine=scan.affine,
        diagnostics=result["diagnostics"],
    )


def _prepare_entry(row: dict, files: ScanFiles, template: Template, settings) -> dict:
    try:
        scan, mask = _load_row(row)
        prepared = prepare_scan(scan, template, settings, mask)
    except PredictorError as error:
        return {"failed": redact_folders(str(error), row["image"], row.get("brain_mask"))}
    grid = np.asarray(prepared.diagnostics["grid_affine"])
    save_grid({name: getattr(prepared, name) for name in GRID_FIELDS}, grid, files)
    save_array(prepared.native_labels, prepared.native_affine, files.labels, np.uint8)
    save_array(prepared.native_head, prepared.native_affine, files.native_t1)
    maps = [prepared.native_tissue[name] for name in TISSUES]
    maps += [prepared.native_deep[name] for name in template.region_set.deep]
    save_array(np.stack(maps, axis=-1), prepared.native_affine, files.native_maps)
    result = {
        "volumes_ml": prepared.volumes,
        "template_to_native": prepared.template_to_native.tolist(),
        "native_to_template": np.linalg.inv(prepared.template_to_native).tolist(),
        "image_name": Path(row["image"]).name,
        "diagnostics": prepared.diagnostics,
    }
    write_json(files.result, result)
    return result | {"cached": False}


def scan_count(cohort: pd.DataFrame) -> int:
    """Scans :func:`prepare_cohort` prepares for a validated cohort: its visits and their
    same-day rescans."""
    return len(cohort) + int(cohort["rescan"].notna().sum())


def prepare_cohort(
    cohort: pd.DataFrame,
    work: str | os.PathLike[str],
    template: str = "mni152",
    settings: PrepareSettings | None = None,
    jobs: int = 1,
    shard: tuple[int, int] = (1, 1),
    progress=None,
    regions: RegionSet | None = None,
    coding: CohortSettings | None = None,
    progress_pairs=None,
    progress_subjects=None,
) -> dict:
    """Prepare every scan of a validated cohort (or one shard of it) into ``work``.

    ``regions`` and ``coding`` (the cohort settings the table was read with)
    default to the shipped ``configs/``; both are recorded in the workspace.
    Returns counts: prepared, cached, failed (scans and same-day rescans; and,
    with the longitudinal stage on and no shard, within_subject (participants
    in a within-subject space), pairs, pairs_failed and rescans measured);
    writes ``volumes.tsv``, ``changes.tsv``, ``rescans.tsv`` and ``failures.tsv``
    from all complete entries.
    ``progress_pairs()`` is called after each visit pair and rescan, ``progress_subjects()``
    after each participant's within-subject space (:mod:`predictor.within_subject`).
    """
    settings = settings or PrepareSettings.from_toml()
    regions = regions or RegionSet.from_toml()
    coding = coding or CohortSettings.from_toml()
    clash = sorted(set(coding.covariate_names) & {*regions.names, *(f"{r}_pct_tbv" for r in
                                                                     regions.names)})  # fmt: skip
    if clash:
        raise ConfigError(f"covariate '{clash[0]}' has the name of a region; rename it")
    layout = Layout(Path(work))
    template_spec = str(template) if str(template) == "mni152" else str(Path(template).resolve())
    loaded = cached_template(template_spec, regions)
    rows = cohort.to_dict("records")
    keys = [scan_key(row, settings, loaded) for row in rows]
    # a same-day rescan is prepared as a scan of its own (no given mask), never as a visit
    rescans = {i: row | {"image": row["rescan"], "brain_mask": None}
               for i, row in enumerate(rows) if isinstance(row.get("rescan"), str)}  # fmt: skip
    rescan_keys = {i: scan_key(row, settings, loaded) for i, row in rescans.items()}
    for i in rescan_keys:
        if rescan_keys[i] == keys[i]:
            raise CohortError(
                f"{rows[i]['rescan']}: the same bytes as its scan {rows[i]['image']}; a rescan "
                "must be a new acquisition"
            )
    entries = [(row, keys[i], row["session_id"]) for i, row in enumerate(rows)]
    entries += [(row, rescan_keys[i], f"{row['session_id']} rescan") for i, row in rescans.items()]
    part, parts = shard
    mine = [index for index, (_, key, _) in enumerate(entries) if int(key, 16) % parts == part - 1]
    write_json(
        layout.prepare_json,
        {
            "template": template_spec,
            "settings": asdict(settings),
            "regions": regions.raw,
            "cohort": coding.to_dict(),
            "version": __version__,
        },
    )
    write_tsv(
        layout.cohort,
        cohort.assign(key=keys, rescan_key=[rescan_keys.get(i, "") for i in range(len(rows))]),
    )
    arguments = [
        (entries[i][0], str(layout.scan(entries[i][1]).folder), template_spec, regions.raw,
         settings)
        for i in mine
    ]  # fmt: skip
    outcomes = run_all(_run_scan, arguments, jobs, progress, initializer=single_threaded_itk)
    results = dict(zip(mine, outcomes, strict=True))
    summary = {
        "prepared": sum(not r.get("cached") and "failed" not in r for r in results.values()),
        "cached": sum(bool(r.get("cached")) for r in results.values()),
        "failed": sum("failed" in r for r in results.values()),
    }
    failures = [
        {
            "participant_id": entries[i][0]["participant_id"],
            "session_id": entries[i][2],
            "image": Path(entries[i][0]["image"]).name,
            "reason": r["failed"],
        }
        for i, r in sorted(results.items())
        if "failed" in r
    ]
    table = volume_table(layout, regions, coding.covariate_names)
    spaces = {}
    if settings.longitudinal.enabled and settings.longitudinal.within_subject and parts == 1:
        from predictor.within_subject import align_participants

        spaces, space_failures = align_participants(
            layout.root, table, regions, settings.longitudinal, jobs, progress_subjects
        )
        failures += space_failures
        summary["within_subject"] = len(set(spaces.values()))
    table.insert(table.columns.get_loc("key") + 1, WITHIN_SUBJECT,
                 [spaces.get(key, "") for key in table["key"]])  # fmt: skip
    write_tsv(layout.volumes, table)
    if settings.longitudinal.enabled and parts == 1:
        from predictor.longitudinal import measure_changes, measure_rescans

        changes, pair_failures = measure_changes(
            layout.root, regions, settings.longitudinal, jobs, progress_pairs
        )
        rescanned, rescan_failures = measure_rescans(
            layout.root, regions, settings.longitudinal, jobs, progress_pairs
        )
        failures += pair_failures + rescan_failures
        summary |= {"pairs": len(changes), "pairs_failed": len(pair_failures),
                    "rescans": len(rescanned)}  # fmt: skip
    elif parts == 1:  # no rescan measured by this run: no noise floor from an earlier one
        layout.rescans.unlink(missing_ok=True)
    write_tsv(
        layout.failures,
        pd.DataFrame(failures, columns=["participant_id", "session_id", "image", "reason"]),
    )
    return summary


def workspace_volumes(work: str | os.PathLike[str]) -> pd.DataFrame:
    """Volume table of a workspace's complete entries (its own recorded regions)."""
    layout = Layout(Path(work))
    if not layout.prepare_json.is_file():
        raise ConfigError(f"{work}: not a prepared workspace (prepare.json missing)")
    recorded = json.loads(layout.prepare_json.read_text())
    source = str(layout.prepare_json)
    covariates = ()  # a workspace prepared before covariates records no cohort settings
    if "cohort" in recorded:
        covariates = CohortSettings.from_dict(recorded["cohort"], source).covariate_names
    return volume_table(layout, RegionSet.from_dict(recorded["regions"], source), covariates)
