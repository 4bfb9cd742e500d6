"""Preprocessing of one scan: bias field, registration, brain mask, normalisation, resampling.

Pure computation on arrays (RAS voxel order, affines in mm) and SimpleITK
images; file handling lives in :mod:`predictor.prepare`. The registration
result is a 4x4 RAS matrix mapping template points to native points
(``template_to_native``); its inverse takes native points to the template.

ITK filters run single-threaded here: multi-threaded metric sums differ in the
last digits from run to run, and a rerun must give identical volumes.
Parallelism comes from preparing several scans at once (``--jobs``).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from functools import lru_cache

import numpy as np
import SimpleITK as sitk
from scipy import ndimage

from predictor.errors import ScanError
from predictor.spatial import affine_to_matrix, from_sitk, matrix_to_transform, to_sitk
from predictor.templates import Template


def single_threaded_itk() -> None:
    """Make every later SimpleITK filter in this process single-threaded (reproducible sums)."""
    sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(1)


def head_mask(array: np.ndarray) -> np.ndarray:
    """Foreground (head) mask by Otsu's threshold, largest component, holes filled."""
    threshold = sitk.OtsuThreshold(sitk.GetImageFromArray(array.astype(np.float32)), 0, 1)
    mask = sitk.GetArrayFromImage(threshold).astype(bool)
    return largest_component_filled(mask, "no foreground found (empty image)")


def largest_component_filled(mask: np.ndarray, empty_message: str) -> np.ndarray:
    """The largest connected component of ``mask`` with its holes filled.

    Raises ScanError(``empty_message``) when the mask has no voxel.
    """
    labels, count = ndimage.label(mask)
    if count == 0:
        raise ScanError(empty_message)
    largest = labels == (np.argmax(np.bincount(labels.ravel())[1:]) + 1)
    return ndimage.binary_fill_holes(largest)


def n4_correct(array: np.ndarray, affine: np.ndarray, mask: np.ndarray, settings):
    """N4 bias-field correction (SimpleITK) fitted on a shrunk image, applied at full size.

    The shrink factor is ``settings.shrink_factor``, or more where the voxels are
    fine, so that the fitted grid's spacing is at least ``settings.fit_spacing_mm``
    (a bias field is smooth over centimetres). Returns the corrected array and the
    estimated multiplicative bias field.
    """
    image = to_sitk(np.maximum(array, 0).astype(np.float32), affine)
    mask_image = to_sitk(mask.astype(np.uint8), affine)
    voxel_mm = min(image.GetSpacing())
    shrink = max(
        settings.shrink_factor,
        int(np.ceil(settings.fit_spacing_mm / voxel_mm - 1e-6)),
    )
    small = sitk.Shrink(image, [shrink] * 3)
    small_mask = sitk.Shrink(mask_image, [shrink] * 3)
    corrector = sitk.N4BiasFieldCorrectionImageFilter()
    corrector.SetMaximumNumberOfIterations(list(settings.iterations))
    corrector.SetConvergenceThreshold(settings.convergence)
    corrector.Execute(small, small_mask)
    log_field, _ = from_sitk(corrector.GetLogBiasFieldAsImage(image))
    field = np.exp(log_field).astype(np.float32)
    return (array / field).astype(np.float32), field


@dataclass(frozen=True)
class Registration:
    """Affine registration result: template point -> native point (RAS mm), and its fit."""

    template_to_native: np.ndarray
    metric: float
    iterations: int
    stop: str


