"""Change between visits measured by registration (predictor.longitudinal)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import SimpleITK as sitk

from predictor.longitudinal import Visit, pair_change
from predictor.prepare import PrepareSettings
from predictor.regions import RegionSet

SETTINGS = PrepareSettings.from_toml().longitudinal
REGIONS = RegionSet.from_toml()


@pytest.fixture(scope="module")
def mni_visit() -> Visit:
    return mni_as_visit()


def mni_as_visit() -> Visit:
    """nilearn's MNI152 2009a T1 and GM/WM maps at 2 mm as a prepared visit (shipped data)."""
    from nilearn import datasets

    t1_image = datasets.load_mni152_template(resolution=2)
    brain = datasets.load_mni152_brain_mask(resolution=2).get_fdata() > 0
    gm = datasets.load_mni152_gm_template(resolution=2).get_fdata()
    wm = datasets.load_mni152_wm_template(resolution=2).get_fdata()
    gm, wm = gm / gm.max(), wm / wm.max()
    csf = np.where(brain, np.clip(1 - gm - wm, 0, 1), 0)
    t1 = t1_image.get_fdata() * brain
    t1 = t1 / np.median(t1[wm > 0.9])
    zero = np.zeros_like(gm)
    return Visit(
        t1=t1.astype(np.float32),
        affine=t1_image.affine,
        tissue={"GM": gm * brain, "WM": wm * brain, "CSF": csf},
        deep=dict.fromkeys(REGIONS.deep, zero),
    )


def _scaled(visit: Visit, factor: float) -> Visit:
    """The visit scaled by ``factor`` about its brain's centre (SimpleITK resampling)."""
    from predictor.spatial import from_sitk, to_sitk

    index = np.argwhere(visit.t1 > 0).mean(axis=0)
    centre = index @ visit.affine[:3, :3].T + visit.affine[:3, 3]
    transform = sitk.ScaleTransform(3, [1 / factor] * 3)  # output point -> input point
    transform.SetCenter((centre * [-1, -1, 1]).tolist())  # RAS -> LPS

    def scaled(array):
        image = to_sitk(array.astype(np.float32), visit.affine)
        return from_sitk(sitk.Resample(image, image, transform, sitk.sitkLinear, 0.0))[0]

    return Visit(
        t1=scaled(visit.t1),
        affine=visit.affine,
        tissue={k: scaled(v) for k, v in visit.tissue.items()},
        deep={k: scaled(v) for k, v in visit.deep.items()},
    )


def test_uniform_scaling_is_measured_and_inverse_consistent(mni_visit):
    # A brain scaled by 0.98 about its centre has exactly 0.98^3 = 0.941192 of its volume.
    # Total grey matter (demons Jacobian) is measured within 0.3 percentage points; the
    # whole brain (boundary shift integral) only within 1.5 (measured -7.2% for -5.9%:
    # the 0.2-point goal is not met). Swapping the visits inverts the ratio.
    later = _scaled(mni_visit, 0.98)
    forward = pair_change(mni_visit, later, REGIONS, SETTINGS)
    backward = pair_change(later, mni_visit, REGIONS, SETTINGS)
    for region, tolerance in (("total_gm", 0.003), ("brain", 0.015)):
        assert forward["ratio"][region] == pytest.approx(0.98**3, abs=tolerance), region
        assert forward["ratio"][region] * backward["ratio"][region] == pytest.approx(
            1.0, abs=0.001
        ), region


def test_log_jacobian_target_of_a_uniformly_scaled_brain(mni_visit):
    # The training target of a pair (demons on the working grid, one level at half its
    # resolution) for a brain scaled by 0.98 about its centre: inside the brain (eroded
    # 3 voxels) its mean is the exact 3 log 0.98 = -0.0606 within 0.01 (measured -0.056);
    # identical visits give exactly 0. Weighted by GM + WM it reads 0.960 for the exact
    # 0.941: the smooth field spreads the edge's change into the CSF outside the brain, the
    # weakness that makes this a poor regional measure (see configs/train.toml).
    from scipy import ndimage

    from predictor.within_subject import pair_log_jacobian

    later = _scaled(mni_visit, 0.98)
    measured = pair_log_jacobian(mni_visit.t1, later.t1, mni_visit.affine, SETTINGS)
    inner = ndimage.binary_erosion(mni_visit.mask, iterations=3)
    assert measured[inner].mean() == pytest.approx(3 * np.log(0.98), abs=0.01)
    same = pair_log_jacobian(mni_visit.t1, mni_visit.t1, mni_visit.affine, SETTINGS)
    assert np.abs(same).max() == 0.0


