"""The workspace (WORK) written by ``predictor prepare``: its one owner of file names.

Layout::

    prepare.json         template, settings, regions and cohort coding of this workspace
    cohort.tsv           the validated cohort with each scan's cache key (and its
                         same-day rescan's, rescan_key, where it has one)
    scans/<key>/         one folder per scan; result.json is written last and
                         marks the entry complete (anything else is redone)
        grid_T1w.nii.gz      normalised T1 on the working grid (template space)
        grid_mask.nii.gz     brain mask on the working grid
        grid_probseg.nii.gz  GM, WM, CSF probabilities on the working grid (4D)
        grid_regions.nii.gz  each deep region's tissue fraction inside the region, in
                             the regions file's order, on the working grid (4D)
        native_dseg.nii.gz   most likely tissue in the scan's own space (1 GM, 2 WM, 3 CSF)
        native_T1w.nii.gz    bias-corrected, normalised T1 in the scan's own space
                             (whole head; native_dseg > 0 is the brain)
        native_probseg.nii.gz  GM, WM, CSF probabilities, then each deep region's
                             tissue fraction, in the scan's own space (4D)
        result.json          volumes, native<->template transforms, fit diagnostics
    subjects/<key>/      one folder per participant with two or more visits: every
                         visit in one within-subject space (predictor.within_subject);
                         result.json is written last and marks the entry complete
        <scan key>/grid_*.nii.gz  that visit's working-grid images (names as in scans/),
                             through the participant's one transform to the template
        mean_T1w.nii.gz      the participant's mean brain image
        <earlier key>_<later key>_logjac.nii.gz  each pair of visits' log-Jacobian of
                             a demons registration on the working grid (a training
                             target; with [longitudinal] jacobian_targets = true)
        result.json          each visit's map from the mean and to the template, and
                             each same-day rescan's map from the mean
    pairs/<key>.json     change between two visits of a participant measured by
                         registration (predictor.longitudinal); one file per pair
    volumes.tsv          one row per scan: its covariates (if any), its participant's
                         within-subject entry (within_subject; empty: the scan's own
                         working grid), regions in mL and % of total brain volume
    changes.tsv          per participant and pair of visits: each region's change
                         by registration and by segmentation
    rescans.tsv          per scan with a same-day rescan: each region's change from
                         the scan to its rescan (the measurement's noise floor)
    failures.tsv         scans (and visit pairs) that failed, with the reason

No other module spells these names: it asks a :class:`Layout` or a
:class:`ScanFiles` for the path.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from predictor.config import CohortSettings
from predictor.errors import DataError
from predictor.regions import RegionSet
from predictor.volumes import percent_of_brain

#: identifying columns of volumes.tsv, before the key and the regions
TSV_ID = ("participant_id", "session_id", "age", "sex", "diagnosis")
#: volumes.tsv's column naming a scan's within-subject entry (after the key)
WITHIN_SUBJECT = "within_subject"


@dataclass(frozen=True)
class Entry:
    """A cache entry's folder: its lock file beside it, and result.json, written last."""

    folder: Path

    @property
    def lock(self) -> Path:
        return self.folder.parent / f".{self.folder.name}.lock"

    result = property(lambda self: self.folder / "result.json")

    def read_result(self) -> dict:
        return json.loads(self.result.read_text())


@dataclass(frozen=True)
class ScanFiles(Entry):
    """The files of one prepared scan (a cache entry)."""

    t1 = property(lambda self: self.folder / "grid_T1w.nii.gz")
    mask = property(lambda self: self.folder / "grid_mask.nii.gz")
    tissue = property(lambda self: self.folder / "grid_probseg.nii.gz")
    regions = property(lambda self: self.folder / "grid_regions.nii.gz")
    labels = property(lambda self: self.folder / "native_dseg.nii.gz")
    native_t1 = property(lambda self: self.folder / "native_T1w.nii.gz")
    native_maps = property(lambda self: self.folder / "native_probseg.nii.gz")


@dataclass(frozen=True)
class SubjectFiles(Entry):
    """The files of one participant's within-subject entry."""

    mean = property(lambda self: self.folder / "mean_T1w.nii.gz")

    def visit(self, key: str) -> ScanFiles:
        """The working-grid images of the visit whose scan key is ``key``."""
        return ScanFiles(self.folder / key)

    def log_jacobian(self, earlier: str, later: str) -> Path:
        """The measured log-Jacobian map of the visits (scan keys) ``earlier`` -> ``later``."""
        return self.folder / f"{earlier}_{later}_logjac.nii.gz"


