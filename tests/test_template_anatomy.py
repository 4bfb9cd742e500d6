"""Phantoms built from the MNI152 template (predictor.phantoms.template_anatomy)."""

from __future__ import annotations

import dataclasses
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import torch

from predictor.fields import exp_velocity, identity_grid, sample_at
from predictor.phantoms.generate import TRUTH, generate_cohort
from predictor.phantoms.participants import draw_participant
from predictor.phantoms.scenario import Scenario
from predictor.phantoms.template_anatomy import (
    GRID_MM,
    MAPS,
    Subject,
    carried_volumes_ml,
    poisson_dirichlet,
    progression_time,
    template_base,
)
from predictor.rng import seeded_rng


@pytest.fixture(scope="module")
def scenario() -> Scenario:
    return Scenario.from_toml("template_anatomy")


def test_poisson_solver_inverts_the_seven_point_laplacian(rng):
    # The DST-I solution satisfies the 7-point Laplacian (scipy.ndimage.laplace stencil,
    # an outside implementation) with zero Dirichlet values beyond the grid.
    from scipy import ndimage

    source = rng.normal(size=(12, 10, 9))
    phi = poisson_dirichlet(source, 2.0)
    laplacian = ndimage.laplace(np.pad(phi, 1), mode="constant")[1:-1, 1:-1, 1:-1] / 4.0
    np.testing.assert_allclose(laplacian, source, atol=1e-9)


def test_time_zero_volumes_are_the_nilearn_maps_own():
    # Identity warp: the truth equals the sums of nilearn's shipped MNI152 2009a GM and WM
    # maps (normalised by their maximum, as the mni152 template does) within 1%.
    from nilearn import datasets

    base = template_base()
    zero = torch.zeros((1, 3) + base.shape)
    volumes = carried_volumes_ml(base, zero, np.ones(3))
    for name, loader in (
        ("total_gm", datasets.load_mni152_gm_template),
        ("wm", datasets.load_mni152_wm_template),
    ):
        data = loader(resolution=1).get_fdata()
        assert volumes[name] == pytest.approx(data.sum() / data.max() / 1000, rel=0.01), name


def _forward_jacobian(displacement: np.ndarray) -> np.ndarray:
    """det(I + grad u) by numpy's central differences (written here, not the project's)."""
    grad = np.stack([np.stack(np.gradient(displacement[k]), axis=0) for k in range(3)])
    matrix = np.moveaxis(grad, (0, 1), (-2, -1)) + np.eye(3)
    return np.linalg.det(matrix)


def test_truth_follows_the_jacobian_and_the_rates(scenario):
    # Without the inter-subject warp, the true change from baseline equals the integral
    # of the forward map's Jacobian determinant over the baseline maps (an independent
    # computation), and each region's two-year change is near its drawn rate.
    draw, _ = draw_participant(scenario, 4, "AD", seed=2)
    subject = Subject.build(scenario, draw, seeded_rng(2, 4, 3))
    subject = dataclasses.replace(
        subject, inverse_subject=torch.zeros_like(subject.inverse_subject), linear=np.ones(3)
    )
    base = subject.base
    before, after = (
        subject.volumes_ml(subject.pullback(0.0)),
        subject.volumes_ml(subject.pullback(2.0)),
    )
    baseline_maps = sample_at(base.maps, identity_grid(base.shape) + subject.before_baseline)[0]
    forward = exp_velocity(subject.velocity, progression_time(draw, 2.0), 4)[0].numpy()
    jacobian = _forward_jacobian(forward)
    for name, region, rate in (
        ("hippocampus_left", "hippocampus_left", "hippocampus"),
        ("ventricles", "ventricles", "ventricles"),
        ("wm", "WM", "wm"),
    ):
        weights = baseline_maps[MAPS.index(region)].numpy()
        expected = (weights * jacobian).sum() / weights.sum()
        ratio = after[name] / before[name]
        # two discretisations (interpolated carried maps, central-difference Jacobian)
        # of one change: within 10% of it (measured: wm 1%, ventricles 3%, hippocampus 9%)
        assert abs(ratio - expected) <= 0.1 * abs(expected - 1) + 1e-3, name
        two_year = 1 + draw.rates[rate] * progression_time(draw, 2.0)
        assert ratio - 1 == pytest.approx(two_year - 1, rel=0.25), name
    assert after["icv"] == pytest.approx(before["icv"], rel=0.002)  # CSF fills the space


def test_cohort_is_bids_and_reproducible(tmp_path, scenario):
    from predictor.cohort import read_cohort

    first = generate_cohort(
        tmp_path / "a", participants=1, seed=4, scenario_path="template_anatomy"
    )
    second = generate_cohort(
        tmp_path / "b", participants=1, seed=4, scenario_path="template_anatomy"
    )
    assert len(read_cohort(first)) >= 3  # the project's BIDS reader accepts it
    truth = pd.read_csv(first / TRUTH / "true_volumes.tsv", sep="\t")
    for row in truth.itertuples():  # every scan of the session (a rescan too) and its labels
        anat = Path(row.participant_id) / row.session_id / "anat"
        scans = sorted((first / anat).glob("*_T1w.nii.gz"))
        label_maps = sorted((first / TRUTH / anat).glob("*_dseg.nii.gz"))
        assert scans and len(scans) == len(label_maps)
        for path in scans + label_maps:
            relative = path.relative_to(first)
            assert path.read_bytes() == (second / relative).read_bytes(), relative
        for path in label_maps:
            labels = nib.load(path)
            voxel_ml = abs(np.linalg.det(labels.affine[:3, :3])) / 1000
            counted = (np.asarray(labels.dataobj) == 3).sum() * voxel_ml  # label counts
            assert counted == pytest.approx(row.wm, rel=0.1)
    assert GRID_MM == 2.0
    assert not (first / "derivatives" / "phantom-template").exists()  # prepared against mni152