def test_identical_visits_show_no_change(mni_visit):
    same = pair_change(mni_visit, mni_visit, REGIONS, SETTINGS)
    for region in ("brain", "wm", "total_gm", "icv"):
        assert same["ratio"][region] == pytest.approx(1.0, abs=1e-3), region


def test_boundary_shift_of_a_noisy_translated_edge_with_and_without_trim(rng):
    # An edge moved by d voxels: the clipped intensities' change summed over the edge is
    # exactly d times the window's width for any monotone profile (the boundary shift
    # integral's premise, Freeborough and Fox 1997). With noise of SD s on the pure
    # tissues, an untrimmed window (clipped at their mean intensities) counts each
    # changed voxel short by E|min(0, noise)| + E|max(0, noise)| = 2 s / sqrt(2 pi) (the
    # half-normal mean) of the window's width (exact in expectation: the shift telescopes
    # to d times the clipped window's mean width); trimming a fifth at each end removes
    # most of it (1.6 SDs from each pure tissue: about 1% left).
    from scipy.stats import norm

    from predictor.longitudinal import boundary_shift

    shape, d, sd = (40, 30, 30), 3, 0.05
    x = np.arange(shape[0])[:, None, None]
    outside, inside = 0.3, 0.7  # e.g. CSF and GM of a normalised T1

    def image(edge):  # inside tissue below ``edge`` (voxels along x), blurred over ~2 voxels
        profile = outside + (inside - outside) * norm.cdf((edge - x) / 1.0)
        return np.broadcast_to(profile, shape) + rng.normal(0, sd, shape)

    fixed, moved = image(20.0), image(20.0 - d)  # the region loses d slabs of 30 x 30
    regions = [np.broadcast_to(x < edge, shape) for edge in (20, 20 - d)]
    expected = -d * shape[1] * shape[2]
    untrimmed = boundary_shift(fixed, moved, *regions, [outside, inside], 4)
    trimmed = boundary_shift(fixed, moved, *regions, [outside, inside], 4, trim=0.2)
    assert trimmed == pytest.approx(expected, rel=0.03)
    # the undercount predicted above: edge voxels are d voxels of full change per column
    short = 2 * sd / np.sqrt(2 * np.pi) / (inside - outside)
    assert untrimmed == pytest.approx(expected * (1 - short), rel=0.03)
    assert abs(untrimmed) < abs(trimmed)
    # a window given the other way round (the ventricles': the outside tissue, WM, brighter
    # than the inside, CSF) gets the sign right: the dark side, now the region, grows
    bright_inside = boundary_shift(fixed, moved, *[~r for r in regions], [inside, outside], 4, 0.2)
    assert bright_inside == pytest.approx(-expected, rel=0.03)


