"""Forecast follow-up scans, atrophy maps and volumes in the scan's own space.

For a baseline scan, its age (years), sex and diagnosis, and horizons ``t``
(years), :func:`forecast`:

1. prepares the scan with the model's template and settings (or takes a
   :class:`~predictor.prepare.PreparedScan`);
2. runs the network once on the working grid (velocity ``v``);
3. for each horizon integrates ``exp(t v)`` and ``exp(-t v)`` on the grid
   and carries them to the scan's native grid through the native-to-template
   affine: the forecast is the *full-resolution* baseline pulled back through
   the inverse map, so it keeps the scan's shape, affine, resolution and
   anatomy;
4. integrates the Jacobian determinant over the baseline's native region
   maps: the network's forecast volumes (mL); beside them, the mixed-effects
   prior's forecast with its 90% interval.

Native-space geometry: with ``M`` the native-voxel -> grid-voxel affine, a
grid displacement ``d`` (grid voxels) at ``M x`` is the native displacement
``M_lin^-1 d`` (native voxels), i.e. ``A_lin G_lin d`` mm (RAS), where ``A``
maps template to native mm and ``G`` is the grid affine. A Jacobian
determinant is unchanged by this change of coordinates.
"""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import torch
import torch.nn.functional as F
from scipy import ndimage

from predictor.atypical import anatomy_note
from predictor.config import load_settings
from predictor.errors import DataError, ModelError
from predictor.fields import identity_grid, jacobian_determinant, region_volume_ratio, sample_at
from predictor.modelstore import TrainedModel, load_model, read_model_json
from predictor.network import encode_condition
from predictor.nifti import Scan, load_scan
from predictor.pairs import grid_entry, network_input, region_weights, template_entry
from predictor.prepare import PreparedScan, PrepareSettings, cached_template, prepare_scan
from predictor.preprocess import single_threaded_itk
from predictor.regression import Z90
from predictor.volumes import region_volumes

Z95 = 1.959963984540054
INTERPOLATIONS = ("cubic", "linear")


@dataclass(frozen=True)
class ForecastSettings:
    """Settings of ``predictor forecast`` (``configs/forecast.toml``)."""

    interpolation: str  # how the baseline is resampled: 'cubic' or 'linear'

    def __post_init__(self):
        if self.interpolation not in INTERPOLATIONS:
            raise ValueError(
                f"'interpolation' must be one of {list(INTERPOLATIONS)}; "
                f"'{self.interpolation}' was given"
            )

    @classmethod
    def from_toml(cls, path: str | os.PathLike[str] | None = None) -> ForecastSettings:
        return load_settings(cls, "forecast.toml", path)


@dataclass(frozen=True, eq=False)
class HorizonForecast:
    """One horizon's native-space outputs (arrays in the scan's RAS voxel order)."""

    years: float
    image: np.ndarray  # (X, Y, Z) float32, the input's own intensities, warped
    log_jacobian: np.ndarray  # (X, Y, Z) log volume ratio of the forward map (< 0: shrinkage)
    displacement_mm: np.ndarray  # (X, Y, Z, 3) RAS mm: forecast(p) = baseline(p + u(p))
    grid_ratio: dict[str, float]  # prior regions' volume ratios from the working grid


@dataclass(frozen=True, eq=False)
class ForecastResult:
    """Everything :func:`forecast` computes for one scan."""

    scan: Scan
    prepared: PreparedScan
    horizons: list[HorizonForecast]
    volumes: pd.DataFrame  # one row per region and horizon (see volume_table)
    warnings: list[str]
    condition: dict  # age (years), sex, diagnosis as used


#: models loaded in this process, keyed by folder and the checksum of their weights, so
#: that retraining into the same folder gives the new weights (two kept at most)
_MODELS: dict[tuple[str, str], TrainedModel] = {}


def as_model(model: TrainedModel | str | os.PathLike[str]) -> TrainedModel:
    """A loaded model, or the model folder at ``model`` (cached per process by checksum)."""
    if isinstance(model, TrainedModel):
        return model
    folder = Path(model).resolve()
    key = (str(folder), read_model_json(folder).weights_sha256)
    if key not in _MODELS:
        while len(_MODELS) >= 2:
            _MODELS.pop(next(iter(_MODELS)))
        _MODELS[key] = load_model(folder)
    return _MODELS[key]


