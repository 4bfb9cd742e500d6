"""Phantom generation at the demo size: seconds per participant-visit."""

from __future__ import annotations

import tempfile
import time
from pathlib import Path


def demo_generation() -> dict:
    import pandas as pd

    from predictor.phantoms.generate import TRUTH, generate_cohort

    with tempfile.TemporaryDirectory() as folder:
        started = time.perf_counter()
        out = generate_cohort(Path(folder) / "bids", participants=3, size="demo", seed=1)
        seconds = time.perf_counter() - started
        visits = len(pd.read_csv(out / TRUTH / "true_volumes.tsv", sep="\t"))
    return {"participants": 3, "visits": visits, "s_per_visit": round(seconds / visits, 2)}


BENCHMARKS = {"demo_generation": demo_generation}