def test_differential_bias_correction_removes_a_smooth_ratio_not_a_change(mni_visit):
    # Lewis and Fox 2004 (NeuroImage): two aligned visits that differ by a smooth
    # multiplicative field. The MNI152 template (nilearn) as the earlier visit; the later
    # is the same anatomy under a coil-like field (brighter at the centre, 0.84-1.05 over
    # the brain), renormalised to its pure white matter as prepare does. The field
    # recovered from pure white matter matches the true ratio over the whole brain mask
    # within 2%, median 0.5% (measured 0.4% and 0.02%); the whole brain's boundary shift
    # (visits aligned by the identity) then reads no change within 0.1 point (measured
    # +0.003%), where without the correction the field reads as loss (-1.44%). Scaled by
    # 0.98 as well (and registered), the change is measured within 0.3 points of the
    # same scaling without the field (-7.0% against -7.2%; for the exact -5.9% and the
    # boundary shift's overcount, see the scaling test above). With too few pure voxels
    # for a quadratic the field is their constant ratio.
    from dataclasses import replace

    from predictor.longitudinal import PURE, differential_bias

    centre = np.array(mni_visit.t1.shape) / 2
    axes = np.indices(mni_visit.t1.shape).reshape(3, -1).T
    radius_mm = np.linalg.norm((axes - centre) * 2.0, axis=1).reshape(mni_visit.t1.shape)
    field = np.exp(np.log(0.88) * (radius_mm / 80.0) ** 2)
    pure_wm = mni_visit.tissue["WM"] > PURE
    field = field / np.median(field[pure_wm])
    biased = replace(mni_visit, t1=(mni_visit.t1 * field).astype(np.float32))

    recovered = differential_bias(mni_visit.t1, biased.t1, pure_wm, 2.0, 20.0)
    error = np.abs(recovered * field - 1.0)[mni_visit.mask]
    assert error.max() < 0.02 and np.median(error) < 0.005

    off = replace(SETTINGS, demons=False, differential_bias_mm=0.0)
    on = replace(SETTINGS, demons=False)
    identity = np.eye(4)
    uncorrected = pair_change(mni_visit, biased, REGIONS, off, identity)["ratio"]["brain"]
    corrected = pair_change(mni_visit, biased, REGIONS, on, identity)["ratio"]["brain"]
    assert corrected == pytest.approx(1.0, abs=0.001)
    assert abs(uncorrected - 1.0) > 5 * abs(corrected - 1.0)
    measured = [pair_change(mni_visit, _scaled(later, 0.98), REGIONS, on)["ratio"]["brain"]
                for later in (biased, mni_visit)]  # fmt: skip
    assert measured[0] == pytest.approx(measured[1], abs=0.003)
    few = np.zeros_like(pure_wm)
    few[40:43, 50:53, 40:44] = True  # 36 voxels: 8 blocks of 2 x 2 x 2 at most
    constant = differential_bias(mni_visit.t1, 1.01 * mni_visit.t1, few, 2.0, 20.0)
    assert np.allclose(constant[mni_visit.mask], 1 / 1.01, rtol=1e-5)


def test_jacobian_filter_on_axis_aligned_fields_is_numpys_determinant(rng):
    # SimpleITK's DisplacementFieldJacobianDeterminantFilter on an axis-aligned image (as
    # demons_jacobian hands it) equals det(I + grad u) by numpy's central differences.
    from scipy import ndimage

    shape, spacing = (20, 22, 18), (2.0, 2.0, 2.0)
    field = np.stack([ndimage.gaussian_filter(rng.normal(size=shape), 3) * 4 for _ in range(3)])
    # SimpleITK arrays are (z, y, x) with the vector's x component first
    image = sitk.GetImageFromArray(np.moveaxis(field, 0, -1).astype(np.float64), isVector=True)
    image.SetSpacing(spacing)
    filtered = sitk.GetArrayFromImage(sitk.DisplacementFieldJacobianDeterminant(image))
    # numpy: array axes (z, y, x) <-> components (x, y, z) reversed
    grad = np.stack(
        [np.stack(np.gradient(field[c], spacing[0])[::-1], axis=0) for c in range(3)]
    )  # grad[c, a] = d u_c / d x_a
    matrix = np.moveaxis(grad, (0, 1), (-2, -1)) + np.eye(3)
    inner = (slice(1, -1),) * 3
    np.testing.assert_allclose(filtered[inner], np.linalg.det(matrix)[inner], atol=1e-6)


def test_slope_interval_resamples_whole_participants(rng):
    # 40 participants, 6 pairs each, sharing a participant-level slope: the percentile
    # bootstrap CI of the slope (whole participants resampled) matches statsmodels'
    # cluster-robust 95% interval of the OLS slope (an outside reference; on 8 seeds its
    # width was 0.97-1.02 times that one's) and is wider than the naive interval that
    # treats the pairs as independent (1.29-1.54 times).
    import statsmodels.api as sm

    from predictor.compare import BOOTSTRAP
    from predictor.demo import slope_ci

    participants = np.repeat(np.arange(40), 6)
    x = rng.uniform(0, 10, participants.size)
    own_slope = rng.normal(1.0, 0.3, 40)[participants]
    y = own_slope * x + rng.normal(0, 0.1, participants.size)
    people = np.unique(participants)
    low, high = slope_ci(x, y, participants, people[rng.integers(0, 40, (BOOTSTRAP, 40))])
    fit = sm.OLS(y, sm.add_constant(x))
    robust = fit.fit(cov_type="cluster", cov_kwds={"groups": participants}).conf_int()[1]
    naive = fit.fit().conf_int()[1]
    width = robust[1] - robust[0]
    assert low == pytest.approx(robust[0], abs=0.15 * width)
    assert high == pytest.approx(robust[1], abs=0.15 * width)
    assert (high - low) > 1.2 * (naive[1] - naive[0])


