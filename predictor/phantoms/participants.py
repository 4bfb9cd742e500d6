"""Draw phantom participants: anatomy, disease stage, annual rates and visit times.

Every draw comes from a ``numpy.random.Generator`` seeded from the cohort
seed and the participant's index (``SeedSequence(seed, spawn_key=(k, ...))``),
so a participant is the same whatever else the cohort holds and however many
processes build it. The drawn values are written beside the phantoms.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace

import numpy as np
from numpy.polynomial.hermite_e import hermegauss

from predictor.phantoms.anatomy import (
    Anatomy,
    Hippocampus,
    Progression,
    raw_volumes_at,
    region_volumes,
)
from predictor.phantoms.scenario import FACTOR_OF, FACTOR_REGIONS, RATE_REGIONS, Scenario
from predictor.rng import seeded_rng

#: Gauss-Hermite nodes used to average over the unobservable rate noise
_NODES, _WEIGHTS = hermegauss(40)
_WEIGHTS = _WEIGHTS / _WEIGHTS.sum()


@dataclass(frozen=True)
class Draw:
    """What was drawn for one participant (ages and times in years).

    ``deviations`` and ``hidden`` are keyed by factor region
    (:data:`FACTOR_REGIONS`); ``multipliers`` and ``rates`` by rate region.
    """

    participant_id: str
    sex: str
    diagnosis: str
    baseline_age: float
    deviations: dict[str, float]  # regional stage deviation z_g; visible at baseline
    hidden: dict[str, float]  # unobservable standard-normal rate noise e_g
    age_factor: float
    multipliers: dict[str, float]
    acceleration: float  # k: fraction per year by which the rates grow
    rates: dict[str, float]  # signed mean annual fractions over the first two years
    visit_years: tuple[float, ...]  # time since baseline of each visit, first is 0
    head_scale: float
    # with a scenario's [covariates]: carrier status, the factor on every rate it brings
    # (1 for a non-carrier), and the cognitive score at each planned visit (None: missing)
    carrier: bool | None = None
    carrier_factor: float = 1.0
    cognition: tuple[float | None, ...] = ()

    def record(self) -> dict:
        return asdict(self)

    def ratios(self, years: float) -> dict[str, float]:
        """True follow-up/baseline volume ratio of each rate region after ``years``."""
        return {
            region: trajectory(rate, self.acceleration, years)
            for region, rate in self.rates.items()
        }


def trajectory(rate, acceleration: float, years: float):
    """Volume ratio 1 + r t (1 + k (t - 2) / 2): mean rate r over two years, accelerating by k."""
    return 1.0 + rate * years * (1.0 + acceleration * (years - 2.0) / 2.0)


def assign_groups(fractions: dict[str, float], count: int, seed: int) -> list[str]:
    """Exactly rounded group sizes (largest remainder), shuffled with the cohort seed."""
    names = list(fractions)
    exact = np.array([fractions[name] * count for name in names])
    sizes = np.floor(exact).astype(int)
    for index in np.argsort(-(exact - sizes), kind="stable")[: count - sizes.sum()]:
        sizes[index] += 1
    labels = [name for name, size in zip(names, sizes, strict=True) for _ in range(size)]
    return list(seeded_rng(seed, 1 << 20).permutation(labels))


def rate_multiplier(scenario: Scenario, deviation: float, hidden) -> np.ndarray:
    """One region's participant factor; mean 1 before clipping (see the scenario file)."""
    gain, noise = scenario.progression["stage_gain"], scenario.progression["hidden_sd"]
    low, high = scenario.progression["multiplier_range"]
    factor = np.exp(gain * deviation + noise * np.asarray(hidden) - (gain**2 + noise**2) / 2)
    return np.clip(factor, low, high)


def expected_multiplier(scenario: Scenario, deviation: float) -> float:
    """A region's participant factor averaged over its hidden noise (Gauss-Hermite)."""
    return float(_WEIGHTS @ rate_multiplier(scenario, deviation, _NODES))


def correlated_normals(rng: np.random.Generator, count: int, correlation: float) -> np.ndarray:
    """``count`` standard normals with one common pairwise correlation (shared-factor form)."""
    shared = rng.normal()
    return np.sqrt(correlation) * shared + np.sqrt(1.0 - correlation) * rng.normal(size=count)


def acceleration(scenario: Scenario, diagnosis: str, deviations: dict[str, float]) -> float:
    """The participant's k: group value plus a share of the mean stage deviation, clipped."""
    progression = scenario.progression
    value = progression["acceleration"][diagnosis] + progression["acceleration_per_stage"] * float(
        np.mean(list(deviations.values()))
    )
    return float(np.clip(value, 0.0, progression["acceleration_max"]))


def age_factor(scenario: Scenario, age: float) -> float:
    progression = scenario.progression
    slope = progression["age_slope_per_decade"]
    return 1.0 + slope * (age - progression["age_reference_years"]) / 10.0


