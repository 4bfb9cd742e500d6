"""Synthetic phantom cohort (predictor.phantoms)."""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from predictor.phantoms.anatomy import Progression, region_volumes
from predictor.phantoms.generate import TRUTH, generate_cohort
from predictor.phantoms.imaging import acquire, scanner_grid
from predictor.phantoms.participants import (
    assign_groups,
    draw_participant,
    draw_progression,
    trajectory,
)
from predictor.phantoms.scenario import RATE_REGIONS, Scenario
from predictor.rng import seeded_rng


@pytest.fixture(scope="module")
def scenario() -> Scenario:
    return Scenario.from_toml()


def _grid(low, high, step):
    axes = [np.arange(lo, hi, step) + step / 2 for lo, hi in zip(low, high, strict=True)]
    return np.stack(np.meshgrid(*axes, indexing="ij"), -1).reshape(-1, 3)


def _ellipsoid_area(a, b, c):
    # Knud Thomsen's approximation of an ellipsoid's surface area (relative error <= 1.061%).
    p = 1.6075
    return 4 * np.pi * (((a * b) ** p + (a * c) ** p + (b * c) ** p) / 3) ** (1 / p)


def test_hippocampus_voxel_volume_matches_ellipsoid_formula(scenario):
    # V = 4/3 pi a b c. A voxel (side h) is miscounted only if the surface passes
    # within half its diagonal (sqrt(3) h / 2) of its centre, so the counting error is
    # at most the volume of that band: area * sqrt(3) * h (area inflated by 1.1%).
    _, anatomy = draw_participant(scenario, 0, "CN", seed=5)
    hippocampus = anatomy.hippocampi[1]
    a, b, c = hippocampus.semi_axes
    exact = 4 / 3 * np.pi * a * b * c
    for step in (1.0, 0.5):
        reach = float(hippocampus.semi_axes.max()) + 2
        points = _grid(hippocampus.centre - reach, hippocampus.centre + reach, step)
        counted = (anatomy.labels(points) == hippocampus.label).sum() * step**3
        bound = _ellipsoid_area(a, b, c) * 1.011 * np.sqrt(3) * step
        assert abs(counted - exact) <= bound, (step, counted, exact, bound)
        assert abs(counted - exact) / exact < 0.05


def test_group_mean_rates_equal_configured_rates(scenario):
    # The age factor and participant factor have mean 1, so over many draws each
    # group's mean annual rate is the configured (published) one within 5%.
    groups = assign_groups(scenario.cohort["diagnosis_fractions"], 1500, seed=11)
    draws = [draw_progression(scenario, k, groups[k], seeded_rng(11, k, 0)) for k in range(1500)]
    for region in RATE_REGIONS:
        for group in scenario.diagnoses:
            rates = [d.rates[region] for d in draws if d.diagnosis == group]
            configured = scenario.rates[region][group]
            assert np.mean(rates) == pytest.approx(configured, rel=0.05), (region, group)
    hippocampus = {
        g: np.mean([d.rates["hippocampus"] for d in draws if d.diagnosis == g])
        for g in scenario.diagnoses
    }
    assert hippocampus["AD"] < hippocampus["MCI"] < hippocampus["CN"] < 0


def test_regional_factors_are_correlated_and_visible_at_baseline(scenario):
    # memory_clinic: each region has its own participant factor, correlated about 0.5
    # between regions (the scenario's assumption), and each region's stage deviation
    # shows in that region's own baseline size (Pearson r via scipy.stats).
    from scipy import stats

    draws = [draw_participant(scenario, k, "MCI", seed=3) for k in range(300)]
    factors = {
        region: np.log([d.multipliers[region] for d, _ in draws])
        for region in ("hippocampus", "ventricles", "cortical_gm")
    }
    for a, b in (("hippocampus", "ventricles"), ("hippocampus", "cortical_gm")):
        r = stats.pearsonr(factors[a], factors[b]).statistic
        assert 0.35 < r < 0.65, (a, b, r)
    volumes = [anatomy.baseline_volumes_ml for _, anatomy in draws]
    icv = np.array([v["icv"] for v in volumes])
    for region, compartment, sign in (
        ("hippocampus", "hippocampus_left", -1),
        ("ventricles", "ventricle_left", 1),
        ("cortical_gm", "cortical_gm", -1),
    ):
        size = np.array([v[compartment] for v in volumes]) / icv
        deviation = [d.deviations[region] for d, _ in draws]
        assert sign * stats.pearsonr(deviation, size).statistic > 0.3, region


