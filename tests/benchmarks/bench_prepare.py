"""Time and peak memory of preparing one scan (a demo phantom, the 1 mm MNI152 T1), and of
a realistic-anatomy cohort with and without its change stage."""

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
    """Five template_anatomy participants (2 mm), each with a same-day rescan of its
    baseline, prepared against mni152: seconds per participant scan by scan (independent
    processing), for the change stage with and without demons (pairs registered on their
    own) and for the within-subject space with the change measured through it (demons
    off), the longitudinal paths' ratio to the independent path (goal: at most 1.5), volume
    errors and change errors against the phantom truth (slopes with a participant-bootstrap
    95% CI; ``pairwise_`` figures: pairs
    registered on their own, with demons), and the scan-rescan noise floor (the accuracy
    the full demo's cohort gets)."""
    from predictor.cohort import read_cohort
    from predictor.demo import change_agreement, prepare_accuracy
    from predictor.phantoms.generate import generate_cohort
    from predictor.prepare import PrepareSettings, prepare_cohort

    participants = 5
    with tempfile.TemporaryDirectory() as folder:
        scenario = Path(folder) / "rescans.toml"
        scenario.write_text('extends = "template_anatomy"\n[cohort]\nrescan_fraction = 1.0\n')
        cohort = generate_cohort(
            Path(folder) / "bids", participants, "demo", seed=0, scenario_path=scenario, jobs=2
        )
        table, work = read_cohort(cohort), Path(folder) / "work"
        seconds = {}
        # scans are cached across the runs (their key ignores [longitudinal]), so each
        # run after the first times its longitudinal stage; the last run's visit pairs and
        # rescans are aligned through the within-subject space (new pair keys, as a pair's
        # key holds its alignment): it times the space and every change measured through
        # it, and its changes and noise floor are the ones scored
        for name, longitudinal in (
            ("independent", {"enabled": False}),
            ("change_without_demons", {"demons": False, "within_subject": False}),
            ("change_with_demons", {"within_subject": False}),
            ("within_subject", {"demons": False}),
        ):
            settings = PrepareSettings.from_toml(longitudinal=longitudinal)
            started = time.perf_counter()
            prepare_cohort(table, work, "mni152", settings, 2)
            seconds[name] = time.perf_counter() - started
            if name == "change_with_demons":
                pairwise = change_agreement(work, cohort).set_index(["region", "method"])
        accuracy = prepare_accuracy(work, cohort).set_index("region")
        agreement = change_agreement(work, cohort).set_index(["region", "method"])
    independent, scans = seconds["independent"], len(table) + table["rescan"].notna().sum()
    figures = {
        "scans_per_participant": round(scans / participants, 1),
        "independent_s_per_participant": round(independent / participants, 1),
    }
    for name in ("change_without_demons", "change_with_demons", "within_subject"):
        figures[f"{name}_s_per_participant"] = round(seconds[name] / participants, 1)
    for name, parts in (
        ("without_demons", ("change_without_demons",)),
        ("with_demons", ("change_with_demons",)),
        ("within_subject_without_demons", ("within_subject",)),
    ):
        figures[f"longitudinal_{name}_ratio"] = round(
            (independent + sum(seconds[part] for part in parts)) / independent, 2
        )
    for region in ("brain", "ventricles", "hippocampus_left", "hippocampus_right", "wm"):
        figures[f"{region}_mean_error_pct"] = round(accuracy.loc[region, "mean_error_pct"], 1)
        figures[f"{region}_max_abs_error_pct"] = round(accuracy.loc[region, "max_abs_error_pct"], 1)
        for scores, prefix in ((pairwise, "pairwise_"), (agreement, "")):
            for method, short in (("registration", "reg"), ("segmentation", "seg")):
                row = scores.loc[(region, method)]
                if row["pairs"] == 0:  # wm by registration needs demons
                    continue
                figures[f"{prefix}{region}_{short}_slope"] = round(row["slope"], 2)
                figures[f"{prefix}{region}_{short}_slope_ci95"] = [
                    round(row["slope_ci_low"], 2), round(row["slope_ci_high"], 2)
                ]
                figures[f"{prefix}{region}_{short}_r"] = round(row["pearson_r"], 2)
                figures[f"{prefix}{region}_{short}_median_abs_error_pts"] = round(
                    row["median_abs_error_pts"], 2
                )
        for method, short in (("registration", "reg"), ("segmentation", "seg")):
            floor = accuracy.loc[region, f"median_abs_pct_{method}"]
            if floor == floor:  # not NaN (wm by registration needs demons)
                figures[f"{region}_{short}_rescan_median_abs_pct"] = round(floor, 3)
    return figures


BENCHMARKS = {
    "demo_phantom_scan": demo_phantom_scan,
    "mni152_1mm_scan": mni152_1mm_scan,
    "template_anatomy_accuracy": template_anatomy_accuracy,
}
