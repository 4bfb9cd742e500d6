"""``predictor prepare``: a cohort -> a workspace of prepared scans, with a content cache.

Workspace layout (WORK)::

    prepare.json         template and settings of this workspace
    cohort.tsv           the validated cohort with each scan's cache key
    scans/<key>/         one folder per scan; result.json is written last and
                         marks the entry complete (anything else is redone)
        grid_T1w.nii.gz      normalised T1 on the working grid (template space)
        grid_mask.nii.gz     brain mask on the working grid
        grid_probseg.nii.gz  GM, WM, CSF probabilities on the working grid (4D)
        grid_regions.nii.gz  left and right hippocampus and ventricles (their tissue
                             fraction inside the region) on the working grid (4D)
        native_dseg.nii.gz   most likely tissue in the scan's own space (1 GM, 2 WM, 3 CSF)
        result.json          volumes, native<->template transforms, fit diagnostics
    volumes.tsv          one row per scan: regions in mL and % of total brain volume
    failures.tsv         scans that failed, with the reason

The cache key hashes the image (and mask) bytes, the settings and the
template, so a second run does no work for unchanged scans, and a shard of a
cluster array job (``--shard K/N``) writes only its own entries.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from dataclasses import asdict, dataclass, field
from functools import lru_cache
from pathlib import Path

import numpy as np
import pandas as pd

from predictor import __version__
from predictor.config import CONFIG_DIR, read_toml
from predictor.errors import ConfigError, PredictorError, ScanError
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
from predictor.segment import fit_mixture
from predictor.spatial import grid_affine
from predictor.templates import DEEP_REGIONS, TISSUES, Template, load_template
from predictor.volumes import (
    REGIONS,
    percent_of_brain,
    region_volumes,
    unmixed_fraction,
)


@dataclass(frozen=True)
class PrepareSettings:
    """All settings of the prepare stage (defaults in ``configs/prepare.toml``)."""

    grid_mm: float
    grid_margin_mm: float
    n4: dict = field(default_factory=dict)
    registration: dict = field(default_factory=dict)
    mask: dict = field(default_factory=dict)
    segmentation: dict = field(default_factory=dict)
    checks: dict = field(default_factory=dict)

    def __post_init__(self):
        if not 1.0 <= self.grid_mm <= 8.0:
            raise ConfigError(f"grid_mm must be within 1-8 mm, got {self.grid_mm}")

    @classmethod
    def from_toml(cls, path: str | os.PathLike[str] | None = None, **overrides) -> PrepareSettings:
        raw = read_toml(Path(path) if path else CONFIG_DIR / "prepare.toml")
        raw |= {key: value for key, value in overrides.items() if value is not None}
        try:
            return cls(**raw)
        except TypeError as error:
            raise ConfigError(f"prepare settings: {error}") from error

    @classmethod
    def from_dict(cls, stored: dict) -> PrepareSettings:
        """Settings recorded by a run (e.g. in model.json), completed with today's defaults."""
        defaults = asdict(cls.from_toml())
        merged = {
            key: defaults[key] | value if isinstance(value, dict) else value
            for key, value in stored.items()
            if key in defaults
        }
        return cls(**(defaults | merged))

    def fingerprint(self) -> str:
        return json.dumps(asdict(self), sort_keys=True)


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
    """
    single_threaded_itk()
    data, affine = scan.data, scan.affine
    voxel_mm = float(scan.voxel_size_mm.mean())
    head = head_mask(data) if given_mask is None else given_mask
    corrected, _ = n4_correct(data, affine, head, settings.n4)
    if registration is None:
        registration = register_affine(corrected, affine, template, settings.registration)
    if registration.metric > float(settings.registration["max_metric"]):
        raise ScanError(f"registration did not converge (metric {registration.metric:.3f})")
    scale = abs(float(np.linalg.det(registration.template_to_native[:3, :3])))
    low, high = settings.registration["volume_scale"]
    if not low <= scale <= high:
        raise ScanError(f"registration implausible: template volume scaled by {scale:.2f}")
    native_to_template = np.linalg.inv(registration.template_to_native)

    def to_native(array):
        return resample(array, template.affine, affine, data.shape, native_to_template)

    priors = np.stack([to_native(template.priors[tissue]) for tissue in TISSUES], axis=-1)
    if given_mask is None:
        carried = to_native(template.brain_mask.astype(np.float32))
        rough = corrected / white_matter_scale(corrected, priors[..., 1], carried > 0.5)
        brain = refine_brain_mask(carried, rough, voxel_mm, settings.mask)
    else:
        brain = given_mask
    if brain.sum() == 0:
        raise ScanError("the brain mask is empty")
    normalised = corrected / white_matter_scale(corrected, priors[..., 1], brain)
    posterior, mixture = fit_mixture(
        normalised[brain],
        priors[brain],
        int(settings.segmentation["em_iterations"]),
        float(settings.segmentation["prior_floor"]),
        float(settings.segmentation["csf_core_prior"]),
    )
    tissue = {name: np.zeros(data.shape, np.float32) for name in TISSUES}
    for index, name in enumerate(TISSUES):
        tissue[name][brain] = posterior[:, index]
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
    if grown:  # a grown region (with its partial-volume rim) is not also part of another
        claimed = np.max(grown, axis=0)
        for spec in template.regions:
            if not spec.grow_mm:
                content, weight = regions[spec.name]
                regions[spec.name] = (content, weight * (1.0 - claimed))
    deep = {name: content * weight for name, (content, weight) in regions.items()}
    volumes = region_volumes(tissue, deep, scan.voxel_volume_ml)
    low, high = settings.checks["brain_ml"]
    if not low <= volumes["brain"] <= high:
        raise ScanError(f"brain volume {volumes['brain']:.0f} mL is outside {low:g}-{high:g} mL")

    grid, shape = working_grid(template, settings)
    to_grid = registration.template_to_native

    def onto_grid(array):
        return resample(array, affine, grid, shape, to_grid)

    labels = np.zeros(data.shape, np.uint8)
    labels[brain] = np.argmax(posterior, axis=1).astype(np.uint8) + 1
    return PreparedScan(
        volumes=volumes,
        template_to_native=registration.template_to_native,
        grid_t1=onto_grid(normalised),
        grid_mask=onto_grid(brain.astype(np.float32)) > 0.5,
        grid_tissue=np.stack([onto_grid(tissue[name]) for name in TISSUES], axis=-1),
        grid_regions=np.stack([onto_grid(deep[name]) for name in DEEP_REGIONS], axis=-1),
        native_tissue=tissue,
        native_deep=deep,
        native_labels=labels,
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


# --- workspace: cache, parallel scans, shards -------------------------------------------------
SCANS = "scans"
RESULT = "result.json"
TSV_ID = ("participant_id", "session_id", "age", "sex", "diagnosis")
#: bumped whenever a cache entry gains or changes a file, so older entries are redone
CACHE_FORMAT = 2


def scan_key(row, settings: PrepareSettings, template: Template) -> str:
    """Cache key: hash of the image (and mask) bytes, the settings, the template and version."""
    digest = hashlib.sha256()
    digest.update(sha256_file(row["image"]).encode())
    if row.get("brain_mask"):
        digest.update(sha256_file(row["brain_mask"]).encode())
    digest.update(settings.fingerprint().encode())
    digest.update(template.checksum.encode())
    digest.update(f"{__version__}/{CACHE_FORMAT}".encode())
    return digest.hexdigest()[:20]


@lru_cache(maxsize=2)
def cached_template(spec: str) -> Template:
    """:func:`~predictor.templates.load_template`, kept for the process (two at most)."""
    return load_template(spec)


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


def _run_scan(row: dict, folder: str, template_spec: str, settings: PrepareSettings) -> dict:
    """Prepare one scan into its cache folder; return its result or its failure reason.

    The entry is locked while it is checked and written, so two runs on one
    workspace take turns on a scan instead of deleting each other's work.
    """
    folder = Path(folder)
    with exclusive(folder.parent / f".{folder.name}.lock"):
        if (folder / RESULT).is_file():
            return json.loads((folder / RESULT).read_text()) | {"cached": True}
        if folder.exists():  # a half-written entry from an interrupted run is never trusted
            shutil.rmtree(folder)
        return _prepare_entry(row, folder, template_spec, settings)


def _prepare_entry(row: dict, folder: Path, template_spec: str, settings: PrepareSettings):
    try:
        scan = load_scan(row["image"])
        mask = None
        if row.get("brain_mask"):
            mask_scan = load_scan(row["brain_mask"])
            if mask_scan.data.shape != scan.data.shape:
                raise ScanError(
                    f"{Path(row['brain_mask']).name}: brain mask shape "
                    f"{mask_scan.data.shape} differs from the scan's {scan.data.shape}"
                )
            mask = mask_scan.data > 0.5
        prepared = prepare_scan(scan, cached_template(template_spec), settings, mask)
    except PredictorError as error:
        return {"failed": redact_folders(str(error), row["image"], row.get("brain_mask"))}
    grid = np.asarray(prepared.diagnostics["grid_affine"])
    save_array(prepared.grid_t1, grid, folder / "grid_T1w.nii.gz")
    save_array(prepared.grid_mask.astype(np.uint8), grid, folder / "grid_mask.nii.gz", np.uint8)
    save_array(prepared.grid_tissue, grid, folder / "grid_probseg.nii.gz")
    save_array(prepared.grid_regions, grid, folder / "grid_regions.nii.gz")
    save_array(
        prepared.native_labels, prepared.native_affine, folder / "native_dseg.nii.gz", np.uint8
    )
    result = {
        "volumes_ml": prepared.volumes,
        "template_to_native": prepared.template_to_native.tolist(),
        "native_to_template": np.linalg.inv(prepared.template_to_native).tolist(),
        "image_name": Path(row["image"]).name,
        "diagnostics": prepared.diagnostics,
    }
    write_json(folder / RESULT, result)
    return result | {"cached": False}


def prepare_cohort(
    cohort: pd.DataFrame,
    work: str | os.PathLike[str],
    template: str = "mni152",
    settings: PrepareSettings | None = None,
    jobs: int = 1,
    shard: tuple[int, int] = (1, 1),
    progress=None,
) -> dict:
    """Prepare every scan of a validated cohort (or one shard of it) into ``work``.

    Returns counts: prepared, cached, failed; writes ``volumes.tsv`` and
    ``failures.tsv`` from all complete entries of the cohort.
    """
    settings = settings or PrepareSettings.from_toml()
    work = Path(work)
    template_spec = str(template) if str(template) == "mni152" else str(Path(template).resolve())
    loaded = cached_template(template_spec)
    rows = cohort.to_dict("records")
    keys = [scan_key(row, settings, loaded) for row in rows]
    part, parts = shard
    mine = [index for index, key in enumerate(keys) if int(key, 16) % parts == part - 1]
    write_json(
        work / "prepare.json",
        {"template": template_spec, "settings": asdict(settings), "version": __version__},
    )
    write_tsv(work / "cohort.tsv", cohort.assign(key=keys))
    arguments = [(rows[i], str(work / SCANS / keys[i]), template_spec, settings) for i in mine]
    results = dict(zip(mine, run_all(_run_scan, arguments, jobs, progress), strict=True))
    summary = {
        "prepared": sum(not r.get("cached") and "failed" not in r for r in results.values()),
        "cached": sum(bool(r.get("cached")) for r in results.values()),
        "failed": sum("failed" in r for r in results.values()),
    }
    failures = [
        {
            "participant_id": rows[i]["participant_id"],
            "session_id": rows[i]["session_id"],
            "image": Path(rows[i]["image"]).name,
            "reason": r["failed"],
        }
        for i, r in sorted(results.items())
        if "failed" in r
    ]
    write_tsv(
        work / "failures.tsv",
        pd.DataFrame(failures, columns=["participant_id", "session_id", "image", "reason"]),
    )
    write_tsv(work / "volumes.tsv", workspace_volumes(work))
    return summary


def workspace_volumes(work: str | os.PathLike[str]) -> pd.DataFrame:
    """Volume table of a workspace's complete entries: mL and % of total brain volume."""
    work = Path(work)
    if not (work / "cohort.tsv").is_file():
        raise ConfigError(f"{work}: not a prepared workspace (cohort.tsv missing)")
    cohort = pd.read_csv(work / "cohort.tsv", sep="\t", dtype={"key": str})
    rows = []
    for record in cohort.to_dict("records"):
        result = work / SCANS / record["key"] / RESULT
        if result.is_file():
            volumes = json.loads(result.read_text())["volumes_ml"]
            rows.append(
                {key: record[key] for key in TSV_ID}
                | {"key": record["key"]}
                | volumes
                | percent_of_brain(volumes)
            )
    columns = [*TSV_ID, "key", *REGIONS, *(f"{r}_pct_tbv" for r in REGIONS)]
    return pd.DataFrame(rows, columns=columns)