def test_label_geometry_follows_the_rates(scenario):
    # Count labels on a fine grid at baseline and at 4 years: each region's change
    # equals the participant's own (accelerating) trajectory within 5%.
    draw, anatomy = draw_participant(scenario, 2, "AD", seed=4)
    assert draw.acceleration > 0
    ratios = draw.ratios(4.0)
    progression = Progression.at(anatomy, ratios)
    half = anatomy.semi_axes + 1
    points = _grid(-half, half, 1.0)
    before = anatomy.labels(points)
    after = progression.labels(points)
    for region, labels in [
        ("hippocampus", (4, 5)),
        ("ventricles", (6, 7)),
        ("cortical_gm", (2,)),
        ("wm", (3,)),
    ]:
        ratio = np.isin(after, labels).sum() / np.isin(before, labels).sum()
        assert ratio - 1 == pytest.approx(ratios[region] - 1, rel=0.05), region
    # Around each shrinking hippocampus the white matter does not grow: the space
    # it leaves fills with CSF (counted in the ball the hippocampus occupied).
    origin, _ = progression.pullback(points)
    for hippocampus in anatomy.hippocampi:
        ball_before = np.linalg.norm(hippocampus.local(points), axis=1) <= 1.2
        ball_after = np.linalg.norm(hippocampus.local(origin), axis=1) <= 1.2
        assert (after[ball_after] == 3).sum() <= (before[ball_before] == 3).sum()
        assert (after[ball_after] == 1).sum() > 0 == (before[ball_before] == 1).sum()


def test_progression_is_invertible_and_fixes_the_skull(scenario, rng):
    draw, anatomy = draw_participant(scenario, 1, "MCI", seed=2)
    progression = Progression.at(anatomy, draw.ratios(5.0))
    points = rng.uniform(-100, 100, size=(20_000, 3))
    origin, vacated = progression.pullback(progression.forward(points))
    np.testing.assert_allclose(origin, points, atol=1e-9)
    assert not vacated.any()  # every moved baseline point came from somewhere
    outside = np.linalg.norm(points / anatomy.semi_axes, axis=1) > 1
    np.testing.assert_array_equal(progression.forward(points)[outside], points[outside])


def test_cohort_truth_tables_show_progression(tiny_cohort):
    truth = pd.read_csv(tiny_cohort / TRUTH / "true_volumes.tsv", sep="\t")
    rates = pd.read_csv(tiny_cohort / TRUTH / "rates.tsv", sep="\t").set_index("participant_id")
    for pid, visits in truth.groupby("participant_id"):
        first, last = visits.iloc[0], visits.iloc[-1]
        assert last.ventricles > first.ventricles  # ventricular expansion
        assert last.hippocampus_left < first.hippocampus_left  # hippocampal shrinkage
        assert last.cortical_gm < first.cortical_gm  # cortical thinning
        expected = trajectory(
            rates.loc[pid, "hippocampus_percent_per_year"] / 100,
            rates.loc[pid, "acceleration_per_year"],
            last.years,
        )
        assert last.hippocampus_right / first.hippocampus_right == pytest.approx(expected, rel=1e-5)
    assert ((truth.icv > 1100) & (truth.icv < 1900)).all()
    # Plausible adult baseline volumes (the targets): lateral ventricles
    # 20-60 mL rising with age and disease, hippocampus about 3.3 mL per side.
    baseline = truth[truth.years == 0]
    assert baseline.ventricles.between(12, 90).all()
    assert 20 <= baseline.ventricles.median() <= 60
    assert baseline.hippocampus_left.between(2.0, 4.8).all()