def population_waves(scenario: Scenario) -> tuple[np.ndarray, np.ndarray]:
    """The population folding pattern: wave directions (J, 3) and phases (J,)."""
    anatomy = scenario.anatomy
    rng = seeded_rng(int(anatomy["folding_seed"]))
    directions = rng.normal(size=(int(anatomy["folding_waves"]), 3))
    directions /= np.linalg.norm(directions, axis=1, keepdims=True)
    return directions, rng.uniform(0, 2 * np.pi, len(directions))


def build_anatomy(
    scenario: Scenario,
    sex: str,
    stages: dict[str, float],
    age: float,
    rng: np.random.Generator | None,
) -> tuple[Anatomy, float]:
    """A participant's baseline anatomy and head scale; ``rng=None`` gives the mean shape.

    ``stages`` maps each factor region to its stage (group mean plus deviation):
    each shows in that region's own baseline size.
    """
    spec, progression = scenario.anatomy, scenario.progression

    def jitter(sd: float, size=None):
        return np.ones(size) if rng is None else rng.normal(1.0, sd, size)

    head_scale = float(jitter(spec["head_size_sd"], 1)[0])
    if sex == "M":
        head_scale *= spec["male_linear_scale"]
    mean_axes = np.asarray(spec["intracranial_semi_axes_mm"], dtype=float)
    axes = mean_axes * head_scale * jitter(spec["axis_sd"], 3)
    stretch = axes / mean_axes
    reference = progression["age_reference_years"]
    ventricle_volume = np.exp(
        progression["baseline_ventricles_per_stage"] * stages["ventricles"]
        + progression["baseline_ventricles_per_year_of_age"] * (age - reference)
    )
    mirror = np.array([-1.0, 1.0, 1.0])
    centre = (
        np.asarray(spec["ventricle_centre_mm"], dtype=float) * stretch * np.cbrt(ventricle_volume)
    )
    semi = (
        np.asarray(spec["ventricle_semi_axes_mm"], dtype=float)
        * stretch
        * np.cbrt(ventricle_volume)
    )
    pitch = np.deg2rad(spec["hippocampus_pitch_degrees"])
    # columns: lateral axis, long axis (anterior end lower), vertical axis
    rotation = np.array(
        [[1, 0, 0], [0, np.cos(pitch), np.sin(pitch)], [0, -np.sin(pitch), np.cos(pitch)]]
    )
    hippocampus_scale = np.cbrt(
        np.exp(progression["baseline_hippocampus_per_stage"] * stages["hippocampus"])
    )
    cortex_scale = np.exp(progression["baseline_cortex_per_stage"] * stages["cortical_gm"])
    hippocampi = []
    for label, side in ((4, mirror), (5, np.ones(3))):
        hippocampi.append(
            Hippocampus(
                centre=np.asarray(spec["hippocampus_centre_mm"], dtype=float) * side * stretch,
                semi_axes=np.asarray(spec["hippocampus_semi_axes_mm"], dtype=float)
                * np.cbrt(np.prod(stretch))
                * hippocampus_scale
                * jitter(spec["structure_sd"], 3),
                rotation=rotation * side[:, None],
                reach=float(spec["hippocampus_reach"]),
                label=label,
            )
        )
    directions, phases = population_waves(scenario)
    if rng is not None:
        directions = directions + spec["folding_jitter"] * rng.normal(size=directions.shape)
        directions /= np.linalg.norm(directions, axis=1, keepdims=True)
        phases = phases + spec["folding_jitter"] * np.pi * rng.normal(size=phases.shape)
    anatomy = Anatomy(
        semi_axes=axes,
        skull_mm=float(spec["skull_mm"]),
        scalp_mm=float(spec["scalp_mm"]),
        pial_radius=float(spec["pial_radius"]),
        sulcal_depth=float(spec["sulcal_depth"]),
        sulcal_width=float(spec["sulcal_width"]),
        cortex_thickness=float(spec["cortex_thickness"]) * cortex_scale,
        wave_directions=directions,
        wave_phases=phases,
        frequency=float(spec["folding_frequency"]),
        ventricle_centres=np.stack([centre * mirror, centre]),
        ventricle_semi_axes=np.stack([semi, semi]),
        hippocampi=tuple(hippocampi),
    )
    anatomy.check_layout()
    return anatomy, head_scale


def mean_anatomy(scenario: Scenario) -> Anatomy:
    """The population-mean anatomy: a woman at the reference age with every stage 0."""
    stages = dict.fromkeys(FACTOR_REGIONS, 0.0)
    age = scenario.progression["age_reference_years"]
    return build_anatomy(scenario, "F", stages, age, rng=None)[0]


def draw_participant(
    scenario: Scenario, index: int, diagnosis: str, seed: int
) -> tuple[Draw, Anatomy]:
    """Draw participant number ``index`` (0-based) of a cohort with ``seed``."""
    rng = seeded_rng(seed, index, 0)
    draw = draw_progression(scenario, index, diagnosis, rng)
    if scenario.covariates:  # their own stream: every other draw is the same without them
        draw = with_covariates(scenario, draw, seeded_rng(seed, index, 6))
    stages = {
        region: scenario.progression["stage_mean"][diagnosis] + value
        for region, value in draw.deviations.items()
    }
    anatomy, head_scale = build_anatomy(scenario, draw.sex, stages, draw.baseline_age, rng)
    draw = replace(draw, head_scale=head_scale)
    return replace(draw, visit_years=_until_dropout(anatomy, draw)), anatomy


