"""Fit and predict time of every volume forecaster: 300 participants, 9 regions."""

from __future__ import annotations

import time
import warnings


def all_forecasters_300x9() -> dict:
    import numpy as np

    from predictor.phantoms.generate import true_volume_table
    from predictor.phantoms.scenario import Scenario
    from predictor.regions import RegionSet
    from predictor.regression import all_forecasters, baseline_rows, check_table

    truth, _ = true_volume_table(Scenario.from_toml(), 300, seed=1)
    regions = [*RegionSet.from_toml().names, "csf"]
    rng = np.random.default_rng(0)
    for region in regions:  # 1% measurement noise, as a real volume table has
        truth[region] = truth[region] * (1 + 0.01 * rng.normal(size=len(truth)))
    base = baseline_rows(check_table(truth, regions))
    figures, total = {"visits": len(truth)}, 0.0
    for name, forecaster in all_forecasters(jobs=2).items():
        started = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            forecaster.fit(truth, regions)
        forecaster.predict(base, [1, 2, 3, 5])
        seconds = time.perf_counter() - started
        figures[f"{name}_s"] = round(seconds, 2)
        total += seconds
    figures["total_s"] = round(total, 1)
    return figures


BENCHMARKS = {"all_forecasters_300x9": all_forecasters_300x9}