def test_label_maps_agree_with_true_volumes(tiny_cohort):
    truth = pd.read_csv(tiny_cohort / TRUTH / "true_volumes.tsv", sep="\t")
    for row in truth.itertuples():
        path = tiny_cohort / TRUTH / row.participant_id / row.session_id / "anat"
        image = nib.load(path / f"{row.participant_id}_{row.session_id}_dseg.nii.gz")
        labels = np.asarray(image.dataobj)
        voxel_ml = abs(np.linalg.det(image.affine[:3, :3])) / 1000
        assert np.isin(labels, (3,)).sum() * voxel_ml == pytest.approx(row.wm, rel=0.03)
        assert np.isin(labels, (2,)).sum() * voxel_ml == pytest.approx(row.cortical_gm, rel=0.03)
        assert np.isin(labels, (6, 7)).sum() * voxel_ml == pytest.approx(row.ventricles, rel=0.1)


def test_t1_contrast_and_rician_background(tiny_cohort, scenario, rng):
    pid, session = "sub-001", "ses-01"
    image = nib.load(tiny_cohort / pid / session / "anat" / f"{pid}_{session}_T1w.nii.gz")
    labels = np.asarray(
        nib.load(
            tiny_cohort / TRUTH / pid / session / "anat" / f"{pid}_{session}_dseg.nii.gz"
        ).dataobj
    )
    data = image.get_fdata()
    wm, gm, csf = (np.median(data[labels == value]) for value in (3, 2, 1))
    assert wm > gm > csf
    # Background of a magnitude image is Rayleigh distributed: mean sigma * sqrt(pi / 2)
    # (Gudbjartsson and Patz 1995).
    size = scenario.size("tiny")
    noisy, drawn = acquire(np.zeros(size.shape, np.float32), size, scenario.imaging, rng)
    assert noisy.mean() == pytest.approx(drawn["noise_sd"] * np.sqrt(np.pi / 2), rel=0.03)


def test_same_seed_same_bytes_whatever_the_jobs(tmp_path):
    first = generate_cohort(tmp_path / "a", participants=2, size="tiny", seed=9)
    second = generate_cohort(tmp_path / "b", participants=2, size="tiny", seed=9, jobs=2)
    files = sorted(p.relative_to(first) for p in first.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(second) for p in second.rglob("*") if p.is_file())
    for name in files:
        assert (first / name).read_bytes() == (second / name).read_bytes(), name


def test_template_tissue_maps(tiny_cohort, scenario):
    folder = tiny_cohort / "derivatives" / "phantom-template"
    maps = {
        name: nib.load(folder / f"template_probseg-{name}.nii.gz").get_fdata()
        for name in ("GM", "WM", "CSF")
    }
    total = sum(maps.values())
    assert total.max() <= 1 + 1e-6 and total.min() >= 0
    affine, shape = scanner_grid(scenario.size("tiny"))
    assert maps["GM"].shape == shape
    voxel_ml = abs(np.linalg.det(affine[:3, :3])) / 1000
    from predictor.phantoms.participants import mean_anatomy

    anatomy = mean_anatomy(scenario)
    volumes = region_volumes(anatomy.baseline_volumes_ml)
    assert maps["GM"].sum() * voxel_ml == pytest.approx(volumes["total_gm"], rel=0.03)
    assert maps["WM"].sum() * voxel_ml == pytest.approx(volumes["wm"], rel=0.03)