def check_request(
    model: TrainedModel, age: float, sex: str, diagnosis: str, years
) -> tuple[str, str, list[float], list[str]]:
    """Validate a request; returns (sex code, diagnosis label, horizons, warnings).

    Unknown codes and negative or non-finite horizons are errors; values the
    model never saw in training are warnings.
    """
    settings = model.info.coding
    sex_code, label = settings.sex.match(str(sex)), settings.diagnosis.match(str(diagnosis))
    if sex_code is None:
        raise DataError(f"sex '{sex}' is not one of {', '.join(settings.sex_codes)}")
    if label is None or label not in model.labels:
        raise DataError(f"diagnosis '{diagnosis}' is not one of {', '.join(model.labels)}")
    horizons = [float(t) for t in years]
    if not horizons or any(not np.isfinite(t) or t < 0 for t in horizons):
        raise DataError(f"horizons must be finite and >= 0 years, got {list(years)}")
    if not np.isfinite(age):
        raise DataError(f"age must be a finite number of years, got {age}")
    seen = model.info.training_range
    notes = []
    low, high = seen["age_years"]
    if not low <= age <= high:
        notes.append(f"age {age:g} years is outside the training range {low:g}-{high:g}")
    if max(horizons) > seen["max_horizon_years"]:
        notes.append(
            f"horizon {max(horizons):g} years is beyond the longest interval seen in "
            f"training ({seen['max_horizon_years']:.1f} years)"
        )
    if label not in seen["diagnoses"]:
        notes.append(f"diagnosis '{label}' was never seen in training")
    if sex_code not in seen["sexes"]:
        notes.append(f"sex '{sex_code}' was never seen in training")
    return sex_code, label, horizons, notes


def prepare_for(model: TrainedModel, scan: Scan) -> PreparedScan:
    """Prepare a scan with the model's template and settings, checking the working grid."""
    single_threaded_itk()
    settings = PrepareSettings.from_dict(model.info.prepare_settings)
    template = cached_template(model.info.template, model.info.region_set)
    prepared = prepare_scan(scan, template, settings)
    check_grid(model, prepared)
    return prepared


def check_grid(model: TrainedModel, prepared: PreparedScan) -> None:
    grid = model.info.grid
    same_shape = list(prepared.diagnostics["grid_shape"]) == list(grid["shape"])
    if not same_shape or not np.allclose(prepared.diagnostics["grid_affine"], grid["affine"]):
        raise ModelError(
            f"the model was trained on another working grid ({grid['shape']}); prepare the "
            "scan with the model's template and grid"
        )


def native_to_grid(prepared: PreparedScan, grid_affine: np.ndarray) -> np.ndarray:
    """4x4 matrix taking native voxel indices (RAS order) to working-grid voxel indices."""
    native_to_template = np.linalg.inv(prepared.template_to_native)
    return np.linalg.inv(grid_affine) @ native_to_template @ prepared.native_affine


def baseline_resampler(data: np.ndarray, interpolation: str):
    """A function: native voxel coordinates (3, X, Y, Z) -> the baseline sampled there.

    'cubic' is a cubic B-spline (the coefficients computed once; slabs of the
    output run in parallel on torch's thread count, as scipy releases the GIL),
    'linear' trilinear; outside the field of view the nearest edge value is used.
    """
    if interpolation == "linear":
        baseline = torch.from_numpy(data)[None, None]
        return lambda source: sample_at(baseline, source[None])[0, 0].numpy()
    coefficients = ndimage.spline_filter(data, order=3, mode="nearest")

    def resample_slab(coordinates):
        return ndimage.map_coordinates(
            coefficients, coordinates, order=3, mode="nearest", prefilter=False
        ).astype(np.float32)

    def resample(source):
        slabs = np.array_split(source.numpy(), torch.get_num_threads(), axis=1)
        with ThreadPoolExecutor(len(slabs)) as pool:
            return np.concatenate(list(pool.map(resample_slab, slabs)))

    return resample


def network_inputs(model: TrainedModel, prepared: PreparedScan):
    """Network input (1, C, D, H, W) and grid region weights (1, R, D, H, W) of a prepared scan.

    Built by the same functions as training's batches; regions are the model's prior regions.
    A population-field model (``image_input = "template"``) sees the template instead.
    """
    entry = grid_entry(
        prepared.grid_t1, prepared.grid_mask, prepared.grid_tissue, prepared.grid_regions
    )
    info, regions = model.info, model.info.region_set
    seen = entry
    if info.config["training"]["image_input"] == "template":
        seen = template_entry(info.template, regions, info.prepare_settings)
    inputs = network_input(seen, model.network.settings.tissue_channels)
    return inputs[None], region_weights(entry, regions, regions.prior)[None]


