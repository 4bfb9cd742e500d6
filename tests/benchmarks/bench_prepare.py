"""Time and peak memory of preparing one scan: a demo phantom and the 1 mm MNI152 T1."""

from __future__ import annotations

import tempfile
import time
from pathlib import Path


def _prepare_once(image: Path, template: str) -> dict:
    from predictor.nifti import load_scan
    from predictor.prepare import PrepareSettings, prepare_scan
    from predictor.regions import RegionSet
    from predictor.templates import load_template

    loaded = load_template(template, RegionSet.from_toml())
    scan = load_scan(image)
    started = time.perf_counter()
    result = prepare_scan(scan, loaded, PrepareSettings.from_toml())
    return {
        "shape": "x".join(map(str, scan.data.shape)),
        "s_per_scan": round(time.perf_counter() - started, 2),
        "brain_ml": round(result.volumes["brain"], 1),
    }


def demo_phantom_scan() -> dict:
    from predictor.phantoms.generate import TEMPLATE, generate_cohort

    with tempfile.TemporaryDirectory() as folder:
        cohort = generate_cohort(Path(folder) / "bids", participants=1, size="demo", seed=2)
        image = cohort / "sub-001" / "ses-01" / "anat" / "sub-001_ses-01_T1w.nii.gz"
        return _prepare_once(image, str(cohort / TEMPLATE))


def mni152_1mm_scan() -> dict:
    import nibabel as nib
    from nilearn import datasets

    with tempfile.TemporaryDirectory() as folder:
        image = Path(folder) / "mni.nii.gz"
        nib.save(datasets.load_mni152_template(resolution=1), image)
        return _prepare_once(image, "mni152")


def template_anatomy_accuracy() -> dict:
    """Five template_anatomy participants (2 mm) prepared against mni152: volume and change
    errors against the phantom truth (the accuracy the full demo's cohort gets)."""
    from predictor.cohort import read_cohort
    from predictor.demo import change_agreement, prepare_accuracy
    from predictor.phantoms.generate import generate_cohort
    from predictor.prepare import PrepareSettings, prepare_cohort

    with tempfile.TemporaryDirectory() as folder:
        cohort = generate_cohort(
            Path(folder) / "bids", 5, "demo", seed=0, scenario_path="template_anatomy", jobs=2
        )
        work = Path(folder) / "work"
        started = time.perf_counter()
        prepare_cohort(read_cohort(cohort), work, "mni152", PrepareSettings.from_toml(), 2)
        seconds = time.perf_counter() - started
        accuracy = prepare_accuracy(work, cohort).set_index("region")
        agreement = change_agreement(work, cohort).set_index(["region", "method"])
    figures = {"prepare_s": round(seconds, 1)}
    for region in ("brain", "ventricles", "hippocampus_left", "hippocampus_right", "wm"):
        figures[f"{region}_mean_error_pct"] = round(accuracy.loc[region, "mean_error_pct"], 1)
        figures[f"{region}_max_abs_error_pct"] = round(accuracy.loc[region, "max_abs_error_pct"], 1)
        for method, short in (("registration", "reg"), ("segmentation", "seg")):
            row = agreement.loc[(region, method)]
            figures[f"{region}_{short}_slope"] = round(row["slope"], 2)
            figures[f"{region}_{short}_r"] = round(row["pearson_r"], 2)
            figures[f"{region}_{short}_median_abs_error_pts"] = round(
                row["median_abs_error_pts"], 2
            )
    return figures


BENCHMARKS = {
    "demo_phantom_scan": demo_phantom_scan,
    "mni152_1mm_scan": mni152_1mm_scan,
    "template_anatomy_accuracy": template_anatomy_accuracy,
}