def test_refuses_non_empty_output(tmp_path):
    from predictor.errors import OutputError

    (tmp_path / "keep.txt").write_text("user data")
    with pytest.raises(OutputError, match="not empty"):
        generate_cohort(tmp_path, participants=1)
    assert (tmp_path / "keep.txt").read_text() == "user data"


# --- scenarios ---------------------------------------------------------------------------------
def test_scenarios_are_named_or_given_by_path(tmp_path):
    from predictor.errors import ConfigError
    from predictor.phantoms.scenario import DEFAULT_SCENARIO, shipped_scenarios

    assert {"memory_clinic", "no_individual_signal"} <= set(shipped_scenarios())
    assert Scenario.from_toml("memory_clinic").name == Scenario.from_toml(DEFAULT_SCENARIO).name
    with pytest.raises(ConfigError, match="neither a shipped scenario"):
        Scenario.from_toml("no_such_scenario")
    from typer.testing import CliRunner

    from predictor.cli import app
    from predictor.cohort import read_cohort

    out = tmp_path / "control"
    result = CliRunner().invoke(
        app, ["phantoms", str(out), "--participants", "2", "--scenario", "no_individual_signal"]
    )
    assert result.exit_code == 0, result.output
    assert len(read_cohort(out)["participant_id"].unique()) == 2  # the project's BIDS reader
    refused = CliRunner().invoke(app, ["phantoms", str(tmp_path / "x"), "--scenario", "nope"])
    assert refused.exit_code == 2 and "neither a shipped scenario" in refused.output


@pytest.mark.parametrize("name", ["memory_clinic", "no_individual_signal"])
def test_negative_control_floor_is_the_diagnosis_and_age_average(name):
    """In no_individual_signal the best forecast from baseline knows diagnosis and age only.

    Expected ratio at t years: 1 + rate[dx] (1 + slope (age - ref) / 10) E[m] t (1 + k (t - 2) / 2),
    with k the group's acceleration and E[m] = E[clip(exp(s Z - s^2 / 2), lo, hi)] for
    standard normal Z, computed here by scipy's quad (an outside reference for the
    generator's Gauss-Hermite average). In memory_clinic the stages visible at baseline
    move the floor away from it.
    """
    from scipy import integrate, stats

    from predictor.phantoms.generate import true_volume_table

    scenario = Scenario.from_toml(name)
    progression = scenario.progression
    sd, (low, high) = progression["hidden_sd"], progression["multiplier_range"]
    mean_factor, _ = integrate.quad(
        lambda z: np.clip(np.exp(sd * z - sd**2 / 2), low, high) * stats.norm.pdf(z), -12, 12
    )
    _, best = true_volume_table(scenario, 60, seed=9)
    first = best.groupby("participant_id").transform("first")
    later = best["years"] > 0
    age = first["age"][later]
    slope, reference = progression["age_slope_per_decade"], progression["age_reference_years"]
    years = best["years"][later]
    shape = years * (
        1 + best["diagnosis"][later].map(progression["acceleration"]) * (years - 2) / 2
    )
    factor = (1 + slope * (age - reference) / 10) * shape
    for region, rates in (("hippocampus_left", "hippocampus"), ("ventricles", "ventricles")):
        rate = best["diagnosis"][later].map(scenario.rates[rates])
        ratio = best[region][later] / first[region][later]
        # the participant factor the floor implies, once diagnosis, age and horizon are divided out
        implied = (ratio - 1) / (rate * factor)
        if name == "no_individual_signal":
            assert implied.max() - implied.min() < 1e-9, region  # one value for everyone
            # the generator's 40-node Gauss-Hermite average of a clipped factor
            assert implied.mean() == pytest.approx(mean_factor, abs=2e-3), region
        else:
            assert implied.max() - implied.min() > 0.05, region  # the visible stage moves it


