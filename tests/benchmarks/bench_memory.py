"""Peak memory of ``prepare`` as a cohort grows from 20 to 200 scans (tiny phantom copies).

The goal is memory that stays flat: the coordinating process and the largest
worker at 200 scans within 15% (plus 30 MB) of their peaks at 20 scans.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
from pathlib import Path

PROBE = """
import resource, sys
import pandas as pd
from predictor.prepare import PrepareSettings, prepare_cohort
table = pd.read_csv(sys.argv[1], sep="\\t").fillna("")
prepare_cohort(table, sys.argv[2], sys.argv[3], PrepareSettings.from_toml(grid_mm=4.0), jobs=2)
own = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
workers = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
print(own, workers)
"""


def prepare_20_to_200_scans() -> dict:
    import nibabel as nib
    import numpy as np
    import pandas as pd

    from predictor.cohort import read_cohort
    from predictor.phantoms.generate import TEMPLATE, generate_cohort

    with tempfile.TemporaryDirectory() as root:
        root = Path(root)
        cohort = generate_cohort(root / "bids", participants=1, size="tiny", seed=4)
        row = read_cohort(cohort).iloc[:1].drop(columns="brain_mask")
        good = nib.load(row["image"].iloc[0])
        peaks = {}
        for count in (20, 200):
            folder = root / f"c{count}"
            folder.mkdir()
            rows = []
            for k in range(count):  # distinct bytes (so no cache hits), same anatomy
                data = good.get_fdata()
                data[0, 0, 0] = k  # one background voxel
                path = folder / f"s{k}.nii.gz"
                nib.save(nib.Nifti1Image(data.astype(np.int16), good.affine), path)
                rows.append(row.assign(participant_id=f"p{k:03d}", image=str(path)))
            table = folder / "cohort.tsv"
            pd.concat(rows).to_csv(table, sep="\t", index=False)
            done = subprocess.run(
                [sys.executable, "-c", PROBE, str(table), str(folder / "work"),
                 str(cohort / TEMPLATE)],
                capture_output=True, text=True, timeout=1800, check=True,
            )  # fmt: skip
            peaks[count] = [int(v) for v in done.stdout.split()]
    (own20, workers20), (own200, workers200) = peaks[20], peaks[200]
    return {
        "own_mib_20": round(own20 / 1024, 1),
        "own_mib_200": round(own200 / 1024, 1),
        "worker_mib_20": round(workers20 / 1024, 1),
        "worker_mib_200": round(workers200 / 1024, 1),
        "flat": bool(own200 < own20 * 1.15 + 30_000 and workers200 < workers20 * 1.15 + 30_000),
    }


BENCHMARKS = {"prepare_20_to_200_scans": prepare_20_to_200_scans}
