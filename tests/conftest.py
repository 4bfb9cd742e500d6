"""Shared fixtures: a seeded generator and a tiny phantom cohort built once per session."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

NIBABEL_ANATOMICAL = (
    Path(__import__("nibabel").__file__).parent / "tests" / "data" / "anatomical.nii"
)


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261201)


@pytest.fixture(scope="session")
def tiny_cohort(tmp_path_factory) -> Path:
    """Four tiny phantom participants (4 mm voxels), seed 3."""
    from predictor.phantoms.generate import generate_cohort

    out = tmp_path_factory.mktemp("tiny") / "bids"
    return generate_cohort(out, participants=4, size="tiny", seed=3)