@dataclass(frozen=True)
class Layout:
    """Paths of a workspace folder."""

    root: Path

    def __post_init__(self):
        object.__setattr__(self, "root", Path(self.root))

    prepare_json = property(lambda self: self.root / "prepare.json")
    cohort = property(lambda self: self.root / "cohort.tsv")
    volumes = property(lambda self: self.root / "volumes.tsv")
    failures = property(lambda self: self.root / "failures.tsv")
    changes = property(lambda self: self.root / "changes.tsv")
    rescans = property(lambda self: self.root / "rescans.tsv")

    def pair(self, key: str) -> Path:
        return self.root / "pairs" / f"{key}.json"

    def scan(self, key: str) -> ScanFiles:
        return ScanFiles(self.root / "scans" / key)

    def subject(self, key: str) -> SubjectFiles:
        return SubjectFiles(self.root / "subjects" / key)

    def grid(self, key: str, subject: object = None) -> ScanFiles:
        """The working-grid images of scan ``key``: its participant's within-subject entry
        ``subject`` (volumes.tsv's within_subject) where it has one, else its own."""
        if isinstance(subject, str) and subject:
            return self.subject(subject).visit(key)
        return self.scan(key)

    def read_volumes(self, covariates: tuple[str, ...] = ()) -> pd.DataFrame:
        """volumes.tsv, its keys as text and its ``covariates`` columns as written."""
        return read_table(self.volumes, covariates, {"key": str, WITHIN_SUBJECT: str})

    def read_cohort(self, covariates: tuple[str, ...] = ()) -> pd.DataFrame:
        """cohort.tsv, its ``covariates`` columns as written (see :func:`read_table`)."""
        if not self.cohort.is_file():
            raise DataError(f"{self.root}: not a prepared workspace (cohort.tsv missing)")
        return read_table(self.cohort, covariates, {"key": str, "rescan_key": str})


def read_table(path: Path, text: tuple[str, ...] = (), dtype: dict | None = None) -> pd.DataFrame:
    """A workspace TSV; the ``text`` columns (covariates) exactly as written, "" for none,
    so that a level such as "01" or "None" is not read as a number or a missing value."""
    table = pd.read_csv(path, sep="\t", dtype=dtype)
    if text:
        raw = pd.read_csv(path, sep="\t", usecols=list(text), dtype=str, keep_default_na=False)
        table[list(text)] = raw[list(text)]
    return table


@dataclass(frozen=True)
class Workspace:
    """A prepared workspace: its volume table, working grid, regions and cohort coding."""

    layout: Layout
    volumes: pd.DataFrame  # one row per complete scan (volumes.tsv), sorted by participant, age
    grid_affine: np.ndarray  # (4, 4) RAS mm
    grid_shape: tuple[int, int, int]
    template: str
    prepare_settings: dict
    regions: RegionSet
    cohort: CohortSettings

    @property
    def root(self) -> Path:
        return self.layout.root


def read_workspace(work: str | os.PathLike[str]) -> Workspace:
    """Read ``volumes.tsv`` and ``prepare.json`` of a prepared workspace."""
    layout = Layout(Path(work))
    for path in (layout.volumes, layout.prepare_json):
        if not path.is_file():
            raise DataError(f"{layout.root}: not a prepared workspace ({path.name} missing); "
                            "run prepare")
    prepared = json.loads(layout.prepare_json.read_text())
    if "regions" not in prepared or "cohort" not in prepared:
        raise DataError(f"{layout.prepare_json}: written by an older version; rerun prepare")
    cohort = CohortSettings.from_dict(prepared["cohort"], str(layout.prepare_json))
    volumes = layout.read_volumes(cohort.covariate_names)
    if volumes.empty:
        raise DataError(f"{layout.volumes}: no prepared scans")
    diagnostics = layout.scan(volumes["key"].iloc[0]).read_result()["diagnostics"]
    return Workspace(
        layout,
        volumes.sort_values(["participant_id", "age"], kind="stable").reset_index(drop=True),
        np.asarray(diagnostics["grid_affine"], dtype=float),
        tuple(int(n) for n in diagnostics["grid_shape"]),
        prepared["template"],
        prepared["settings"],
        RegionSet.from_dict(prepared["regions"], str(layout.prepare_json)),
        cohort,
    )


def volume_table(
    layout: Layout, regions: RegionSet, covariates: tuple[str, ...] = ()
) -> pd.DataFrame:
    """Volume table of a workspace's complete entries: the ``covariates`` columns of
    cohort.tsv, then volumes in mL and % of total brain volume."""
    rows = []
    identifiers = (*TSV_ID, *covariates)
    for record in layout.read_cohort(tuple(covariates)).to_dict("records"):
        files = layout.scan(record["key"])
        if files.result.is_file():
            volumes = files.read_result()["volumes_ml"]
            rows.append(
                {key: record[key] for key in identifiers}
                | {"key": record["key"]}
                | volumes
                | percent_of_brain(volumes)
            )
    names = regions.names
    columns = [*identifiers, "key", *names, *(f"{r}_pct_tbv" for r in names)]
    return pd.DataFrame(rows, columns=columns)