def test_entry_keys_follow_only_the_settings_that_shape_the_entry():
    # The target demons' settings shape a participant's entry only when targets are made;
    # a registration setting, and a visit's rescan (registered to the mean), always do.
    from dataclasses import replace

    from predictor.within_subject import subject_key

    keys = ["a", "b"]
    off = replace(SETTINGS, jacobian_targets=False)
    on = replace(SETTINGS, jacobian_targets=True)
    for settings, changes in ((off, False), (on, True)):
        other = replace(settings, target_demons_iterations=(7,), demons_field_sd_voxels=2.5)
        assert (subject_key(keys, {}, other) != subject_key(keys, {}, settings)) is changes
    assert subject_key(keys, {}, replace(off, rigid_iterations=7)) != subject_key(keys, {}, off)
    assert subject_key(keys, {}, on) != subject_key(keys, {}, off)
    assert subject_key(keys, {"a": "r"}, off) != subject_key(keys, {}, off)  # a rescan


def test_alignment_through_a_space_and_its_fallbacks(tmp_path):
    # Two visits' map is the later's map from the mean after the inverse of the earlier's;
    # a rescan without a map (its registration to the mean failed) falls back to a
    # registration of its own (None); a visit missing from its entry is a damaged entry
    # (KeyError, which fails that pair); without a shared rigid space there is none.
    import json
    from dataclasses import replace

    from predictor.longitudinal import RESCAN, through_space
    from predictor.workspace import Layout

    layout = Layout(tmp_path)
    shift = np.eye(4)
    shift[:3, 3] = [1.0, -2.0, 0.5]
    turn = np.eye(4)
    turn[:2, :2] = [[0.0, -1.0], [1.0, 0.0]]
    entry = layout.subject("space")
    entry.folder.mkdir(parents=True)
    entry.result.write_text(json.dumps({"visits": {"a": {"mean_to_visit": shift.tolist()},
                                                   "b": {"mean_to_visit": turn.tolist()}}}))
    a, b = ({"key": k, "within_subject": "space"} for k in ("a", "b"))
    np.testing.assert_allclose(through_space(layout, a, b, SETTINGS), turn @ np.linalg.inv(shift))
    rescan = {"key": "r", "within_subject": "space", RESCAN: True}
    assert through_space(layout, a, rescan, SETTINGS) is None
    with pytest.raises(KeyError):
        through_space(layout, a, {"key": "c", "within_subject": "space"}, SETTINGS)
    assert through_space(layout, a, {"key": "b", "within_subject": float("nan")}, SETTINGS) is None
    affine = replace(SETTINGS, within_subject_parameters=12)
    assert through_space(layout, a, b, affine) is None


def test_changes_table_resumes_from_cached_pairs(tiny_workspace):
    # prepare wrote changes.tsv: one row per later visit; a lost pair (as after kill -9,
    # whose pair files are written atomically) is redone, the rest are cache hits, and
    # the table comes out identical.
    import pandas as pd
    from helpers import BOUNDARY_CHANGE_ONLY

    from predictor.longitudinal import measure_changes, pair_entry, visit_pairs
    from predictor.workspace import Layout, read_workspace

    layout = Layout(tiny_workspace)
    first = pd.read_csv(layout.changes, sep="\t")
    volumes = layout.read_volumes()
    pairs = visit_pairs(volumes)
    assert len(first) == len(pairs) == (volumes.groupby("participant_id").size() - 1).sum()
    _, lost = pair_entry(layout, *pairs[0], BOUNDARY_CHANGE_ONLY.longitudinal)
    lost.unlink()
    stamps = {path: path.stat().st_mtime_ns for path in layout.pair("x").parent.glob("*.json")}
    again, failures = measure_changes(
        tiny_workspace, read_workspace(tiny_workspace).regions, BOUNDARY_CHANGE_ONLY.longitudinal
    )
    assert not failures and lost.is_file()
    assert all(path.stat().st_mtime_ns == stamp for path, stamp in stamps.items())
    pd.testing.assert_frame_equal(pd.read_csv(layout.changes, sep="\t"), first)