def register_affine(
    array: np.ndarray, affine: np.ndarray, template: Template, settings
) -> Registration:
    """Affine registration of a scan to the template (SimpleITK, Mattes mutual information).

    Multi-resolution, moment-based start; the template (fixed) is resampled to
    ``settings.template_mm`` (when finer) and its dilated brain mask limits the metric.
    A scan with finer voxels is smoothed and resampled to that spacing first: the
    metric samples the scan at the template's points, so finer detail only aliases
    (and a 1 mm scan costs eight times the work).
    """
    spacing = max(settings.template_mm, template.voxel_mm)  # never upsample
    fixed = _resampled_template(template, spacing)
    fixed_mask = _resampled_template(template, spacing, mask=True)
    moving = coarsened(to_sitk(array.astype(np.float32), affine), spacing)
    # Two stages, as is common practice: a similarity transform (rotation, translation,
    # isotropic scale) from the moment-based start on the coarse levels, then the full
    # affine on all levels from there.
    similarity = sitk.CenteredTransformInitializer(
        fixed, moving, sitk.Similarity3DTransform(), sitk.CenteredTransformInitializerFilter.MOMENTS
    )
    coarse = replace(
        settings,
        shrink_factors=settings.shrink_factors[:-1],
        smoothing_mm=settings.smoothing_mm[:-1],
    )
    first, first_method = run_registration(fixed, fixed_mask, moving, similarity, coarse)
    start = sitk.AffineTransform(3)
    start.SetCenter(similarity.GetCenter())
    first_similarity = (
        sitk.Similarity3DTransform(first.GetNthTransform(0))
        if isinstance(first, sitk.CompositeTransform)
        else sitk.Similarity3DTransform(first)
    )
    start.SetMatrix(first_similarity.GetMatrix())
    start.SetTranslation(first_similarity.GetTranslation())
    final, method = run_registration(fixed, fixed_mask, moving, start, settings)
    matrix, kept = affine_to_matrix(final), affine_to_matrix(first)
    change = abs(np.linalg.det(matrix[:3, :3]) / np.linalg.det(kept[:3, :3]))
    limit = settings.max_affine_volume_change
    if not 1 / limit <= change <= limit:
        # the affine stage should refine shear and anisotropy, not the overall size that the
        # similarity stage already found: a large change in volume means it went astray
        return Registration(
            kept,
            float(first_method.GetMetricValue()),
            int(first_method.GetOptimizerIteration()),
            f"affine stage rejected (volume x{change:.2f}); similarity result kept",
        )
    return Registration(
        matrix,
        float(method.GetMetricValue()),
        int(method.GetOptimizerIteration()),
        method.GetOptimizerStopConditionDescription(),
    )


def run_registration(fixed, fixed_mask, moving, initial, settings):
    """Mattes mutual information, multi-resolution, regular-step gradient descent (SimpleITK).

    ``settings`` gives histogram_bins, sampling_fraction, learning_rate, min_step_mm (a
    level ends once the step, as the largest physical shift, falls below it), iterations,
    shrink_factors and smoothing_mm (per level). Returns the transform and the method.
    """
    method = sitk.ImageRegistrationMethod()
    method.SetMetricAsMattesMutualInformation(settings.histogram_bins)
    method.SetMetricSamplingStrategy(method.REGULAR)
    method.SetMetricSamplingPercentage(settings.sampling_fraction, 1)
    method.SetMetricFixedMask(fixed_mask)
    method.SetInterpolator(sitk.sitkLinear)
    method.SetOptimizerAsRegularStepGradientDescent(
        learningRate=settings.learning_rate,
        minStep=settings.min_step_mm,
        numberOfIterations=settings.iterations,
        gradientMagnitudeTolerance=1e-8,
    )
    method.SetOptimizerScalesFromPhysicalShift()
    method.SetShrinkFactorsPerLevel(list(settings.shrink_factors))
    method.SetSmoothingSigmasPerLevel(list(settings.smoothing_mm))
    method.SmoothingSigmasAreSpecifiedInPhysicalUnitsOn()
    method.SetInitialTransform(initial, inPlace=False)
    return method.Execute(fixed, moving), method


def coarsened(image: sitk.Image, spacing: float) -> sitk.Image:
    """``image`` on a grid of ``spacing`` mm when its voxels are finer, else unchanged.

    A Gaussian of FWHM sqrt(spacing^2 - voxel^2) per axis first limits the
    resolution to the new spacing (anti-aliasing, common practice).
    """
    voxels = np.array(image.GetSpacing())
    if voxels.max() >= spacing - 1e-3:
        return image
    fwhm = np.sqrt(np.maximum(spacing**2 - voxels**2, 0.0))
    smooth = sitk.SmoothingRecursiveGaussian(image, (fwhm / FWHM_PER_SIGMA).tolist())
    return _regridded(smooth, spacing, sitk.sitkLinear)