def draw_progression(
    scenario: Scenario, index: int, diagnosis: str, rng: np.random.Generator
) -> Draw:
    """Sex, age, factors, rates and planned visits of participant ``index`` from ``rng``:
    the first part of :func:`draw_participant`, before the anatomy (head scale 1, no
    drop-out yet), cheap enough to draw thousands."""
    cohort, progression = scenario.cohort, scenario.progression
    sex_fractions = cohort["sex_fractions"]
    sex = "F" if rng.random() < sex_fractions["F"] else "M"
    low, high = cohort["baseline_age_years"]
    age = round(float(rng.uniform(low, high)), 2)
    correlation = progression["factor_correlation"]
    z = correlated_normals(rng, len(FACTOR_REGIONS), correlation)
    e = correlated_normals(rng, len(FACTOR_REGIONS), correlation)
    deviations = {region: float(v) for region, v in zip(FACTOR_REGIONS, z, strict=True)}
    hidden = {region: float(v) for region, v in zip(FACTOR_REGIONS, e, strict=True)}
    factor = age_factor(scenario, age)
    multipliers = {
        region: float(
            rate_multiplier(scenario, deviations[FACTOR_OF[region]], hidden[FACTOR_OF[region]])
        )
        for region in RATE_REGIONS
    }
    first, last = cohort["follow_up_years"]
    follow_up = int(rng.integers(first, last + 1))
    jitter = cohort["visit_jitter_years"]
    years = (0.0,) + tuple(
        round(float(k + rng.uniform(-jitter, jitter)), 2) for k in range(1, follow_up + 1)
    )
    rates = {
        region: scenario.rates[region][diagnosis] * factor * multipliers[region]
        for region in RATE_REGIONS
    }
    return Draw(
        participant_id=f"sub-{index + 1:03d}",
        sex=sex,
        diagnosis=diagnosis,
        baseline_age=age,
        deviations=deviations,
        hidden=hidden,
        age_factor=factor,
        multipliers=multipliers,
        acceleration=acceleration(scenario, diagnosis, deviations),
        rates=rates,
        visit_years=years,
        head_scale=1.0,
    )


def with_covariates(scenario: Scenario, draw: Draw, rng: np.random.Generator) -> Draw:
    """``draw`` with a carrier status (a carrier's every rate times ``carrier_rate_factor``)
    and a cognitive score (0-30 points) at each planned visit, from ``rng``.

    The score is the group mean plus ``cognition_per_stage`` times the mean stage
    deviation, minus the group's decline per year, plus visit noise; a visit's score is
    missing with ``cognition_missing_fraction`` (all assumed, see the scenario file).
    """
    spec = scenario.covariates
    carrier = bool(rng.random() < spec["carrier_fraction"])
    stage = float(np.mean(list(draw.deviations.values())))
    level = spec["cognition_mean"][draw.diagnosis] + spec["cognition_per_stage"] * stage
    scores = []
    for t in draw.visit_years:
        score = level - spec["cognition_decline_per_year"][draw.diagnosis] * t
        score = float(np.clip(round(score + rng.normal(0.0, spec["cognition_sd"])), 0, 30))
        scores.append(None if rng.random() < spec["cognition_missing_fraction"] else score)
    factor = float(spec["carrier_rate_factor"]) if carrier else 1.0
    rates = {region: rate * factor for region, rate in draw.rates.items()}
    return replace(draw, carrier=carrier, carrier_factor=factor, cognition=tuple(scores),
                   rates=rates)  # fmt: skip


def _until_dropout(anatomy: Anatomy, draw: Draw) -> tuple[float, ...]:
    """Visits up to the first one the anatomy cannot reach (drop-out of extreme progressors).

    A very fast progressor's ventricles can outgrow the sulcal room left in the
    phantom's geometry; such a participant leaves the study before that visit.
    """
    for count, horizon in enumerate(draw.visit_years):
        try:
            Progression.at(anatomy, draw.ratios(horizon))
        except ValueError:
            return draw.visit_years[:count]
    return draw.visit_years


def best_forecast_ml(scenario: Scenario, draw: Draw, anatomy: Anatomy, years: float) -> dict:
    """Region volumes (mL) expected at ``years`` given all that is visible at baseline.

    Visible: anatomy, age, diagnosis, the regional stage deviations and hence
    the acceleration; each region's hidden rate noise is averaged out
    (Gauss-Hermite quadrature over its standard normal law).
    This is the best forecast any method could make: its error is the floor.
    """
    ratios = {}
    for region in RATE_REGIONS:
        multipliers = rate_multiplier(scenario, draw.deviations[FACTOR_OF[region]], _NODES)
        rate = (
            scenario.rates[region][draw.diagnosis]
            * draw.age_factor
            * multipliers
            * draw.carrier_factor
        )
        ratios[region] = float(_WEIGHTS @ trajectory(rate, draw.acceleration, years))
    return region_volumes(raw_volumes_at(anatomy.baseline_volumes_ml, ratios))
