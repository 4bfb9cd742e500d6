"""Change between two visits of a participant, measured by registration.

For each participant, the baseline visit (the youngest age) is paired with
every later visit. Both visits' bias-corrected, normalised native images and
region maps come from their prepared scan entries. The later visit is
rigidly aligned to the earlier: through the participant's within-subject
space (:mod:`predictor.within_subject`) where both visits have one and it is
rigid, so that every pair of a participant shares one set of poses and
swapping the visits gives exactly the inverse map; otherwise by a rigid
registration of the pair (6 parameters, Mattes mutual information,
multi-resolution). A same-day rescan of a visit in a rigid within-subject
space is registered to its participant's mean as the visits were (it does not
shape the mean, so its floor is, if anything, a little pessimistic for the
visits); other rescans are registered to their scan directly. A
diffeomorphic demons registration (Vercauteren et al.
2009, NeuroImage, "Diffeomorphic demons: efficient non-parametric image
registration"; SimpleITK's ``DiffeomorphicDemonsRegistrationFilter``) then
maps the later visit onto the earlier and, separately, the earlier onto the
later. Demons was chosen over a B-spline registration because it recovers
local volume change at the voxel scale at a few seconds per 2 mm pair, and
its diffeomorphic variant keeps the Jacobian determinant positive.

Before either, the moved visit's slowly varying intensity difference from the
fixed one (what the bias corrections of the two scans left) is divided out:
differential bias correction after Lewis and Fox 2004, :func:`differential_bias`
(not for the training targets of :mod:`predictor.within_subject`).

Each region's volume ratio later / earlier is measured on the earlier
visit's grid (forward) and earlier / later on the later's (backward); the
change is their geometric mean, ``sqrt(forward / backward)``: swapping the
visits inverts it up to the rigid alignment (inverse consistent), and what
either direction's interpolation loses partly cancels. One way:

* a region with a ``boundary`` in the regions file (whole brain, hippocampi,
  ventricles) gets the boundary shift integral (Freeborough and Fox 1997):
  the intensity change across its edge between the aligned visits, in the
  window between the two tissues' intensities. The Jacobian of a smooth
  field blurs a thin ribbon's shrinkage with the expansion of the CSF beside
  it (measured on realistic phantoms: whole-brain change almost lost);
* every other region gets the Jacobian determinant of the demons map
  (SimpleITK's ``DisplacementFieldJacobianDeterminantFilter``) integrated
  over the visit's own region maps.

The segmentation's change (the difference of the two visits' own
volumes) is reported beside it in ``changes.tsv``. With ``demons = false``
only the boundary regions get a change by registration.

A scan with a same-day rescan (the same anatomy, a new acquisition) is
measured against it in the same way (``rescans.tsv``): every change found
there is noise, and its median absolute value per region is the
measurement's noise floor (:func:`noise_floor`).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import asdict, dataclass
from pathlib import Path
from types import SimpleNamespace

import nibabel as nib
import numpy as np
import pandas as pd
import SimpleITK as sitk

from predictor import __version__
from predictor.errors import PredictorError
from predictor.files import write_json, write_tsv
from predictor.preprocess import run_registration
from predictor.regions import RegionSet
from predictor.spatial import affine_to_matrix, from_sitk, matrix_to_transform, to_sitk
from predictor.volumes import region_volumes
from predictor.workspace import WITHIN_SUBJECT, Layout

#: changes when a pair's measurement does (2: demons' coarse levels smooth both images;
#: 3: aligned through the within-subject space; 4: differential bias correction; 5: its
#: field extended by a quadratic and median-filtered separably)
PAIR_FORMAT = 5
#: columns of changes.tsv, before one pair of columns per region
CHANGE_ID = ("participant_id", "session_from", "session_to", "years")
#: marks a rescan's row in a pair of scans (:func:`rescan_pairs`)
RESCAN = "rescan"
#: columns of rescans.tsv, before the same pairs of columns
RESCAN_ID = ("participant_id", "session_id")


@dataclass(frozen=True, eq=False)
class Visit:
    """One prepared visit on its native grid: normalised T1 (zero outside the brain) and
    region maps (GM, WM, CSF probabilities and each deep region's tissue fraction)."""

    t1: np.ndarray
    affine: np.ndarray
    tissue: dict[str, np.ndarray]
    deep: dict[str, np.ndarray]

    @classmethod
    def of(cls, prepared) -> Visit:
        """The visit of a :class:`~predictor.prepare.PreparedScan` (its native arrays)."""
        return cls(prepared.native_t1, prepared.native_affine, prepared.native_tissue,
                   prepared.native_deep)  # fmt: skip

    @classmethod
    def read(cls, folder: Path, regions: RegionSet) -> Visit:
        """The visit of a prepared scan entry (its native_* files)."""
        return cls.read_with_head(folder, regions)[0]

    @classmethod
    def read_with_head(cls, folder: Path, regions: RegionSet) -> tuple[Visit, np.ndarray]:
        """:meth:`read`, and the entry's normalised T1 over the whole head."""
        from predictor.prepare import native_maps
        from predictor.workspace import ScanFiles

        files = ScanFiles(folder)
        image = nib.load(files.native_t1)  # the whole head; the brain is native_dseg > 0
        head = np.asarray(image.dataobj, dtype=np.float32)
        brain = np.asarray(nib.load(files.labels).dataobj) > 0
        tissue, deep = native_maps(files, regions)
        t1 = np.where(brain, head, 0.0).astype(np.float32)
        return cls(t1, image.affine, tissue, deep), head

    @property
    def voxel_ml(self) -> float:
        return abs(float(np.linalg.det(self.affine[:3, :3]))) / 1000.0

    @property
    def voxel_mm(self) -> np.ndarray:
        """The voxel's sides (3,), mm."""
        return np.linalg.norm(self.affine[:3, :3], axis=0)

    @property
    def mask(self) -> np.ndarray:
        return self.t1 > 0

    def image(self) -> sitk.Image:
        return to_sitk(self.t1, self.affine)


#: SimpleITK transform of each number of registration parameters (rigid, 3 scales, affine)
TRANSFORMS = {6: sitk.Euler3DTransform, 9: sitk.ScaleVersor3DTransform,
              12: lambda: sitk.AffineTransform(3)}  # fmt: skip


def rigid_alignment(
    fixed: Visit, moving: Visit, settings, parameters: int = 6, sampling_fraction: float = 0.3
) -> np.ndarray:
    """4x4 RAS matrix mapping fixed points (mm) to moving points: a rigid registration
    (or, with ``parameters`` 9 or 12, one with three scales or affine) of the brains; the
    metric samples ``sampling_fraction`` of the fixed brain's voxels."""
    fixed_image, moving_image = fixed.image(), moving.image()
    initial = sitk.CenteredTransformInitializer(
        fixed_image,
        moving_image,
        TRANSFORMS[parameters](),
        sitk.CenteredTransformInitializerFilter.MOMENTS,
    )
    options = SimpleNamespace(
        histogram_bins=48,
        sampling_fraction=sampling_fraction,
        learning_rate=1.0,
        min_step_mm=settings.rigid_min_step_mm,
        iterations=settings.rigid_iterations,
        shrink_factors=settings.rigid_shrink_factors,
        smoothing_mm=settings.rigid_smoothing_mm,
    )
    mask = to_sitk(_dilated(fixed.mask, 2).astype(np.uint8), fixed.affine)
    transform, _ = run_registration(fixed_image, mask, moving_image, initial, options)
    return affine_to_matrix(transform)


def aligned_t1(fixed: Visit, moving: Visit, settings, cubic: bool = False) -> np.ndarray:
    """``moving``'s T1 rigidly registered to ``fixed`` and resampled onto its grid
    (trilinear, or a cubic B-spline with ``cubic``)."""
    matrix = rigid_alignment(fixed, moving, settings)
    interpolator = sitk.sitkBSpline if cubic else sitk.sitkLinear
    return from_sitk(_onto(moving.image(), fixed.image(), matrix, interpolator))[0]


def _dilated(mask: np.ndarray, iterations: int) -> np.ndarray:
    from scipy import ndimage

    return ndimage.binary_dilation(mask, iterations=iterations)


def _onto(
    image: sitk.Image, reference: sitk.Image, matrix: np.ndarray | None,
    interpolator=sitk.sitkLinear,
) -> sitk.Image:
    """``image`` resampled onto ``reference``'s grid (``matrix``: reference -> image points)."""
    transform = sitk.Transform() if matrix is None else matrix_to_transform(matrix)
    return sitk.Resample(image, reference, transform, interpolator, 0.0, sitk.sitkFloat32)


def demons_jacobian(fixed: sitk.Image, moving: sitk.Image, settings, levels=None) -> np.ndarray:
    """Jacobian determinant (RAS array on ``fixed``'s grid) of the map fixed -> moving.

    ``levels`` ((shrink factor, iterations), coarse to fine) default to the
    ``demons_*`` settings; a field that ends coarser than ``fixed`` is resampled
    (linearly, in mm; the nearest value beyond its last centres) onto its grid
    before it is differentiated.

    ``moving`` must already lie on ``fixed``'s grid. The images are handed to
    demons with an identity direction (``DisplacementFieldJacobianDeterminant``
    differentiates along the array axes, which is only right then; the
    determinant does not depend on the axes' orientation). Multi-resolution:
    each level's field starts from the previous level's, resampled.
    """
    fixed, moving = _axis_aligned(fixed), _axis_aligned(moving)
    moving = sitk.HistogramMatching(
        moving, fixed, settings.histogram_levels, 7, thresholdAtMeanIntensity=True
    )
    field = None
    if levels is None:
        levels = zip(settings.demons_shrink_factors, settings.demons_iterations, strict=True)
    for shrink, iterations in levels:
        # both images smoothed and shrunk alike: an unsmoothed moving image reads as change
        level_fixed = fixed if shrink == 1 else _shrunk(fixed, shrink)
        level_moving = moving if shrink == 1 else _shrunk(moving, shrink)
        if field is None:
            start = sitk.Image(level_fixed.GetSize(), sitk.sitkVectorFloat64, 3)
            start.CopyInformation(level_fixed)
        else:
            start = sitk.Resample(field, level_fixed, sitk.Transform(), sitk.sitkLinear, 0.0)
        demons = sitk.DiffeomorphicDemonsRegistrationFilter()
        demons.SetNumberOfIterations(int(iterations))
        demons.SetSmoothDisplacementField(True)
        demons.SetStandardDeviations(settings.demons_field_sd_voxels)
        field = demons.Execute(level_fixed, level_moving, start)
    if field.GetSize() != fixed.GetSize():  # the border beyond the coarse grid's last centres
        field = sitk.Resample(field, fixed, sitk.Transform(), sitk.sitkLinear, 0.0,
                              field.GetPixelID(), True)  # takes its nearest value, not zero
    determinant = sitk.GetArrayFromImage(sitk.DisplacementFieldJacobianDeterminant(field))
    return np.transpose(determinant, (2, 1, 0)).astype(np.float64)


def _axis_aligned(image: sitk.Image) -> sitk.Image:
    """The same voxels and spacing with an identity direction and zero origin."""
    out = sitk.GetImageFromArray(sitk.GetArrayFromImage(image))
    out.SetSpacing(image.GetSpacing())
    return out


def _shrunk(image: sitk.Image, factor: int) -> sitk.Image:
    """``image`` smoothed (SD half the new spacing) and resampled ``factor`` times coarser."""
    spacing = np.asarray(image.GetSpacing()) * factor
    smooth = sitk.SmoothingRecursiveGaussian(image, (spacing / 2).tolist())
    size = [max(1, int(round(n / factor))) for n in image.GetSize()]
    return sitk.Resample(
        smooth,
        size,
        sitk.Transform(),
        sitk.sitkLinear,
        image.GetOrigin(),
        spacing.tolist(),
        image.GetDirection(),
        0.0,
        sitk.sitkFloat32,
    )


def pair_change(
    earlier: Visit, later: Visit, regions: RegionSet, settings, earlier_to_later=None
) -> dict:
    """Each region's volume ratio later / earlier (see the module docstring).

    ``earlier_to_later`` (4x4, mm: earlier points -> later points) is the visits'
    alignment where it is known; by default a rigid registration of the pair.
    Returns ``{"ratio": {region: r}, "forward": {...}, "backward": {...}}``:
    the symmetric ratio and the two one-way measurements (forward on the
    earlier visit's grid, later / earlier; backward on the later's, earlier / later).
    """
    if earlier_to_later is None:
        earlier_to_later = rigid_alignment(earlier, later, settings)
    forward = _one_way(earlier, later, earlier_to_later, regions, settings)
    backward = _one_way(later, earlier, np.linalg.inv(earlier_to_later), regions, settings)
    # a non-positive one-way ratio (a boundary shift larger than a small region) is a
    # failed measurement: that region is left out of this pair
    ratio = {
        name: float(np.sqrt(forward[name] / backward[name]))
        for name in forward
        if name in backward and forward[name] > 0 and backward[name] > 0
    }
    return {"ratio": ratio, "forward": forward, "backward": backward}


#: tissue probability of a "pure" voxel (the boundary shift's window, the bias ratio)
PURE = 0.9


def _one_way(fixed: Visit, moving: Visit, fixed_to_moving, regions: RegionSet, settings) -> dict:
    """Volume ratio moving / fixed of every region, measured on ``fixed``'s grid.

    Regions with a ``boundary`` get the boundary shift integral; the others the
    demons Jacobian integrated over ``fixed``'s region maps (none without demons).
    Both read the moved image after differential bias correction, its ratio taken over
    pure white matter in both visits only: atrophy widens sulcal CSF all over the
    cortex, and a ratio over all brain tissue takes that for bias (on template-anatomy
    phantoms it removed most of the whole brain's measured change). The costs: a change
    of white matter's own intensity (lesions, ageing) is taken for bias, and on the
    tuning cohort the ventricles were measured worse with it (configs/prepare.toml).
    """
    fixed_image = fixed.image()

    def moved(array):
        return from_sitk(_onto(to_sitk(array, moving.affine), fixed_image, fixed_to_moving))[0]

    moved_t1 = moved(moving.t1)
    moved_tissue = {name: moved(array) for name, array in moving.tissue.items()}
    fixed_maps = regions.maps(np.stack([*fixed.tissue.values(), *fixed.deep.values()]))
    moved_maps = regions.maps(
        np.stack([*moved_tissue.values(), *(moved(array) for array in moving.deep.values())])
    )
    if settings.differential_bias_mm > 0:
        pure_wm = (fixed.tissue["WM"] > PURE) & (moved_tissue["WM"] > PURE)
        moved_t1 = moved_t1 * differential_bias(
            fixed.t1, moved_t1, pure_wm, fixed.voxel_mm, settings.differential_bias_mm
        )
    before = region_volumes(fixed.tissue, fixed.deep, fixed.voxel_ml, regions)
    ratios = {}
    if settings.demons:
        determinant = demons_jacobian(fixed_image, to_sitk(moved_t1, fixed.affine), settings)
        after = region_volumes(fixed.tissue, fixed.deep, fixed.voxel_ml, regions, determinant)
        ratios = {name: after[name] / before[name] for name in regions.names if before[name] > 0}
    for k, region in enumerate(regions.regions):
        if region.boundary is None or before[region.name] <= 0:
            continue
        boundary = region.boundary
        shift = boundary_shift(
            fixed.t1,
            moved_t1,
            fixed_maps[k] > 0.5,
            moved_maps[k] > 0.5,
            [_pure_intensity(fixed, tissue) for tissue in (boundary.outside, boundary.inside)],
            boundary.band_voxels,
            boundary.trim,
        )
        ratios[region.name] = 1.0 + shift * fixed.voxel_ml / before[region.name]
    return ratios


def differential_bias(
    fixed: np.ndarray, moved: np.ndarray, mask: np.ndarray, voxel_mm, window_mm: float
) -> np.ndarray:
    """Differential bias correction after Lewis and Fox 2004 (NeuroImage, "Correction of
    differential intensity inhomogeneity in longitudinal MR images"), modified: the
    smooth multiplicative field (array on the images' grid) that takes ``moved``'s
    intensities to ``fixed``'s, where the two aligned images differ by slowly varying
    bias. ``voxel_mm``: the voxel's sides (3,) or side, mm.

    Lewis and Fox median-filter the two images' ratio over the brain (from memory).
    Here the log ratio fixed / moved is taken over ``mask`` only (the caller's pure
    white matter) and averaged in blocks about a fifth of ``window_mm`` wide, and the
    blocks are median-filtered over 5 along each axis in turn (a separable median,
    Narendra 1981, IEEE Trans Pattern Anal Mach Intell; a window about ``window_mm``
    wide; a tenth of the time of the 5 x 5 x 5 cube's), so that the local change of
    atrophy at an edge barely moves it. (It rejects a compact cluster less well than
    the cube's median: 3 x 3 x 3 outlying blocks survive it, where the cube needs 63.)
    Blocks with less than half their voxels in the mask take the value of a quadratic
    in space fitted to the full blocks (a constant where fewer than 30 are full): the
    field where the edges lie (cortex, ventricles) is extrapolated, not measured (the
    residual bias is smooth; a nearest block's value missed a steep field's change by
    4-8%). The filtered log ratio is interpolated linearly back to the voxels and
    exponentiated; the field is 1 outside the box that holds both images' nonzero
    voxels (where it is worked out), and 1 everywhere where no block is full.
    """
    from scipy import ndimage

    field = np.ones(fixed.shape, dtype=np.float32)
    support = np.argwhere((fixed > 0) | (moved > 0))
    if not len(support):
        return field
    box = tuple(slice(low, high + 1)
                for low, high in zip(support.min(0), support.max(0), strict=True))  # fmt: skip
    fixed, moved, mask = fixed[box], moved[box], mask[box]
    sides = np.broadcast_to(np.asarray(voxel_mm, dtype=float), (3,))
    factors = np.maximum(1, np.round(window_mm / 5 / sides)).astype(int)
    shape = np.asarray(fixed.shape)
    padded = -(-shape // factors) * factors
    inside = mask & (fixed > 0) & (moved > 0)
    log_ratio, count, in_box = np.zeros(padded), np.zeros(padded), np.zeros(padded)
    crop = tuple(slice(0, n) for n in shape)
    log_ratio[crop][inside] = np.log(fixed[inside] / moved[inside])
    count[crop][inside] = 1.0
    in_box[crop] = 1.0
    block_shape = [size for n, f in zip(padded, factors, strict=True) for size in (n // f, f)]

    def block_sum(array):
        return array.reshape(block_shape).sum(axis=(1, 3, 5))

    total, voxels = block_sum(log_ratio), block_sum(count)
    full = voxels >= block_sum(in_box) / 2
    if not full.any():
        return field
    coarse = np.where(full, total / np.maximum(voxels, 1.0), 0.0)
    centres = np.indices(full.shape).reshape(3, -1).T / np.asarray(full.shape)
    terms = np.ones((len(centres), 1))
    if full.sum() >= 30:  # three times the quadratic's 10 terms
        products = [centres[:, i] * centres[:, j] for i in range(3) for j in range(i, 3)]
        terms = np.column_stack([terms, centres, *products])
    flat = full.ravel()
    coefficients = np.linalg.lstsq(terms[flat], coarse.ravel()[flat], rcond=None)[0]
    coarse = np.where(full, coarse, (terms @ coefficients).reshape(full.shape))
    for axis in range(3):  # separable: 5 blocks along each axis in turn
        size = [1, 1, 1]
        size[axis] = 5
        coarse = ndimage.median_filter(coarse, size=size, mode="nearest")
    fine = ndimage.zoom(coarse, factors, order=1, mode="nearest", grid_mode=True)
    field[box] = np.exp(fine[crop])
    return field


def _pure_intensity(visit: Visit, tissue: str) -> float:
    """Median normalised intensity of the visit's nearly pure voxels of ``tissue``."""
    pure = visit.tissue[tissue] > PURE
    if pure.sum() < 20:
        raise PredictorError(f"too few pure {tissue} voxels for the boundary shift window")
    return float(np.median(visit.t1[pure]))


def boundary_shift(
    fixed: np.ndarray,
    moved: np.ndarray,
    fixed_region: np.ndarray,
    moved_region: np.ndarray,
    window: list[float],
    width: int,
    trim: float = 0.0,
) -> float:
    """Boundary shift integral (Freeborough and Fox 1997, IEEE Trans Med Imaging): the
    region's volume change (voxels, moved minus fixed) between two aligned images.

    Intensities are clipped to ``window`` = (outside tissue's, inside tissue's
    intensity) less ``trim`` of its width at each end, and their change summed
    over the region's edge (voxels within ``width`` of either visit's region
    boundary), divided by the clipped window's signed width: a voxel that turns
    fully from inside to outside tissue counts one voxel of loss. The trim keeps
    a pure tissue's noise out of the window; without it, each fully changed
    voxel counts short by about 0.8 noise SDs over the window's width.
    """
    from scipy import ndimage

    outside, inside = window
    span = inside - outside
    low, high = sorted((outside + trim * span, inside - trim * span))
    edge = ndimage.binary_dilation(fixed_region | moved_region, iterations=width) & ~(
        ndimage.binary_erosion(fixed_region & moved_region, iterations=width)
    )
    change = np.clip(moved, low, high) - np.clip(fixed, low, high)
    return float(change[edge].sum(dtype=np.float64)) / ((1.0 - 2.0 * trim) * span)


def shared_space(earlier: dict, later: dict, settings) -> str:
    """The within-subject entry (its key) whose poses may align the two scans (their
    volume-table rows), or "" where they have none in common or the space's
    registrations are not rigid (9 or 12 parameters would take global change as pose)."""
    space = earlier.get(WITHIN_SUBJECT, "")
    if not isinstance(space, str) or space != later.get(WITHIN_SUBJECT, ""):
        return ""
    return space if settings.rigid_space else ""


def pair_entry(layout: Layout, earlier: dict, later: dict, settings):
    """A pair's alignment through its shared space (:func:`through_space`, or None) and its
    cache file, keyed by the two scans' keys, that alignment, the other longitudinal
    settings that shape the pair and the version."""
    alignment = through_space(layout, earlier, later, settings)
    shaping = {name: value for name, value in asdict(settings).items()
               if not name.startswith(("within_subject", "target_", "jacobian_"))}  # fmt: skip
    digest = hashlib.sha256(f"{earlier['key']}/{later['key']}/{__version__}/{PAIR_FORMAT}".encode())
    digest.update(json.dumps(shaping, sort_keys=True).encode())
    digest.update(json.dumps(None if alignment is None else alignment.tolist()).encode())
    return alignment, layout.pair(digest.hexdigest()[:20])


def visit_pairs(volumes: pd.DataFrame) -> list[tuple[dict, dict]]:
    """(baseline row, later row) for every later visit of every participant (volumes.tsv)."""
    pairs = []
    for _, visits in volumes.sort_values("age", kind="stable").groupby("participant_id"):
        rows = visits.to_dict("records")
        pairs += [(rows[0], later) for later in rows[1:]]
    return pairs


def _measure_pair(work: str, earlier: dict, later: dict, regions_raw: dict, settings) -> dict:
    """One pair's change, from its cache file or computed and cached (worker process)."""
    layout = Layout(Path(work))
    try:
        alignment, path = pair_entry(layout, earlier, later, settings)
    except (OSError, KeyError, ValueError, TypeError) as error:  # a damaged entry
        return {"failed": f"within-subject entry {earlier.get(WITHIN_SUBJECT)}: {error!r}"}
    if path.is_file():
        return json.loads(path.read_text())
    regions = RegionSet.from_dict(regions_raw)
    try:
        measured = pair_change(
            Visit.read(layout.scan(earlier["key"]).folder, regions),
            Visit.read(layout.scan(later["key"]).folder, regions),
            regions,
            settings,
            alignment,
        )
    except (PredictorError, RuntimeError, OSError) as error:
        return {"failed": str(error).splitlines()[0]}
    write_json(path, measured)  # atomic: a killed run leaves no half-written pair
    return measured


def through_space(layout: Layout, earlier: dict, later: dict, settings) -> np.ndarray | None:
    """The map earlier -> later points (4x4, mm) through the scans' shared space (the
    later scan's map from the mean after the inverse of the earlier's), or None where
    they share none or the entry holds no map of a rescan (its registration to the mean
    failed). A visit missing from its entry (a damaged entry) raises KeyError."""
    space = shared_space(earlier, later, settings)
    if not space:
        return None
    result = layout.subject(space).read_result()
    maps = result["visits"] | result.get("rescans", {})  # entries without rescans have none
    for row in (earlier, later):
        if row["key"] not in maps:
            if row.get(RESCAN) is True:
                return None
            raise KeyError(f"visit {row['key']} is not in its within-subject entry")
    from_mean = [np.asarray(maps[row["key"]]["mean_to_visit"], dtype=float)
                 for row in (earlier, later)]  # fmt: skip
    return from_mean[1] @ np.linalg.inv(from_mean[0])


def _measure_all(layout: Layout, pairs, regions: RegionSet, settings, jobs, progress) -> list:
    """:func:`_measure_pair` of every (earlier row, later row), in worker processes."""
    from predictor.parallel import run_all
    from predictor.preprocess import single_threaded_itk

    arguments = [(str(layout.root), a, b, regions.raw, settings) for a, b in pairs]
    return run_all(_measure_pair, arguments, jobs, progress, single_threaded_itk)


def _change_row(earlier: dict, later: dict, result: dict, regions: RegionSet) -> dict:
    """Each region's % change by registration (where measured) and by segmentation."""
    row = {}
    for name in regions.names:
        if name in result["ratio"]:
            row[f"{name}_pct_registration"] = 100 * (result["ratio"][name] - 1)
        if earlier[name] > 0:
            row[f"{name}_pct_segmentation"] = 100 * (later[name] / earlier[name] - 1)
    return row


def failure_row(participant: str, session: str, what: str, result: dict) -> dict:
    return {"participant_id": participant, "session_id": session, "image": "",
            "reason": f"{what}: {result['failed']}"}  # fmt: skip


def measure_changes(
    work: str | Path, regions: RegionSet, settings, jobs: int = 1, progress=None
) -> tuple[pd.DataFrame, list[dict]]:
    """``changes.tsv`` of a prepared workspace, and the pairs that failed.

    Per participant and pair (baseline, later visit): each region's change (%)
    by registration and by segmentation. A failed pair is reported and skipped.
    """
    layout = Layout(Path(work))
    pairs = visit_pairs(layout.read_volumes())
    results = _measure_all(layout, pairs, regions, settings, jobs, progress)
    rows, failures = [], []
    for (earlier, later), result in zip(pairs, results, strict=True):
        participant = earlier["participant_id"]
        sessions = f"{earlier['session_id']}->{later['session_id']}"
        if "failed" in result:
            failures.append(failure_row(participant, sessions, "change by registration", result))
            continue
        rows.append(
            {
                "participant_id": participant,
                "session_from": earlier["session_id"],
                "session_to": later["session_id"],
                "years": round(later["age"] - earlier["age"], 4),
            }
            | _change_row(earlier, later, result, regions)
        )
    table = pd.DataFrame(rows, columns=list(CHANGE_ID) + _change_columns(regions))
    write_tsv(layout.changes, table)
    return table, failures


def prepared_rescans(layout: Layout) -> dict[str, str]:
    """Scan key -> its same-day rescan's key, for every scan whose rescan is prepared
    (cohort.tsv's rescan_key and a complete entry)."""
    cohort = layout.read_cohort()
    if "rescan_key" not in cohort.columns:
        return {}
    pairs = zip(cohort["key"], cohort["rescan_key"], strict=True)
    return {key: rescan for key, rescan in pairs
            if isinstance(rescan, str) and rescan and layout.scan(rescan).result.is_file()}


def rescan_pairs(layout: Layout) -> list[tuple[dict, dict]]:
    """(scan row, rescan row) of every prepared scan whose same-day rescan is prepared:
    volumes.tsv's row, and the rescan's key and volumes (mL)."""
    rescans = prepared_rescans(layout)
    if not rescans:
        return []
    volumes = layout.read_volumes().set_index("key")
    pairs = []
    for key, rescan in rescans.items():
        if key not in volumes.index:
            continue
        scan = volumes.loc[key].to_dict() | {"key": key}
        pairs.append(
            (scan, layout.scan(rescan).read_result()["volumes_ml"]
             | {"key": rescan, WITHIN_SUBJECT: scan.get(WITHIN_SUBJECT, ""), RESCAN: True})
        )  # fmt: skip
    return pairs


def measure_rescans(
    work: str | Path, regions: RegionSet, settings, jobs: int = 1, progress=None
) -> tuple[pd.DataFrame, list[dict]]:
    """``rescans.tsv`` of a prepared workspace, and the rescan pairs that failed.

    Per scan with a same-day rescan: each region's change (%) from the scan to
    the rescan by registration and by segmentation; the anatomy is the same,
    so all of it is measurement noise.
    """
    layout = Layout(Path(work))
    pairs = rescan_pairs(layout)
    results = _measure_all(layout, pairs, regions, settings, jobs, progress)
    rows, failures = [], []
    for (scan, rescan), result in zip(pairs, results, strict=True):
        participant, session = scan["participant_id"], scan["session_id"]
        if "failed" in result:
            failures.append(failure_row(participant, f"{session} rescan", "rescan", result))
            continue
        rows.append(
            {"participant_id": participant, "session_id": session}
            | _change_row(scan, rescan, result, regions)
        )
    table = pd.DataFrame(rows, columns=[*RESCAN_ID, *_change_columns(regions)])
    write_tsv(layout.rescans, table)
    return table, failures


def noise_floor(layout: Layout, regions: RegionSet) -> pd.DataFrame:
    """The change measurement's scan-rescan noise floor per region (empty without rescans).

    From ``rescans.tsv``, by each method: the number of rescan pairs measured,
    the median change (%; its sign shows a bias), the median absolute change
    (% of the region's volume; 0 for a perfect measurement) and the same as %
    of the scan's total brain volume (the unit of the forecast errors).
    """
    columns = ["region"] + [
        f"{figure}_{method}"
        for method in ("registration", "segmentation")
        for figure in ("pairs", "median_pct", "median_abs_pct", "median_abs_pct_tbv")
    ]
    if not layout.rescans.is_file():
        return pd.DataFrame(columns=columns)
    rescans = pd.read_csv(layout.rescans, sep="\t")
    volumes = layout.read_volumes()
    both = rescans.merge(volumes, on=["participant_id", "session_id"])
    rows = []
    for name in regions.names if len(both) else []:
        row = {"region": name}
        for method in ("registration", "segmentation"):
            change = both[f"{name}_pct_{method}"]
            row[f"pairs_{method}"] = int(change.notna().sum())
            row[f"median_pct_{method}"] = change.median()
            row[f"median_abs_pct_{method}"] = change.abs().median()
            row[f"median_abs_pct_tbv_{method}"] = (
                change.abs() / 100 * both[f"{name}_pct_tbv"]
            ).median()
        rows.append(row)
    return pd.DataFrame(rows, columns=columns)


def _change_columns(regions: RegionSet) -> list[str]:
    return [
        f"{name}_pct_{method}"
        for name in regions.names
        for method in ("registration", "segmentation")
    ]


def observed_by_registration(
    pairs: pd.DataFrame, volumes: pd.DataFrame, layout: Layout, regions: RegionSet
) -> pd.DataFrame:
    """Baseline-to-follow-up ``pairs`` whose ``<region>_follow`` volumes (mL) become the
    baseline volume times the change measured by registration, where changes.tsv has it.

    Only regions with a ``boundary`` (measured by the boundary shift integral) are
    replaced: the demons Jacobian of the others followed the true change worse than
    segmentation on every phantom cohort measured (see configs/compare.toml).
    Columns as :func:`predictor.pairs.visit_pairs`; other pairs and regions are unchanged.
    """
    names = [region.name for region in regions.regions if region.boundary is not None]
    if not layout.changes.is_file():
        return pairs
    changes = pd.read_csv(layout.changes, sep="\t")
    sessions = volumes.set_index("key")["session_id"]
    keyed = changes.set_index(["participant_id", "session_from", "session_to"])
    out = pairs.copy()
    index = list(
        zip(
            pairs["participant_id"],
            sessions.loc[pairs["base_key"]],
            sessions.loc[pairs["follow_key"]],
            strict=True,
        )
    )
    found = [key in keyed.index for key in index]
    for name in names:
        column = f"{name}_pct_registration"
        if column not in keyed.columns:
            continue
        for row, (key, present) in enumerate(zip(index, found, strict=True)):
            if present and np.isfinite(keyed.loc[key, column]):
                out.loc[row, f"{name}_follow"] = pairs.loc[row, name] * (
                    1.0 + keyed.loc[key, column] / 100.0
                )
    return out
