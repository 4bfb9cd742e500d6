"""Forecast follow-up scans, atrophy maps and volumes in the scan's own space.

For a baseline scan, its age (years), sex and diagnosis, and horizons ``t``
(years), :func:`forecast`:

1. prepares the scan with the model's template and settings (or takes a
   :class:`~predictor.prepare.PreparedScan`);
2. runs each member of the model once on the working grid (velocity ``v_m``;
   a plain model folder is one member) and takes their mean ``v``;
3. for each horizon integrates ``exp(t v)`` and ``exp(-t v)`` on the grid
   and carries them to the scan's native grid through the native-to-template
   affine: the forecast is the *full-resolution* baseline pulled back through
   the inverse map (resampled once per horizon, whatever the member count), so
   it keeps the scan's shape, affine, resolution and anatomy;
4. integrates each member's Jacobian determinant over the baseline's native
   region maps: the network's forecast volume of a region (mL) is the member
   mean, its spread the member SD, and with a calibration
   (:mod:`predictor.ensemble`) it carries a conformal interval; the member SD of
   the log-Jacobian is a voxel-wise uncertainty map. Beside them, the
   mixed-effects prior's forecast with its 90% interval.

Native-space geometry: with ``M`` the native-voxel -> grid-voxel affine, a
grid displacement ``d`` (grid voxels) at ``M x`` is the native displacement
``M_lin^-1 d`` (native voxels), i.e. ``A_lin G_lin d`` mm (RAS), where ``A``
maps template to native mm and ``G`` is the grid affine. A Jacobian
determinant is unchanged by this change of coordinates.
"""

from __future__ import annotations

import json
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
from predictor.ensemble import (
    band_label,
    band_of,
    calibrated_quantile,
    coverage_note,
    interval_scale,
    residual_var,
    uncalibrated_note,
)
from predictor.errors import DataError, ModelError
from predictor.fields import identity_grid, jacobian_determinant, region_volume_ratio, sample_at
from predictor.modelstore import (
    Ensemble,
    TrainedModel,
    load_ensemble,
    member_folders,
    read_calibration,
    read_model_json,
)
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
    log_jacobian_sd: np.ndarray | None  # (X, Y, Z) member SD of the log-Jacobian; None: 1 member
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
    condition: dict  # age (years), sex, diagnosis and covariates as used


#: ensembles loaded in this process, keyed by folder, member checksums and calibration
_ENSEMBLES: dict[tuple, Ensemble] = {}


def as_ensemble(model: Ensemble | TrainedModel | str | os.PathLike[str]) -> Ensemble:
    """A loaded ensemble: ``model`` itself, a loaded model as one member, or the model
    folder at ``model`` (cached per process by its members' checksums)."""
    if isinstance(model, Ensemble):
        return model
    if isinstance(model, TrainedModel):
        return Ensemble(model.folder, (model,), None)
    folder = Path(model).resolve()
    calibration = read_calibration(folder)
    key = (
        str(folder),
        tuple(read_model_json(path).weights_sha256 for path in member_folders(folder)),
        json.dumps(calibration, sort_keys=True),
    )
    if key not in _ENSEMBLES:
        while len(_ENSEMBLES) >= 2:
            _ENSEMBLES.pop(next(iter(_ENSEMBLES)))
        _ENSEMBLES[key] = load_ensemble(folder)
    return _ENSEMBLES[key]


