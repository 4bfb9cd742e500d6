"""Cross-validated evaluation (predictor evaluate) of tiny phantom cohorts: the evaluation
table as JSON.

Per target region: the network's own (Jacobian-integral) volumes minus the population
field and minus every regression (participant-level mean difference of |error| in % of
total brain volume, cluster-bootstrap 95% CI, verdict), its R^2 gain over the population
field with its CI, whether subject-specific skill is shown, the network's and the floor's
mean |error| and their ratio, and the coverage of each regression's 90% interval. The
goal (issue: cross-validated evaluation): on memory_clinic the network better than the
population field on ventricles and hippocampi, no worse than the best regression
anywhere, within 1.3x the floor; on no_individual_signal no subject-specific skill.
The tiny size (4 mm phantoms, the tiny network, 40 pairs an epoch) is what fits a
benchmark run on 2 cores; the figures are for that size only.
"""

from __future__ import annotations

import tempfile
import time
from dataclasses import replace
from pathlib import Path

PARTICIPANTS, FOLDS, PAIRS_PER_EPOCH = 30, 5, 40


def _evaluation(scenario: str) -> dict:
    from predictor.cohort import read_cohort
    from predictor.config import CONFIG_DIR
    from predictor.evaluate import evaluate
    from predictor.phantoms.generate import TEMPLATE, generate_cohort
    from predictor.prepare import PrepareSettings, prepare_cohort
    from predictor.training import TrainConfig

    config = TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml")
    config = replace(config, training=replace(config.training, max_pairs_per_epoch=PAIRS_PER_EPOCH))
    seconds = {}
    with tempfile.TemporaryDirectory() as folder:
        root = Path(folder)
        started = time.perf_counter()
        cohort = generate_cohort(root / "bids", PARTICIPANTS, "tiny", seed=5,
                                 scenario_path=scenario, jobs=2)  # fmt: skip
        seconds["phantoms"] = time.perf_counter() - started
        prepare_cohort(read_cohort(cohort), root / "work", cohort / TEMPLATE,
                       PrepareSettings.from_toml(grid_mm=4.0), jobs=2)  # fmt: skip
        seconds["prepare"] = time.perf_counter() - seconds["phantoms"] - started
        evaluation = evaluate(root / "work", root / "cv", FOLDS, config, jobs=2, measure=False)
        seconds["evaluate"] = time.perf_counter() - sum(seconds.values()) - started
    return {
        "participants": PARTICIPANTS,
        "folds": FOLDS,
        "stage_s": {k: round(v, 1) for k, v in seconds.items()},
    } | evaluation_table(evaluation)


def evaluation_table(evaluation) -> dict:
    """Per target region: the network's differences, skill, floor ratio, truth, coverage."""
    from predictor.compare import JACOBIAN, POPULATION

    tests, skill = evaluation.tests, evaluation.skill.set_index(["region", "method"])
    summary = evaluation.summary.set_index(["region", "method"])["mean_pct_tbv"]
    headlines = evaluation.headlines.set_index(["region", "network"])
    coverage = evaluation.coverage[evaluation.coverage["grouping"] == "all"]
    truth = evaluation.truth_summary.set_index(["region", "method"])["mean_pct_tbv"]
    truth_tests = evaluation.truth_tests.set_index(["region", "network", "comparator"])
    regions = {}
    for region, rows in tests[(tests["network"] == JACOBIAN) & (tests["role"] != "check")].groupby(
        "region", sort=False
    ):
        floor = summary.get((region, "floor (best possible)"), float("nan"))
        regions[region] = {
            "minus": {
                row.comparator: {
                    "difference": round(row.difference_pct_tbv, 4),
                    "ci": [round(row.ci_low_pct_tbv, 4), round(row.ci_high_pct_tbv, 4)],
                    "verdict": row.verdict,
                }
                for row in rows.itertuples()
            },
            "r2_gain_over_population": round(
                skill.loc[(region, JACOBIAN), "r2_gain_over_population"], 3
            ),
            "r2_gain_ci": [
                round(skill.loc[(region, JACOBIAN), c], 3) for c in ("gain_ci_low", "gain_ci_high")
            ],
            "subject_specific_skill": headlines.loc[(region, JACOBIAN), "subject_specific_skill"],
            "network_mean_pct_tbv": round(summary[(region, JACOBIAN)], 4),
            "population_mean_pct_tbv": round(summary[(region, POPULATION)], 4),
            "floor_mean_pct_tbv": round(floor, 4),
            "network_over_floor": round(summary[(region, JACOBIAN)] / floor, 2),
            # against the phantom's true change (measured baseline x true ratio)
            "against_truth": {
                "network_mean_pct_tbv": round(truth[(region, JACOBIAN)], 4),
                "floor_mean_pct_tbv": round(truth[(region, "floor (best possible)")], 4),
                "no_change_mean_pct_tbv": round(truth[(region, "no-change")], 4),
                "network_over_floor": round(
                    truth[(region, JACOBIAN)] / truth[(region, "floor (best possible)")], 2
                ),
                "minus_population": _difference(truth_tests.loc[(region, JACOBIAN, POPULATION)]),
                "minus_mixed_effects": _difference(
                    truth_tests.loc[(region, JACOBIAN, "mixed-effects")]
                ),
            },
            "coverage_90": {
                row.method: round(row.coverage, 3)
                for row in coverage[coverage["region"] == region].itertuples()
            },
        }
    return {
        "pairs": evaluation.data["pairs"],
        "not_fitted": sorted(evaluation.data["not_fitted"]),
        "regions": regions,
    }


def _difference(row) -> dict:
    return {
        "difference": round(row["difference_pct_tbv"], 4),
        "ci": [round(row["ci_low_pct_tbv"], 4), round(row["ci_high_pct_tbv"], 4)],
        "verdict": row["verdict"],
    }


def memory_clinic_tiny() -> dict:
    return _evaluation("memory_clinic")


def no_individual_signal_tiny() -> dict:
    return _evaluation("no_individual_signal")


BENCHMARKS = {
    "memory_clinic_tiny": memory_clinic_tiny,
    "no_individual_signal_tiny": no_individual_signal_tiny,
}
