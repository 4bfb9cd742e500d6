"""Shared fixtures: a seeded generator and a tiny phantom cohort built once per session."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pytest

NIBABEL_ANATOMICAL = (
    Path(__import__("nibabel").__file__).parent / "tests" / "data" / "anatomical.nii"
)


def pytest_configure(config):
    """Under pytest-xdist (``make test`` runs two test processes, which share the cores),
    one PyTorch thread in each test process and in the commands it starts (they inherit
    OMP_NUM_THREADS): two processes of two threads each on two cores spin against each
    other (see predictor.parallel), and a command must train as the test process does
    for their weights to be compared bit for bit."""
    if os.environ.get("PYTEST_XDIST_WORKER"):
        os.environ["OMP_NUM_THREADS"] = "1"
        import torch

        torch.set_num_threads(1)


#: the slowest files (most of their time in fixtures), handed out first (make test keeps
#: this order: --no-loadscope-reorder) so that its two test processes finish together
SLOWEST_FIRST = (
    "test_evaluate.py",
    "test_covariates.py",
    "test_longitudinal.py",
    "test_cli.py",
    "test_prepare.py",
    "test_reliability.py",
    "test_regression.py",
    "test_ensemble.py",
)


def pytest_collection_modifyitems(config, items):
    """Order the files as :data:`SLOWEST_FIRST`, the others after them as collected."""

    def rank(item):
        name = item.path.name
        return SLOWEST_FIRST.index(name) if name in SLOWEST_FIRST else len(SLOWEST_FIRST)

    items.sort(key=rank)  # stable: tests keep their order within a file


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20261201)


@pytest.fixture(scope="session")
def tiny_cohort(tmp_path_factory) -> Path:
    """Four tiny phantom participants (4 mm voxels), seed 3."""
    from predictor.phantoms.generate import generate_cohort

    out = tmp_path_factory.mktemp("tiny") / "bids"
    return generate_cohort(out, participants=4, size="tiny", seed=3)


def built_once(tmp_path_factory, name: str, build) -> Path:
    """Folder ``name``, filled by ``build(folder)`` once per test run: under pytest-xdist
    the first test process to need it builds it under a file lock, and the other waits
    and reads the same folder (pytest-xdist's documented pattern). Its users only read it,
    or rewrite a file atomically with the same content."""
    from filelock import FileLock

    root = tmp_path_factory.getbasetemp()
    if os.environ.get("PYTEST_XDIST_WORKER"):
        root = root.parent  # shared by the run's test processes
    folder = root / name
    with FileLock(f"{folder}.lock"):
        if not (root / f"{name}.complete").is_file():
            shutil.rmtree(folder, ignore_errors=True)
            build(folder)
            (root / f"{name}.complete").touch()
    return folder


@pytest.fixture(scope="session")
def tiny_workspace(tmp_path_factory) -> Path:
    """Twenty tiny phantom participants (seed 4) prepared on a 4 mm working grid."""
    from helpers import BOUNDARY_CHANGE_ONLY

    from predictor.cohort import read_cohort
    from predictor.phantoms.generate import TEMPLATE, generate_cohort
    from predictor.prepare import prepare_cohort

    def build(root):
        cohort = generate_cohort(root / "bids", participants=20, size="tiny", seed=4, jobs=2)
        settings = BOUNDARY_CHANGE_ONLY
        prepare_cohort(read_cohort(cohort), root / "work", cohort / TEMPLATE, settings, 2)

    return built_once(tmp_path_factory, "tinywork", build) / "work"


@pytest.fixture(scope="session")
def stand_in_model(tmp_path_factory) -> Path:
    """An untrained constant-velocity model folder (mni152 grid): for tests of model files
    that need no training."""
    from helpers import constant_velocity_model, write_model_folder

    folder = tmp_path_factory.mktemp("standin") / "model"
    return write_model_folder(constant_velocity_model(velocity=(0.0, 0.0, 0.1)), folder)


@pytest.fixture(scope="session")
def tiny_model(tiny_workspace, tmp_path_factory) -> Path:
    """The tiny config trained on the tiny workspace (configs/train-tiny.toml), 4 epochs."""
    from predictor.config import CONFIG_DIR
    from predictor.training import TrainConfig, train

    def build(folder):
        config = TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml")
        train(tiny_workspace, folder / "model", config, epochs=4)

    return built_once(tmp_path_factory, "tinymodel", build) / "model"