@pytest.fixture(scope="module")
def realistic_workspace(tmp_path_factory):
    """Three template_anatomy participants (2 mm), each with a same-day rescan of its
    baseline, prepared against mni152, with changes of the boundary regions (demons
    off: the tests use only those)."""
    from predictor.cohort import read_cohort
    from predictor.phantoms.generate import generate_cohort
    from predictor.prepare import prepare_cohort

    root = tmp_path_factory.mktemp("realistic")
    scenario = root / "rescans.toml"
    scenario.write_text('extends = "template_anatomy"\n[cohort]\nrescan_fraction = 1.0\n')
    cohort = generate_cohort(root / "bids", 3, "demo", seed=0, scenario_path=scenario, jobs=2)
    settings = PrepareSettings.from_toml(longitudinal={"demons": False})
    prepare_cohort(read_cohort(cohort), root / "work", "mni152", settings, 2)
    return cohort, root / "work"


@pytest.mark.slow
def test_change_by_registration_beats_independent_segmentation(realistic_workspace):
    # Measured % change from baseline of each region against the phantom truth, both
    # paths in this one run, on realistic anatomy prepared against a template that did
    # not generate it: the registration's median absolute error is at least 2x smaller
    # than two independent segmentations' (the issue's goal), and it follows the true
    # change (Pearson r via numpy). Measured (13 pairs, aligned through the within-subject
    # space, differential bias correction): whole brain 0.11 vs 1.97 points (slope 0.90,
    # r 0.99), ventricles 2.72 vs 7.77 (slope 1.44, r 0.99; 1.37 and 1.23 without the
    # correction), hippocampi (mni152's box proxies) 1.20 vs 3.62 and 1.88 vs 6.15
    # (slopes 0.98 and 0.88, r 0.91-0.92 against 0.27-0.31 by segmentation).
    from predictor.demo import change_agreement

    cohort, work = realistic_workspace
    agreement = change_agreement(work, cohort).set_index(["region", "method"])
    for region in ("brain", "ventricles", "hippocampus_left", "hippocampus_right"):
        registration = agreement.loc[(region, "registration")]
        segmentation = agreement.loc[(region, "segmentation")]
        error = registration["median_abs_error_pts"]
        assert 2 * error <= segmentation["median_abs_error_pts"], region
        assert registration["pearson_r"] > 0.8, region


@pytest.mark.slow
def test_pairs_and_rescans_are_aligned_through_the_participants_space(realistic_workspace):
    # A participant's pair of visits, and a visit and its same-day rescan, are aligned
    # through its within-subject space: the map is the later scan's map from the mean after
    # the inverse of the earlier's, within 0.5 mm over the brain of a rigid registration of
    # the pair on its own (an independent estimate of the same pose), the cached change is
    # the one measured with it, and swapping the two scans gives exactly the inverse map,
    # so each region's change inverts (stronger than the 0.1%).
    import json

    from predictor.longitudinal import (
        pair_entry,
        rescan_pairs,
        rigid_alignment,
        shared_space,
        through_space,
    )
    from predictor.workspace import Layout

    _, work = realistic_workspace
    settings = PrepareSettings.from_toml(longitudinal={"demons": False}).longitudinal
    layout = Layout(work)
    volumes = layout.read_volumes().sort_values("age", kind="stable")
    rows = volumes[volumes["participant_id"] == volumes["participant_id"].iloc[0]]
    earlier, later = rows.iloc[0].to_dict(), rows.iloc[-1].to_dict()
    scan, rescan = next(pair for pair in rescan_pairs(layout) if pair[0]["key"] == earlier["key"])
    entry = layout.subject(earlier["within_subject"]).read_result()
    maps = entry["visits"] | entry["rescans"]
    assert shared_space(earlier, later, settings) == earlier["within_subject"]
    for one, other in ((earlier, later), (scan, rescan)):
        through = np.asarray(maps[other["key"]]["mean_to_visit"]) @ np.linalg.inv(
            maps[one["key"]]["mean_to_visit"]
        )
        alignment, path = pair_entry(layout, one, other, settings)
        np.testing.assert_array_equal(alignment, through)
        np.testing.assert_allclose(
            through_space(layout, other, one, settings) @ through, np.eye(4), atol=1e-9
        )
        visits = [Visit.read(layout.scan(row["key"]).folder, REGIONS) for row in (one, other)]
        index = np.argwhere(visits[0].mask)[::10]
        points = np.c_[index, np.ones(len(index))] @ visits[0].affine.T
        own = rigid_alignment(*visits, settings)
        assert np.linalg.norm((points @ (through - own).T)[:, :3], axis=1).mean() < 0.5
        forward = pair_change(*visits, REGIONS, settings, through)
        assert json.loads(path.read_text())["ratio"] == pytest.approx(forward["ratio"], rel=1e-12)
        backward = pair_change(*visits[::-1], REGIONS, settings, np.linalg.inv(through))
        assert len(forward["ratio"]) == 4  # the regions with a boundary
        for name, ratio in forward["ratio"].items():
            assert ratio * backward["ratio"][name] == pytest.approx(1.0, abs=1e-9), name


