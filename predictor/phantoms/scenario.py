"""Phantom scenario: a TOML file of ``synthetic_phantoms/`` (``predictor.scenarios``)."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

from predictor.config import SCENARIO_DIR, merged, read_toml, require
from predictor.errors import ConfigError

DEFAULT_SCENARIO = SCENARIO_DIR / "memory_clinic.toml"


def shipped_scenarios() -> list[str]:
    """Names of the scenarios shipped in ``synthetic_phantoms/``."""
    return sorted(path.stem for path in SCENARIO_DIR.glob("*.toml"))


def scenario_file(name_or_path: str | os.PathLike[str] | None) -> Path:
    """A shipped scenario's file by name (e.g. ``no_individual_signal``), or a TOML path."""
    if name_or_path is None:
        return DEFAULT_SCENARIO
    text = str(name_or_path)
    if text in shipped_scenarios():
        return SCENARIO_DIR / f"{text}.toml"
    if not text.endswith(".toml") or not Path(text).is_file():
        raise ConfigError(
            f"scenario '{text}' is neither a shipped scenario "
            f"({', '.join(shipped_scenarios())}) nor a TOML file"
        )
    return Path(text)


def read_scenario(path: Path) -> dict:
    """A scenario file's table, laid over the shipped scenario it ``extends`` (if any)."""
    raw = read_toml(path)
    base = raw.pop("extends", None)
    if base is None:
        return raw
    if base not in shipped_scenarios() or SCENARIO_DIR / f"{base}.toml" == path:
        raise ConfigError(f"{path}: 'extends' must name another shipped scenario, not '{base}'")
    return merged(read_scenario(SCENARIO_DIR / f"{base}.toml"), raw)


#: regions whose annual rates a scenario sets
RATE_REGIONS = ("hippocampus", "ventricles", "cortical_gm", "wm")
#: the region whose participant factor each rate region follows
FACTOR_OF = {
    "hippocampus": "hippocampus",
    "ventricles": "ventricles",
    "cortical_gm": "cortical_gm",
    "wm": "cortical_gm",
}
FACTOR_REGIONS = ("hippocampus", "ventricles", "cortical_gm")


@dataclass(frozen=True)
class Size:
    """Image grid of one phantom size: isotropic voxel side (mm) and field of view (mm)."""

    voxel_mm: float
    field_of_view_mm: tuple[float, float, float]

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(int(round(side / self.voxel_mm)) for side in self.field_of_view_mm)

    def scaled(self, factor: float) -> Size:
        """The same field of view with voxels ``factor`` times larger."""
        return Size(self.voxel_mm * factor, self.field_of_view_mm)


@dataclass(frozen=True)
class Scenario:
    """Everything the phantom generator draws from; see the scenario file's comments."""

    name: str
    description: str
    cohort: dict
    rates: dict[str, dict[str, float]]  # region -> diagnosis -> fraction per year (signed)
    progression: dict
    anatomy: dict
    imaging: dict
    sizes: dict[str, Size]
    source: str
    scanner_change: dict  # empty, or 'fraction', 'voxel_factor' and 'imaging' overrides
    kind: str  # "geometric" (layered shapes) or "template" (the MNI152 template deformed)
    template_anatomy: dict  # settings of the "template" kind (empty otherwise)
    covariates: dict  # empty, or the carrier and cognitive-score settings (see _covariates)

    @property
    def diagnoses(self) -> tuple[str, ...]:
        return tuple(self.cohort["diagnosis_fractions"])

    def size(self, name: str) -> Size:
        if name not in self.sizes:
            raise ConfigError(
                f"{self.source}: size '{name}' is not one of {', '.join(sorted(self.sizes))}"
            )
        return self.sizes[name]

    @classmethod
    def from_toml(cls, path: str | os.PathLike[str] | None = None) -> Scenario:
        """Read and check a scenario: a shipped name, a TOML path, or None (the default)."""
        path = scenario_file(path)
        raw = read_scenario(path)
        source = str(path)
        cohort = require(raw, "cohort", source, dict)
        fractions = require(cohort, "diagnosis_fractions", source, dict)
        if abs(sum(fractions.values()) - 1.0) > 1e-6:
            raise ConfigError(f"{source}: diagnosis_fractions must sum to 1")
        rescans = cohort.get("rescan_fraction", 0)
        if not isinstance(rescans, int | float) or isinstance(rescans, bool) or not (
            0 <= rescans <= 1
        ):
            raise ConfigError(f"{source} [cohort] 'rescan_fraction': must lie in [0, 1]")
        rates_raw = require(raw, "rates_percent_per_year", source, dict)
        rates = {}
        for region in RATE_REGIONS:
            table = require(rates_raw, region, source, dict)
            missing = [group for group in fractions if group not in table]
            if missing:
                raise ConfigError(f"{source}: rates for '{region}' lack {', '.join(missing)}")
            rates[region] = {group: float(table[group]) / 100.0 for group in fractions}
        sizes = {
            name: Size(float(spec["voxel_mm"]), tuple(float(v) for v in spec["field_of_view_mm"]))
            for name, spec in require(raw, "sizes", source, dict).items()
        }
        return cls(
            name=require(raw, "name", source, str),
            description=require(raw, "description", source, str),
            cohort=cohort,
            rates=rates,
            progression=require(raw, "progression", source, dict),
            anatomy=require(raw, "anatomy", source, dict),
            imaging=require(raw, "imaging", source, dict),
            sizes=sizes,
            source=source,
            scanner_change=_scanner_change(raw, source),
            kind=_kind(raw, source),
            template_anatomy=raw.get("template_anatomy", {}),
            covariates=_covariates(raw, source, tuple(fractions)),
        )

    def imaging_at(self, changed: bool) -> dict:
        """Imaging settings of the first protocol, or of the second after a change."""
        if not changed:
            return self.imaging
        return self.imaging | self.scanner_change["imaging"]


