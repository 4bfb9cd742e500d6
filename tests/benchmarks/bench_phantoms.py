"""Phantom generation at the demo size (2 mm): seconds per participant-visit, per scenario."""

from __future__ import annotations

import tempfile
import time
from pathlib import Path


def _per_visit(scenario: str, participants: int = 3, jobs: int = 1) -> dict:
    import pandas as pd

    from predictor.phantoms.generate import TRUTH, generate_cohort

    with tempfile.TemporaryDirectory() as folder:
        started = time.perf_counter()
        out = generate_cohort(
            Path(folder) / "bids", participants, "demo", seed=1, scenario_path=scenario, jobs=jobs
        )
        seconds = time.perf_counter() - started
        visits = len(pd.read_csv(out / TRUTH / "true_volumes.tsv", sep="\t"))
    return {
        "participants": participants,
        "visits": visits,
        "jobs": jobs,
        "s_per_visit": round(seconds / visits, 2),
    }


def memory_clinic() -> dict:
    return _per_visit("memory_clinic")


def scanner_change() -> dict:
    return _per_visit("scanner_change")


def no_individual_signal() -> dict:
    return _per_visit("no_individual_signal")


def template_anatomy() -> dict:
    """Per visit after the one-off template setup (timed apart: once per process)."""
    from predictor.phantoms.template_anatomy import template_base

    started = time.perf_counter()
    template_base()
    setup = time.perf_counter() - started
    return _per_visit("template_anatomy") | {"template_setup_s": round(setup, 2)}


def demo_cohort() -> dict:
    """The full demo's phantom stage: 30 participants of the demo's scenario, 2 workers."""
    from predictor.demo import DemoSettings

    settings = DemoSettings.from_toml(quick=False)
    started = time.perf_counter()
    figures = _per_visit(settings.scenario, settings.participants, jobs=2)
    return figures | {
        "scenario": settings.scenario,
        "total_s": round(time.perf_counter() - started, 1),
    }


BENCHMARKS = {
    "memory_clinic": memory_clinic,
    "scanner_change": scanner_change,
    "no_individual_signal": no_individual_signal,
    "template_anatomy": template_anatomy,
    "demo_cohort": demo_cohort,
}