@pytest.mark.slow
def test_same_day_rescans_measure_the_noise_floor(realistic_workspace):
    # A baseline and its same-day rescan (new head pose, gain, bias field and noise; the
    # same anatomy): every change measured between them is noise. The goals
    # (scan-rescan brain change of established longitudinal pipelines is about 0.35%
    # median, from memory): brain at most 0.3%, hippocampi at most 1.5%, by registration
    # (the observed change); a rescan is never a visit of its own. Measured (3 rescans,
    # registered to the participant's mean, differential bias correction): brain 0.05%
    # (0.21% without the correction), hippocampi 0.12% and 0.18% (segmentation 1.3-1.8%).
    from predictor.cohort import read_cohort
    from predictor.longitudinal import noise_floor
    from predictor.report import rescan_section
    from predictor.workspace import Layout

    cohort, work = realistic_workspace
    layout = Layout(work)
    assert len(pd.read_csv(layout.volumes, sep="\t")) == len(read_cohort(cohort))
    floor = noise_floor(layout, REGIONS)
    indexed = floor.set_index("region")
    assert (indexed["pairs_segmentation"] == 3).all()
    assert (indexed["pairs_registration"] == 3).sum() == 4  # the regions with a boundary
    assert indexed.loc["brain", "median_abs_pct_registration"] <= 0.3, indexed
    for side in ("left", "right"):
        assert indexed.loc[f"hippocampus_{side}", "median_abs_pct_registration"] <= 1.5, indexed
    page = rescan_section(floor, "registration")
    value = indexed.loc["brain", "median_abs_pct_tbv_registration"]
    assert f">{value:.4g}</td>" in page and "noise_floor.tsv" in page


def _pose(acquisition: dict) -> np.ndarray:
    """4x4 map anatomy point -> scanner point (mm) of a phantom acquisition's drawn pose."""
    matrix = np.eye(4)
    matrix[:3, :3] = np.asarray(acquisition["pose_rotation"])
    matrix[:3, 3] = acquisition["pose_translation_mm"]
    return matrix


@pytest.mark.slow
def test_visits_in_one_space_follow_the_true_head_pose(realistic_workspace):
    # Each visit's map from the participant's mean, composed baseline -> later visit,
    # against the head poses the phantom generator drew (recorded in draws.json: scanner
    # point = R anatomy point + t, an outside reference): the mean point error over the
    # baseline brain is smaller than that of the two independent template registrations'
    # maps in most pairs, and the within-subject map never changes volume (rigid), where
    # independent registrations do (the jitter training pairs learned as change).
    # Measured on 21 pairs of another cohort (seed 1): within-subject better in 19,
    # median 0.35 against 0.38 mm; independent determinants 0.2-3.7% from 1.
    import json

    import nibabel as nib

    from predictor.phantoms.generate import TRUTH
    from predictor.workspace import Layout, read_workspace

    cohort, work = realistic_workspace
    layout, volumes = Layout(work), read_workspace(work).volumes
    draws = json.loads((cohort / TRUTH / "draws.json").read_text())["participants"]
    poses = {(d["participant_id"], v["session_id"]): _pose(v) for d in draws for v in d["visits"]}
    within, independent, scales = [], [], []
    for participant, visits in volumes.groupby("participant_id"):
        keys, sessions = visits["key"].tolist(), visits["session_id"].tolist()
        assert visits["within_subject"].nunique() == 1 and isinstance(
            visits["within_subject"].iloc[0], str
        )
        entry = layout.subject(visits["within_subject"].iloc[0]).read_result()["visits"]
        labels = nib.load(layout.scan(keys[0]).labels)
        index = np.argwhere(np.asarray(labels.dataobj) > 0)[::10]
        points = np.c_[index, np.ones(len(index))] @ labels.affine.T
        base = poses[(participant, sessions[0])]
        for key, session in zip(keys[1:], sessions[1:], strict=True):
            true = poses[(participant, session)] @ np.linalg.inv(base)
            maps = {
                "within": np.asarray(entry[key]["mean_to_visit"])
                @ np.linalg.inv(entry[keys[0]]["mean_to_visit"]),
                "independent": np.asarray(layout.scan(key).read_result()["template_to_native"])
                @ np.linalg.inv(layout.scan(keys[0]).read_result()["template_to_native"]),
            }
            for name, found in (("within", within), ("independent", independent)):
                error = points @ (maps[name] - true).T
                found.append(float(np.linalg.norm(error[:, :3], axis=1).mean()))
            scales.append(np.linalg.det(maps["within"][:3, :3]))
    within, independent = np.array(within), np.array(independent)
    assert np.median(within) < np.median(independent), (within, independent)
    assert (within < independent).mean() >= 2 / 3, (within, independent)
    np.testing.assert_allclose(scales, 1.0, atol=1e-9)