def check_request(
    model: TrainedModel, age: float, sex: str, diagnosis: str, years, covariates=None
) -> tuple[str, str, list[float], dict, list[str]]:
    """Validate a request; returns (sex code, diagnosis label, horizons, covariates,
    warnings).

    Unknown codes, covariates and levels, a covariate the model needs that is not given
    (None where it may be missing), and negative or non-finite horizons are errors;
    values the model never saw in training are warnings.
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
    values = covariate_values(model, covariates)
    notes += model.info.covariates.check(values)
    return sex_code, label, horizons, values, notes


def covariate_values(model: TrainedModel, covariates: dict | None) -> dict:
    """Each covariate the model declares, parsed (None: missing); DataError for an unknown
    or absent one, CohortError for a value its declaration refuses."""
    given = dict(covariates or {})
    declared = {c.name: c for c in model.info.coding.covariates}
    unknown = sorted(set(given) - set(declared))
    if unknown:
        known = ", ".join(declared) or "none"
        raise DataError(f"covariate '{unknown[0]}' is unknown to this model (it knows: {known})")
    absent = [name for name in declared if name not in given]
    if absent:
        raise DataError(f"this model needs covariate '{absent[0]}' (n/a where it may be missing)")
    return {name: c.parse(given[name], f"covariate {name}") for name, c in declared.items()}


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
    # float32 coefficients: half the prefilter's time (0.33 -> 0.16 s at 1 mm) and at most
    # 6e-8 of the intensity range apart from float64 ones in the resampled image
    coefficients = ndimage.spline_filter(data, order=3, mode="nearest", output=np.float32)

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

    def __call__(self, backward: torch.Tensor, determinant: torch.Tensor, extra=None):
        """(forecast image, displacement (X, Y, Z, 3) RAS mm, Jacobian determinant, extra)
        natively.

        ``backward`` (1, 3, D, H, W) pull-back displacement and ``determinant``
        (1, D, H, W) of the forward map, both on the working grid; ``extra`` (1, C, D,
        H, W) more grid fields sampled in the same pass ((C, X, Y, Z) out; None: none).
        """
        fields = [backward, determinant[:, None]] + ([] if extra is None else [extra])
        sampled = self.sampler(torch.cat(fields, 1))
        back_native, native_det = sampled[:3], sampled[3].numpy()
        source = self.index + torch.einsum("ij,jxyz->ixyz", self.to_native, back_native)
        displacement = torch.einsum("ij,jxyz->xyzi", self.to_mm, back_native).numpy()
        more = None if extra is None else sampled[4:].numpy()
        return self.resample(source), displacement, native_det, more


def forecast(
    model: Ensemble | TrainedModel | str | os.PathLike[str],
    image: Scan | str | os.PathLike[str],
    age: float,
    sex: str,
    diagnosis: str,
    years,
    prepared: PreparedScan | None = None,
    interpolation: str | None = None,
    covariates: dict | None = None,
) -> ForecastResult:
    """Forecast ``image`` at each horizon in ``years`` (see the module docstring).

    ``model``: a model folder (one member or an ensemble) or a loaded one. ``age`` is
    the baseline age in years; ``sex`` and ``diagnosis`` use the model's cohort codes;
    ``covariates`` maps each covariate the model declares to its baseline value (None or
    "n/a": missing, where it may be);
    ``interpolation`` ('cubic' or 'linear') defaults to ``configs/forecast.toml``.
    Returns arrays in the scan's RAS order and the volume table.
    """
    interpolation = interpolation or ForecastSettings.from_toml().interpolation
    if interpolation not in INTERPOLATIONS:
        raise DataError(
            f"interpolation must be one of {list(INTERPOLATIONS)}; '{interpolation}' was given"
        )
    ensemble = as_ensemble(model)
    lead = ensemble.lead
    info, regions = lead.info, lead.info.region_set
    scan = image if isinstance(image, Scan) else load_scan(image)
    sex_code, label, horizons, values, notes = check_request(
        lead, float(age), sex, diagnosis, years, covariates
    )
    prepared = prepared if prepared is not None else prepare_for(lead, scan)
    check_grid(lead, prepared)
    unusual = anatomy_note(info.training_range.get("anatomy"), prepared.volumes)
    notes += [unusual] if unusual else []
    inputs, grid_weights = network_inputs(lead, prepared)
    native = NativeWarp(scan, prepared, info.grid_affine, interpolation)
    several = len(ensemble.members) > 1
    outputs, member_ml = [], {}
    with torch.no_grad():
        velocities = torch.cat([member_velocity(m, inputs, age, sex_code, label, values)
                                for m in ensemble.members])  # fmt: skip
        velocity = velocities.mean(0, keepdim=True)
        for t in horizons:
            forward = lead.network.displacement(velocity, t, info.grid_shape)
            backward = lead.network.displacement(velocity, -t, info.grid_shape)
            determinant = jacobian_determinant(forward)
            ratio = region_volume_ratio(grid_weights, determinant)[0].tolist()
            extra = None
            if several:  # each member's determinant, and the SD of their log-Jacobians
                each = torch.cat([
                    jacobian_determinant(lead.network.displacement(v[None], t, info.grid_shape))
                    for v in velocities
                ])  # fmt: skip
                spread = torch.log(each.clamp_min(1e-3)).std(0, keepdim=True)
                extra = torch.cat([each, spread])[None]
            warped, displacement, native_det, sampled = native(backward, determinant, extra)
            log_jacobian = np.log(np.maximum(native_det, 1e-3))
            ratios = dict(zip(regions.prior, ratio, strict=True))
            outputs.append(
                HorizonForecast(t, warped, log_jacobian, None if extra is None else sampled[-1],
                                displacement, ratios)  # fmt: skip
            )
            member_ml[t] = [
                region_volumes(prepared.native_tissue, prepared.native_deep,
                               scan.voxel_volume_ml, regions, det)  # fmt: skip
                for det in (sampled[:-1] if several else [native_det])
            ]
    request = {"age": float(age), "sex": sex_code, "diagnosis": label} | values
    table, prior_notes = volume_table(ensemble, prepared.volumes, member_ml, request)
    missing = uncalibrated_note(len(ensemble.members), ensemble.calibration)
    notes += prior_notes + ([missing] if missing else [])
    condition_used = request
    return ForecastResult(scan, prepared, outputs, table, notes, condition_used)


def member_velocity(
    model: TrainedModel, inputs, age: float, sex: str, label: str, covariates: dict
):
    """One member's velocity (1, 3, D, H, W) for a scan's network input and covariates
    (each member standardises age and covariates with its own training statistics)."""
    encoded = model.info.covariates.encode(pd.DataFrame([covariates], index=[0]))
    condition = encode_condition(
        [age], [sex], [label], model.info.coding, model.info.condition["age_mean"],
        model.info.condition["age_sd"], encoded,
    )  # fmt: skip
    return model.network(inputs, condition)


def volume_table(
    ensemble: Ensemble,
    baseline_ml: dict[str, float],
    member_ml: dict[float, list[dict[str, float]]],
    request: dict,
) -> tuple[pd.DataFrame, list[str]]:
    """Baseline, network and prior volumes per region and horizon, and prior warnings.

    ``member_ml``: horizon -> each member's forecast volumes; ``request``: age (years),
    sex, diagnosis and covariates of the baseline. Columns: region, years,
    baseline_ml, network_ml (member mean), network_sd_ml (member SD; NaN for one
    member), network_scale_ml (the conformal score's scale,
    :func:`~predictor.ensemble.interval_scale`), network_lower_ml and network_upper_ml
    (the calibrated conformal interval, its quantile from the horizon's band; NaN without
    calibration),
    network_change_ml, network_percent_per_year, prior_mean_ml, prior_sd_ml,
    prior_lower_ml, prior_upper_ml (SD and 90% interval for an observed follow-up),
    prior_true_sd_ml (SD of the participant's true volume, without the residual noise
    of one observation), prior_percent_per_year, outside_prior_95 (the network's
    forecast, an estimate of the true volume, outside the prior's 95% prediction
    interval for the true volume).
    """
    model, calibration = ensemble.lead, ensemble.calibration
    horizons = sorted(member_ml)
    diagnosis = request["diagnosis"]
    request = pd.DataFrame([{"participant_id": "scan"} | request | baseline_ml])
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
    rows, endless = [], set()
    for region in model.info.region_set.names:
        for t in horizons:
            base = baseline_ml[region]
            each = np.array([volumes[region] for volumes in member_ml[t]])
            net = float(each.mean())
            spread = float(each.std(ddof=1)) if len(each) > 1 else np.nan
            scale = float(interval_scale(spread, residual_var(model, region)))
            q = calibrated_quantile(calibration, region, t)
            if t > 0 and region in (calibration or {}).get("quantiles", {}) and not q < np.inf:
                endless.add(t)
            half = q * scale
            row = {
                "region": region,
                "years": t,
                "baseline_ml": base,
                "network_ml": net,
                "network_sd_ml": spread,
                "network_scale_ml": scale,
                "network_lower_ml": net - half,
                "network_upper_ml": net + half,
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
    off = coverage_note(calibration, diagnosis)
    notes += [off] if off else []
    for t in sorted(endless):
        edges = calibration["bands_years"]
        notes.append(
            f"no finite interval for some regions at {t:g} years: too few calibration "
            f"participants in the {band_label(int(band_of(t, edges)), edges)} band"
        )
    return pd.DataFrame(rows), notes