class NativeSampler:
    """Samples smooth working-grid fields at every voxel of a native scan grid.

    The fields (velocity-derived displacements and Jacobians, smooth on the
    scale of the working grid) are sampled trilinearly on a native-aligned
    grid ``step`` times coarser than the scan (``step`` = working-grid voxel
    over native voxel, rounded down), then interpolated trilinearly to every
    native voxel: a fifth of the cost of sampling each voxel directly.
    """

    def __init__(self, mapping: np.ndarray, native_shape):
        self.mapping = mapping  # native voxel -> grid voxel (4, 4)
        self.shape = tuple(int(n) for n in native_shape)
        grid_per_native = float(np.sqrt((mapping[:3, :3] ** 2).sum(axis=0)).max())
        self.step = max(1, int(np.floor(1.0 / grid_per_native)))
        coarse = [int(np.ceil((n - 1) / self.step)) + 1 for n in self.shape]
        index = identity_grid(tuple(coarse), torch.float64)[0].reshape(3, -1) * self.step
        points = torch.from_numpy(mapping[:3, :3]) @ index + torch.from_numpy(mapping[:3, 3:])
        self.points = points.reshape(1, 3, *coarse).float()
        self.coarse = coarse

    def __call__(self, field: torch.Tensor) -> torch.Tensor:
        """(1, C, D, H, W) on the working grid -> (C, X, Y, Z) on the native grid."""
        sampled = sample_at(field, self.points)
        if self.step > 1:
            size = [(n - 1) * self.step + 1 for n in self.coarse]
            sampled = F.interpolate(sampled, size=size, mode="trilinear", align_corners=True)
        return sampled[0, :, : self.shape[0], : self.shape[1], : self.shape[2]]


class NativeWarp:
    """Carries working-grid deformations of one prepared scan to the scan's own grid.

    Holds what every horizon shares: the sampler of grid fields at native voxels,
    the grid -> native and grid -> RAS mm matrices, and the baseline's resampler.
    """

    def __init__(self, scan: Scan, prepared: PreparedScan, grid_affine, interpolation: str):
        self.sampler = NativeSampler(native_to_grid(prepared, grid_affine), scan.data.shape)
        linear = np.linalg.inv(self.sampler.mapping[:3, :3])
        self.to_native = torch.from_numpy(linear.astype(np.float32))
        to_mm = prepared.template_to_native[:3, :3] @ grid_affine[:3, :3]
        self.to_mm = torch.from_numpy(to_mm.astype(np.float32))
        self.resample = baseline_resampler(scan.data, interpolation)
        self.index = identity_grid(scan.data.shape)[0]

    def __call__(self, backward: torch.Tensor, determinant: torch.Tensor):
        """(forecast image, displacement (X, Y, Z, 3) RAS mm, Jacobian determinant) natively.

        ``backward`` (1, 3, D, H, W) pull-back displacement and ``determinant``
        (1, D, H, W) of the forward map, both on the working grid.
        """
        both = self.sampler(torch.cat([backward, determinant[:, None]], 1))
        back_native, native_det = both[:3], both[3].numpy()
        source = self.index + torch.einsum("ij,jxyz->ixyz", self.to_native, back_native)
        displacement = torch.einsum("ij,jxyz->xyzi", self.to_mm, back_native).numpy()
        return self.resample(source), displacement, native_det