@pytest.mark.slow
def test_visit_order_gives_the_same_space(realistic_workspace):
    # No visit is privileged (the inverse consistency): a participant's two
    # visits handed over in either order get the same maps to the template, to within
    # 0.01 mm over the brain (measured: at most 0.002 mm on 5 rescan pairs).
    from predictor.within_subject import subject_space
    from predictor.workspace import Layout, read_workspace

    _, work = realistic_workspace
    layout, volumes = Layout(work), read_workspace(work).volumes
    keys = volumes[volumes["participant_id"] == volumes["participant_id"].iloc[0]]["key"]
    files = [layout.scan(key) for key in keys.iloc[[0, -1]]]
    visits = [Visit.read(f.folder, REGIONS) for f in files]
    maps = [np.asarray(f.read_result()["template_to_native"]) for f in files]
    forward = subject_space(visits, maps, SETTINGS)
    backward = subject_space(visits[::-1], maps[::-1], SETTINGS)
    assert forward["mean_change"][-1] < SETTINGS.within_subject_tolerance
    index = np.argwhere(visits[0].mask)[::10]
    points = np.c_[index, np.ones(len(index))] @ visits[0].affine.T
    for k in range(2):
        one = forward["mean_to_visit"][k] @ forward["template_to_mean"]
        other = backward["mean_to_visit"][1 - k] @ backward["template_to_mean"]
        template_points = points @ np.linalg.inv(one).T
        shift = template_points @ (one - other).T
        assert np.linalg.norm(shift[:, :3], axis=1).max() < 0.01


@pytest.mark.slow
def test_within_subject_entries_are_cached_and_redone_when_half_written(realistic_workspace):
    # A second run finds every participant's entry; an entry without its result.json
    # (a run killed while writing it) is redone with the same arrays, and the others are
    # not touched. Training reads the participant's entry, not the scan's own grid.
    import nibabel as nib
    import torch

    from predictor.pairs import ScanStore
    from predictor.within_subject import align_participants
    from predictor.workspace import Layout, read_workspace

    _, work = realistic_workspace
    layout, volumes = Layout(work), read_workspace(work).volumes
    spaces, failures = align_participants(work, volumes, REGIONS, SETTINGS)
    assert not failures
    assert spaces == dict(zip(volumes["key"], volumes["within_subject"], strict=True))
    entries = sorted(set(spaces.values()))
    killed, kept = layout.subject(entries[0]), layout.subject(entries[1])
    key = next(k for k, v in spaces.items() if v == entries[0])
    before = np.asarray(nib.load(killed.visit(key).t1).dataobj)
    stamp = kept.result.stat().st_mtime_ns
    killed.result.unlink()
    assert align_participants(work, volumes, REGIONS, SETTINGS)[0] == spaces
    np.testing.assert_array_equal(np.asarray(nib.load(killed.visit(key).t1).dataobj), before)
    assert kept.result.stat().st_mtime_ns == stamp and killed.result.is_file()
    store = ScanStore(work, spaces)
    assert torch.equal(store[key][0], torch.from_numpy(before.astype(np.float32)))