def _regridded(image: sitk.Image, spacing: float, interpolator) -> sitk.Image:
    """``image`` resampled onto a grid of ``spacing`` mm covering the same box."""
    size = [
        int(round(n * s / spacing))
        for n, s in zip(image.GetSize(), image.GetSpacing(), strict=True)
    ]
    return sitk.Resample(
        image,
        size,
        sitk.Transform(),
        interpolator,
        image.GetOrigin(),
        [spacing] * 3,
        image.GetDirection(),
        0.0,
        image.GetPixelID(),
    )


#: full width at half maximum of a Gaussian per unit standard deviation, 2 sqrt(2 ln 2)
FWHM_PER_SIGMA = 2.0 * np.sqrt(2.0 * np.log(2.0))


@lru_cache(maxsize=4)
def _resampled_template(template: Template, spacing: float, mask: bool = False) -> sitk.Image:
    """The template T1 (or its brain mask dilated by 4 mm) at ``spacing`` mm; cached per process."""
    if not mask:
        return coarsened(to_sitk(template.t1.astype(np.float32), template.affine), spacing)
    voxel = template.voxel_mm
    dilated = ndimage.binary_dilation(template.brain_mask, iterations=max(1, round(4 / voxel)))
    image = to_sitk(dilated.astype(np.uint8), template.affine)
    if abs(voxel - spacing) < 1e-3:
        return image
    return _regridded(image, spacing, sitk.sitkNearestNeighbor)


def resample(
    array: np.ndarray,
    affine: np.ndarray,
    target_affine: np.ndarray,
    target_shape: tuple[int, int, int],
    target_to_source: np.ndarray,
) -> np.ndarray:
    """Linearly resample ``array`` onto a target grid.

    ``target_to_source`` maps target points (mm) to source points (mm).
    """
    source = to_sitk(array.astype(np.float32), affine)
    reference = to_sitk(np.zeros(target_shape, np.float32), target_affine)
    out = sitk.Resample(
        source,
        reference,
        matrix_to_transform(target_to_source),
        sitk.sitkLinear,
        0.0,
        sitk.sitkFloat32,
    )
    return from_sitk(out)[0]


def refine_brain_mask(
    carried: np.ndarray, normalised: np.ndarray, voxel_mm: float, settings
) -> np.ndarray:
    """Template brain mask carried to the scan, refined on the scan's intensities.

    Keeps voxels brighter than ``threshold_of_wm`` (white matter = 1) inside the
    carried mask dilated by ``dilate_mm``, then the largest component, holes filled.
    """
    iterations = max(1, int(round(settings.dilate_mm / voxel_mm)))
    region = ndimage.binary_dilation(carried > 0.5, iterations=iterations)
    mask = region & (normalised > settings.threshold_of_wm)
    mask = ndimage.binary_opening(mask, iterations=1)
    return largest_component_filled(mask, "the brain mask is empty")


def white_matter_scale(array: np.ndarray, wm_prior: np.ndarray, mask: np.ndarray) -> float:
    """Median intensity where the carried template WM prior exceeds 0.9 (robust WM level)."""
    core = mask & (wm_prior > 0.9)
    if core.sum() < 20:
        core = mask & (wm_prior > 0.5)
    if core.sum() < 20:
        raise ScanError("too little white matter found to normalise intensities")
    return float(np.median(array[core]))


def grow_region(
    seed: np.ndarray, content: np.ndarray, voxel_mm: float, grow_mm: float
) -> np.ndarray:
    """Region grown from a carried template mask through voxels mostly of its tissue.

    Keeps the connected components of ``content > 0.5`` (within ``grow_mm`` of
    the seed) that touch the seed, plus one voxel around them for partial
    volume; returns a float mask. An enlarged structure is thus followed past
    the template's outline without reaching tissue it is not connected to.
    """
    reach = ndimage.binary_dilation(seed, iterations=max(1, int(round(grow_mm / voxel_mm))))
    candidate = (content > 0.5) & reach
    labels, _ = ndimage.label(candidate)
    touching = np.unique(labels[seed & candidate])
    grown = np.isin(labels, touching[touching > 0])
    return (ndimage.binary_dilation(grown, iterations=1) & reach).astype(np.float32)