KINDS = ("geometric", "template")
TEMPLATE_KEYS = ("subject_warp_mm", "subject_warp_smoothness_mm", "baseline_exposure_years")


def _kind(raw: dict, source: str) -> str:
    """The anatomy kind; a "template" scenario needs its ``[template_anatomy]`` keys."""
    kind = raw.get("kind", "geometric")
    if kind not in KINDS:
        raise ConfigError(f"{source}: 'kind' must be one of {', '.join(KINDS)}, got {kind!r}")
    if kind == "template":
        table = require(raw, "template_anatomy", source, dict)
        for key in TEMPLATE_KEYS:
            require(table, key, source, (int, float, dict))
    return kind


COVARIATE_KEYS = {
    "carrier_fraction": (int, float),
    "carrier_rate_factor": (int, float),
    "cognition_mean": dict,
    "cognition_per_stage": (int, float),
    "cognition_decline_per_year": dict,
    "cognition_sd": (int, float),
    "cognition_missing_fraction": (int, float),
}


def _covariates(raw: dict, source: str, diagnoses: tuple[str, ...]) -> dict:
    """The optional ``[covariates]`` table, checked: every key, a value per diagnosis."""
    table = raw.get("covariates", {})
    if not table:
        return {}
    unknown = sorted(set(table) - set(COVARIATE_KEYS))
    if unknown:
        raise ConfigError(f"{source} [covariates]: unknown key '{unknown[0]}'")
    for key, kind in COVARIATE_KEYS.items():
        require(table, key, source, kind)
    for key in ("cognition_mean", "cognition_decline_per_year"):
        missing = [group for group in diagnoses if group not in table[key]]
        if missing:
            raise ConfigError(f"{source} [covariates] '{key}': no value for {missing[0]}")
    for key in ("carrier_fraction", "cognition_missing_fraction"):
        if not 0 <= table[key] <= 1:
            raise ConfigError(f"{source} [covariates] '{key}': must lie in [0, 1]")
    if table["carrier_rate_factor"] <= 0:
        raise ConfigError(f"{source} [covariates] 'carrier_rate_factor': must be positive")
    return table


def _scanner_change(raw: dict, source: str) -> dict:
    """The optional ``[scanner_change]`` table, checked."""
    change = raw.get("scanner_change", {})
    if not change:
        return {}
    fraction = require(change, "fraction", source, (int, float))
    if not 0 <= fraction <= 1:
        raise ConfigError(f"{source} [scanner_change] 'fraction': must lie in [0, 1]")
    require(change, "voxel_factor", source, (int, float))
    unknown = set(require(change, "imaging", source, dict)) - set(raw["imaging"])
    if unknown:
        raise ConfigError(
            f"{source} [scanner_change.imaging]: unknown {', '.join(sorted(unknown))}"
        )
    return change
