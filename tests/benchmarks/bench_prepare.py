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


BENCHMARKS = {"demo_phantom_scan": demo_phantom_scan, "mni152_1mm_scan": mni152_1mm_scan}