def test_scanner_change_crosses_protocols(tmp_path):
    # Some participants change protocol mid-study: larger voxels (the NIfTI header's
    # zooms, read by nibabel), another contrast; the project's BIDS reader accepts the
    # dataset, and each label map still matches the true volumes (label counts times
    # voxel volume, as in test_label_maps_agree_with_true_volumes).
    from predictor.cohort import read_cohort

    scenario = Scenario.from_toml("scanner_change")
    out = generate_cohort(tmp_path / "bids", participants=4, seed=6, scenario_path="scanner_change")
    visits = read_cohort(out)
    assert len(visits["participant_id"].unique()) == 4
    truth = pd.read_csv(out / TRUTH / "true_volumes.tsv", sep="\t")
    protocols = {}
    for row in truth.itertuples():
        sessions = pd.read_csv(
            out / row.participant_id / f"{row.participant_id}_sessions.tsv", sep="\t"
        )
        protocol = int(sessions.set_index("session_id").loc[row.session_id, "protocol"])
        protocols[(row.participant_id, row.session_id)] = protocol
        anat = f"{row.participant_id}/{row.session_id}/anat/{row.participant_id}_{row.session_id}"
        image = nib.load(out / f"{anat}_T1w.nii.gz")
        expected = scenario.size("tiny").voxel_mm * (1.25 if protocol == 2 else 1.0)
        np.testing.assert_allclose(image.header.get_zooms(), [expected] * 3)
        labels = nib.load(out / TRUTH / f"{anat}_dseg.nii.gz")
        voxel_ml = expected**3 / 1000
        counted = (np.asarray(labels.dataobj) == 3).sum() * voxel_ml
        assert counted == pytest.approx(row.wm, rel=0.05)
    assert 1 in protocols.values() and 2 in protocols.values()
    assert all(protocols[(pid, "ses-01")] == 1 for pid, _ in protocols)


def test_rescans_repeat_the_baseline_anatomy_with_a_new_acquisition(tmp_path):
    # rescan_fraction = 1: every baseline session holds run-1 and run-2 (BIDS "run"
    # entity), one truth row; the two scans share the anatomy (their label maps count
    # the same white matter within the partial-volume tolerance of the tests above) but
    # not the head pose, gain or noise. Other sessions keep one unnumbered scan.
    from predictor.cohort import read_cohort

    scenario = tmp_path / "rescans.toml"
    scenario.write_text('extends = "memory_clinic"\n[cohort]\nrescan_fraction = 1.0\n')
    out = generate_cohort(tmp_path / "bids", participants=2, seed=6, scenario_path=scenario)
    visits = read_cohort(out)
    first = visits.groupby("participant_id").head(1)
    assert first["rescan"].str.endswith("_run-2_T1w.nii.gz").all()
    assert visits.drop(first.index)["rescan"].isna().all()
    truth = pd.read_csv(out / TRUTH / "true_volumes.tsv", sep="\t")
    assert len(truth) == len(visits)
    draws = json.loads((out / TRUTH / "draws.json").read_text())["participants"]
    for row, draw in zip(first.itertuples(), draws, strict=True):
        one, two = (np.asarray(nib.load(path).dataobj) for path in (row.image, row.rescan))
        assert not np.array_equal(one, two)
        baseline = draw["visits"][0]
        assert baseline["pose_rotation"] != baseline["rescan"]["pose_rotation"]
        anat = out / TRUTH / row.participant_id / row.session_id / "anat"
        stem = f"{row.participant_id}_{row.session_id}"
        counts = [
            (np.asarray(nib.load(anat / f"{stem}_run-{run}_dseg.nii.gz").dataobj) == 3).sum()
            for run in (1, 2)
        ]
        true_wm = truth.set_index(["participant_id", "session_id"]).loc[
            (row.participant_id, row.session_id), "wm"
        ]
        voxel_ml = Scenario.from_toml().size("tiny").voxel_mm ** 3 / 1000
        for count in counts:
            assert count * voxel_ml == pytest.approx(true_wm, rel=0.05)