def forecast(
    model: TrainedModel | str | os.PathLike[str],
    image: Scan | str | os.PathLike[str],
    age: float,
    sex: str,
    diagnosis: str,
    years,
    prepared: PreparedScan | None = None,
    interpolation: str | None = None,
) -> ForecastResult:
    """Forecast ``image`` at each horizon in ``years`` (see the module docstring).

    ``age`` is the baseline age in years; ``sex`` and ``diagnosis`` use the
    model's cohort codes; ``interpolation`` ('cubic' or 'linear') defaults to
    ``configs/forecast.toml``. Returns arrays in the scan's RAS order and the
    volume table.
    """
    interpolation = interpolation or ForecastSettings.from_toml().interpolation
    if interpolation not in INTERPOLATIONS:
        raise DataError(
            f"interpolation must be one of {list(INTERPOLATIONS)}; '{interpolation}' was given"
        )
    model = as_model(model)
    info, regions = model.info, model.info.region_set
    scan = image if isinstance(image, Scan) else load_scan(image)
    sex_code, label, horizons, notes = check_request(model, float(age), sex, diagnosis, years)
    prepared = prepared if prepared is not None else prepare_for(model, scan)
    check_grid(model, prepared)
    unusual = anatomy_note(info.training_range.get("anatomy"), prepared.volumes)
    notes += [unusual] if unusual else []
    condition = encode_condition(
        [age], [sex_code], [label], info.coding, info.condition["age_mean"],
        info.condition["age_sd"],
    )  # fmt: skip
    inputs, grid_weights = network_inputs(model, prepared)
    native = NativeWarp(scan, prepared, info.grid_affine, interpolation)
    outputs, network_ml = [], {}
    with torch.no_grad():
        velocity = model.network(inputs, condition)
        for t in horizons:
            forward = model.network.displacement(velocity, t, info.grid_shape)
            backward = model.network.displacement(velocity, -t, info.grid_shape)
            determinant = jacobian_determinant(forward)
            ratio = region_volume_ratio(grid_weights, determinant)[0].tolist()
            warped, displacement, native_det = native(backward, determinant)
            log_jacobian = np.log(np.maximum(native_det, 1e-3))
            ratios = dict(zip(regions.prior, ratio, strict=True))
            outputs.append(HorizonForecast(t, warped, log_jacobian, displacement, ratios))
            network_ml[t] = region_volumes(
                prepared.native_tissue, prepared.native_deep, scan.voxel_volume_ml, regions,
                native_det,
            )  # fmt: skip
    table, prior_notes = volume_table(model, prepared.volumes, network_ml, age, sex_code, label)
    condition_used = {"age": float(age), "sex": sex_code, "diagnosis": label}
    return ForecastResult(scan, prepared, outputs, table, notes + prior_notes, condition_used)


def volume_table(
    model: TrainedModel,
    baseline_ml: dict[str, float],
    network_ml: dict[float, dict[str, float]],
    age: float,
    sex: str,
    diagnosis: str,
) -> tuple[pd.DataFrame, list[str]]:
    """Baseline, network and prior volumes per region and horizon, and prior warnings.

    Columns: region, years, baseline_ml, network_ml, network_change_ml,
    network_percent_per_year, prior_mean_ml, prior_sd_ml, prior_lower_ml,
    prior_upper_ml (SD and 90% interval for an observed follow-up), prior_true_sd_ml (SD
    of the participant's true volume, without the residual noise of one observation),
    prior_percent_per_year, outside_prior_95 (the network's forecast, an estimate of the
    true volume, outside the prior's 95% prediction interval for the true volume).
    """
    horizons = sorted(network_ml)
    request = pd.DataFrame(
        [{"participant_id": "scan", "age": age, "sex": sex, "diagnosis": diagnosis} | baseline_ml]
    )
    notes = []
    try:
        prior = model.prior.predict(request, horizons).set_index(["region", "years"])
        # the flag holds the network's forecast (an estimate of the true volume) against the
        # prior's interval for the true volume, not the wider one for an observed follow-up
        mean_sd = model.prior.predict(request, horizons, noise_free=True).set_index(
            ["region", "years"]
        )["sd_ml"]
    except DataError as error:
        prior, notes = None, [f"no prior forecast: {error}"]
    rows = []
    for region in model.info.region_set.names:
        for t in horizons:
            base, net = baseline_ml[region], network_ml[t][region]
            row = {
                "region": region,
                "years": t,
                "baseline_ml": base,
                "network_ml": net,
                "network_change_ml": net - base,
                "network_percent_per_year": 100 * (net / base - 1) / t if t > 0 else np.nan,
            }
            if prior is not None and (region, t) in prior.index:
                mean, sd = prior.loc[(region, t), ["mean_ml", "sd_ml"]]
                true_sd = mean_sd.loc[(region, t)]
                outside = bool(abs(net - mean) > Z95 * true_sd) if t > 0 else False
                row |= {
                    "prior_mean_ml": mean,
                    "prior_sd_ml": sd,
                    "prior_true_sd_ml": true_sd,
                    "prior_lower_ml": mean - Z90 * sd,
                    "prior_upper_ml": mean + Z90 * sd,
                    "prior_percent_per_year": 100 * (mean / base - 1) / t if t > 0 else np.nan,
                    "outside_prior_95": outside,
                }
                if outside:
                    notes.append(
                        f"{region} at {t:g} years: network forecast {net:.2f} mL is outside the "
                        f"prior's 95% interval for the true volume "
                        f"{mean - Z95 * true_sd:.2f}-{mean + Z95 * true_sd:.2f} mL"
                    )
            rows.append(row)
    return pd.DataFrame(rows), notes
