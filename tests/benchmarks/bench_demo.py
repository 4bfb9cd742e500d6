"""The full demo: wall time per stage, epoch time, peak memory and its comparison table.

The goal (issue: held-out comparison) is the network at or below the best
regression on the large regions (total GM, WM, cortical GM, ventricles) and
within 10% of it on the hippocampi; the table is kept so releases compare.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path


def full_demo() -> dict:
    import pandas as pd

    from predictor.demo import run_demo

    stamps = []

    def on_stage(name, items):
        stamps.append((name, time.perf_counter()))
        return None

    with tempfile.TemporaryDirectory() as folder:
        started = time.perf_counter()
        result = run_demo(Path(folder) / "demo", quick=False, jobs=2, on_stage=on_stage)
        finished = time.perf_counter()
        log = pd.read_csv(result["folders"]["model"] / "log.tsv", sep="\t")
    ends = [t for _, t in stamps[1:]] + [finished]
    stages = {name: round(end - start, 1) for (name, start), end in zip(stamps, ends, strict=True)}
    tests = result["comparison"].tests
    rows = {
        f"{row.region}/{row.network}/{row.comparator}": {
            "difference": round(row.difference_pct_tbv, 4),
            "ci": [round(row.ci_low_pct_tbv, 4), round(row.ci_high_pct_tbv, 4)],
            "verdict": row.verdict,
        }
        for row in tests.itertuples()
    }
    return {
        "demo_s": round(finished - started, 1),
        "stage_s": stages,
        "epochs": len(log),
        "epoch_s_mean": round(float(log["seconds"].mean()), 1),
        "comparison_pct_tbv": rows,
    }


BENCHMARKS = {"full_demo": full_demo}
