"""Run the benchmarks: ``make bench`` (or ``python tests/benchmarks/run.py [NAME ...]``).

Each ``bench_*.py`` beside this file defines ``BENCHMARKS``, a dict of
name -> function returning a dict of measured figures. Every benchmark runs
in its own process so that its peak resident memory is its own. Results are
printed as a table and written to ``bench-results/benchmarks.json``.
Timings on shared 2-core machines are noisy: compare ratios within one run.
"""

from __future__ import annotations

import importlib.util
import json
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
RESULTS = HERE.parent.parent / "bench-results" / "benchmarks.json"


def discover() -> dict[str, object]:
    found = {}
    for path in sorted(HERE.glob("bench_*.py")):
        spec = importlib.util.spec_from_file_location(path.stem, path)
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
        for name, function in module.BENCHMARKS.items():
            found[f"{path.stem.removeprefix('bench_')}.{name}"] = function
    return found


def run_one(name: str) -> None:
    """Child process: run one benchmark and print its figures as JSON."""
    started = time.perf_counter()
    figures = discover()[name]()
    figures["wall_s"] = round(time.perf_counter() - started, 3)
    figures["peak_rss_mib"] = round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1)
    print(json.dumps(figures))


def main(selected: list[str]) -> int:
    names = [name for name in discover() if not selected or any(s in name for s in selected)]
    # a partial run updates the earlier results of the other benchmarks in place
    results = json.loads(RESULTS.read_text())["results"] if RESULTS.is_file() else {}
    for name in names:
        child = subprocess.run(
            [sys.executable, __file__, "--one", name], capture_output=True, text=True
        )
        if child.returncode != 0:
            print(f"{name}: FAILED\n{child.stderr[-2000:]}", file=sys.stderr)
            results[name] = {"error": child.stderr[-500:]}
            continue
        results[name] = json.loads(child.stdout.strip().splitlines()[-1])
        width = max(len(n) for n in names)
        figures = "  ".join(f"{key}={value}" for key, value in results[name].items())
        print(f"{name:<{width}}  {figures}", flush=True)
    RESULTS.parent.mkdir(exist_ok=True)
    payload = {
        "machine": platform.platform(),
        "python": platform.python_version(),
        "date": time.strftime("%Y-%m-%d %H:%M:%S"),
        "results": results,
    }
    RESULTS.write_text(json.dumps(payload, indent=2) + "\n")
    print(f"wrote {RESULTS}")
    return 1 if any("error" in results[name] for name in names) else 0


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--one":
        sys.path.insert(0, str(HERE.parent.parent))
        run_one(sys.argv[2])
    else:
        sys.exit(main(sys.argv[1:]))
