"""Volume forecasters (predictor.regression)."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from predictor.errors import DataError
from predictor.phantoms.generate import true_volume_table
from predictor.phantoms.scenario import Scenario
from predictor.regression import (
    MixedEffectsForecaster,
    NoChangeForecaster,
    PopulationRateForecaster,
    RidgeForecaster,
    SVRForecaster,
    all_forecasters,
    baseline_rows,
    check_table,
    load_mixed_model,
    save_mixed_model,
    trim_mask,
)

TRUE_BETA = np.array([3.5, -0.01, 0.1, -0.2, -0.4, -0.05, -0.04, -0.1, -0.002])  # mL, see _design
TRUE_G = np.array([[0.09, 0.003], [0.003, 0.0009]])  # random intercept / slope covariance
TRUE_S2 = 0.0025  # residual variance, mL^2


def simulate_lmm(seed: int, participants: int = 60, visits: int = 4) -> pd.DataFrame:
    """Data drawn from a known linear mixed model with the forecaster's own design."""
    rng = np.random.default_rng(seed)
    rows = []
    for k in range(participants):
        diagnosis = ("CN", "MCI", "AD")[k % 3]
        sex = "M" if rng.random() < 0.5 else "F"
        age0 = rng.uniform(60, 90)
        b = rng.multivariate_normal(np.zeros(2), TRUE_G)
        for years in np.arange(visits) + np.r_[0, rng.uniform(-0.1, 0.1, visits - 1)]:
            mci, ad = float(diagnosis == "MCI"), float(diagnosis == "AD")
            x = np.array(
                [1, age0 - 75, sex == "M", mci, ad, years, years * mci, years * ad,
                 (age0 - 75) * years]
            )  # fmt: skip
            volume = x @ TRUE_BETA + b[0] + b[1] * years + rng.normal(0, np.sqrt(TRUE_S2))
            rows.append(
                {
                    "participant_id": f"p{k:03d}",
                    "age": age0 + years,
                    "sex": sex,
                    "diagnosis": diagnosis,
                    "hippocampus": volume,
                }
            )
    return pd.DataFrame(rows)


@pytest.mark.slow
def test_mixed_effects_confidence_intervals_cover_true_effects():
    # Coverage of the Wald 95% intervals of statsmodels MixedLM (REML) over 50 replicates.
    # Only the age reference differs from the simulation (sample mean vs 75), which shifts
    # the intercept; the intercept is therefore left out.
    covered = np.zeros(len(TRUE_BETA) - 1)
    for seed in range(50):
        model = MixedEffectsForecaster().fit(simulate_lmm(seed), ["hippocampus"])
        fit = model.fits_["hippocampus"]
        assert fit.converged
        half = 1.96 * np.sqrt(np.diag(fit.cov_beta))
        covered += (np.abs(fit.beta - TRUE_BETA) <= half)[1:]
    assert np.all(covered / 50 >= 0.90), covered / 50


def test_mixed_effects_matches_direct_statsmodels():
    table = simulate_lmm(7)
    model = MixedEffectsForecaster().fit(table, ["hippocampus"])
    checked = check_table(table, ["hippocampus"])
    exog = model._design(checked, checked["years"].to_numpy())
    direct = sm.MixedLM(
        checked["hippocampus"],
        exog,
        groups=checked["participant_id"],
        exog_re=np.column_stack([np.ones(len(checked)), checked["years"]]),
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = direct.fit(reml=True, method=["powell"])
    fit = model.fits_["hippocampus"]
    np.testing.assert_allclose(fit.beta, result.fe_params, rtol=1e-8)
    np.testing.assert_allclose(exog @ fit.beta, result.predict(exog), rtol=1e-10)
    # Our BLUP b = G Z' (Z G Z' + s2 I)^-1 (y - X beta) reproduces statsmodels' random_effects.
    ours = model.random_effects(table, "hippocampus")
    for participant, effects in result.random_effects.items():
        np.testing.assert_allclose(
            ours.loc[participant].to_numpy(), np.asarray(effects), rtol=1e-6, atol=1e-9
        )


def test_new_participant_forecast_conditions_on_its_baseline():
    table = simulate_lmm(3)
    model = MixedEffectsForecaster().fit(table, ["hippocampus"])
    base = baseline_rows(check_table(table, ["hippocampus"])).head(1)
    small = model.predict(base.assign(hippocampus=base.hippocampus - 0.5), [2.0])
    large = model.predict(base.assign(hippocampus=base.hippocampus + 0.5), [2.0])
    shift = float(large.mean_ml.iloc[0] - small.mean_ml.iloc[0])
    fit = model.fits_["hippocampus"]
    g = fit.cov_re
    expected = (g[0, 0] + 2.0 * g[1, 0]) / (g[0, 0] + fit.residual_var)  # conditional Gaussian
    assert shift == pytest.approx(expected, rel=1e-9)
    assert 0.5 < shift < 1.1


def test_saved_prior_roundtrip_and_bad_file(tmp_path):
    table = simulate_lmm(4)
    model = MixedEffectsForecaster().fit(table, ["hippocampus"])
    path = save_mixed_model(tmp_path / "prior.json", model)
    restored = load_mixed_model(path)
    base = baseline_rows(check_table(table, ["hippocampus"]))
    pd.testing.assert_frame_equal(model.predict(base, [1, 3]), restored.predict(base, [1, 3]))
    path.write_text('{"regions": []}')
    with pytest.raises(DataError, match="not a saved mixed-effects model"):
        load_mixed_model(path)


def test_small_cohort_falls_back_to_a_smaller_design_with_a_warning(tmp_path):
    # 9 participants cannot carry the age-by-time design's 9 fixed effects + 3 variance
    # parameters (statsmodels would not identify them); with fallback the diagnosis-by-
    # time design (8) does not fit either, so the rate design (1, years) is fitted, and it
    # matches statsmodels MixedLM on the same two columns.
    table = simulate_lmm(5, participants=9)
    with pytest.raises(DataError, match="9 participants are too few.*age-by-time"):
        MixedEffectsForecaster().fit(table, ["hippocampus"])
    with pytest.warns(RuntimeWarning, match="the rate design was fitted instead"):
        model = MixedEffectsForecaster(fallback=True).fit(table, ["hippocampus"])
    assert model.design_ == "rate"
    checked = check_table(table, ["hippocampus"])
    years = checked["years"].to_numpy()
    direct = sm.MixedLM(
        checked["hippocampus"], np.column_stack([np.ones(len(years)), years]),
        groups=checked["participant_id"], exog_re=np.column_stack([np.ones(len(years)), years]),
    )  # fmt: skip
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = direct.fit(reml=True, method=["powell"])
    np.testing.assert_allclose(model.fits_["hippocampus"].beta, result.fe_params, rtol=1e-8)
    restored = load_mixed_model(save_mixed_model(tmp_path / "prior.json", model))
    assert restored.design_ == "rate"
    # a file saved before the design was recorded reads as the diagnosis-by-time design
    older = MixedEffectsForecaster(design="diagnosis-by-time").fit(
        simulate_lmm(6), ["hippocampus"]
    )
    raw = older.to_dict()
    del raw["design"]
    legacy = MixedEffectsForecaster.from_dict(raw)
    base = baseline_rows(check_table(simulate_lmm(6), ["hippocampus"]))
    pd.testing.assert_frame_equal(older.predict(base, [2]), legacy.predict(base, [2]))


def test_forecasts_at_each_rows_own_horizon_equal_the_grid_forecasts():
    # predict_each (visit pairs: a horizon per row, participants repeated) gives, row by
    # row, what predict gives for that baseline at that horizon.
    model = MixedEffectsForecaster(design="diagnosis-by-time").fit(simulate_lmm(8), ["hippocampus"])
    base = baseline_rows(check_table(simulate_lmm(8), ["hippocampus"])).reset_index(drop=True)
    rows = pd.concat([base.assign(years=1.5), base.iloc[:3].assign(years=4.0)], ignore_index=True)
    each = model.predict_each(rows, noise_free=True)
    for k, row in rows.iterrows():
        grid = model.predict(rows.iloc[[k]], [row["years"]], noise_free=True)
        np.testing.assert_allclose(
            each.iloc[k][["mean_ml", "sd_ml"]].to_numpy(float),
            grid[["mean_ml", "sd_ml"]].to_numpy(float)[0],
            rtol=1e-12,
        )
    assert model.predict_each(rows.iloc[:0]).empty


@pytest.fixture(scope="module")
def linear_scenario(tmp_path_factory) -> Scenario:
    """memory_clinic with linear trajectories (no acceleration): the model class of the
    linear forecasters, so that their rate estimates can be checked."""
    path = tmp_path_factory.mktemp("scenario") / "linear.toml"
    path.write_text(
        'extends = "memory_clinic"\n[progression]\nacceleration_per_stage = 0.0\n'
        "acceleration = { CN = 0.0, MCI = 0.0, AD = 0.0 }\n"
    )
    return Scenario.from_toml(path)


@pytest.fixture(scope="module")
def phantom_truth(linear_scenario):
    # True volumes of a phantom cohort drawn like the demo's (no images needed), with
    # 1% measurement noise so that the residual variance is not zero.
    truth, _ = true_volume_table(linear_scenario, 240, seed=21)
    rng = np.random.default_rng(0)
    regions = ["hippocampus_left", "ventricles", "cortical_gm", "wm"]
    for region in regions:
        truth[region] = truth[region] * (1 + 0.01 * rng.normal(size=len(truth)))
    return truth, regions


def test_mixed_effects_recovers_configured_rates(phantom_truth, linear_scenario):
    truth, _ = phantom_truth
    scenario = linear_scenario
    model = MixedEffectsForecaster().fit(truth, ["hippocampus_left", "cortical_gm", "wm"])
    base = baseline_rows(check_table(truth, ["hippocampus_left"]))
    for region, rate_region in [
        ("hippocampus_left", "hippocampus"),
        ("cortical_gm", "cortical_gm"),
        ("wm", "wm"),
    ]:
        beta = model.fits_[region].beta
        for index, group in enumerate(model.labels_):
            slope = beta[5] + (beta[5 + index] if index else 0.0)  # mL per year
            rate = slope / base.loc[base.diagnosis == group, region].mean()
            # within 15%: each region's rate factor also shows in its baseline size, so
            # mL per year over the mean baseline volume is not exactly the mean rate
            assert rate == pytest.approx(scenario.rates[rate_region][group], rel=0.15), (
                region,
                group,
            )


def test_interval_for_the_true_volume_leaves_out_only_the_residual_noise(phantom_truth):
    # A forecast (a mean) is held against the prior's interval for the participant's true
    # volume: the two predictive variances differ by exactly the residual variance that
    # statsmodels' MixedLM estimated (MixedLMResults.scale), at every horizon.
    truth, _ = phantom_truth
    model = MixedEffectsForecaster().fit(truth, ["hippocampus_left"])
    base = baseline_rows(check_table(truth, ["hippocampus_left"])).head(20)
    observed = model.predict(base, [1.0, 3.0])
    true = model.predict(base, [1.0, 3.0], noise_free=True)
    residual = model.fits_["hippocampus_left"].residual_var
    np.testing.assert_allclose(observed.sd_ml**2 - true.sd_ml**2, residual, rtol=1e-9)
    np.testing.assert_array_equal(true.mean_ml, observed.mean_ml)
    assert (true.sd_ml < observed.sd_ml).all()


def test_conformal_intervals_cover_held_out_followups(phantom_truth):
    truth, regions = phantom_truth
    ids = truth.participant_id.unique()
    train = truth[truth.participant_id.isin(ids[:160])]
    test = check_table(truth[truth.participant_id.isin(ids[160:])], regions)
    base = baseline_rows(test)
    followups = test[test.years > 0]
    for forecaster in (
        SVRForecaster(),
        RidgeForecaster(),
        PopulationRateForecaster(),
        NoChangeForecaster(),
    ):
        forecaster.fit(train, regions)
        hits = []
        for participant, visits in followups.groupby("participant_id"):
            prediction = forecaster.predict(
                base[base.participant_id == participant], visits.years.tolist()
            )
            for region in regions:
                rows = prediction[prediction.region == region]
                observed = visits[region].to_numpy()
                hits += list(
                    (observed >= rows.lower_ml.to_numpy()) & (observed <= rows.upper_ml.to_numpy())
                )
        assert 0.85 <= np.mean(hits) <= 0.95, (forecaster.name, np.mean(hits))


def test_every_forecaster_returns_the_common_table(phantom_truth):
    truth, regions = phantom_truth
    base = baseline_rows(check_table(truth, regions)).head(5)
    for name, forecaster in all_forecasters().items():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            forecaster.fit(truth, regions)
        prediction = forecaster.predict(base, [0, 1, 2.5])
        expected = "participant_id region years mean_ml sd_ml lower_ml upper_ml".split()
        assert list(prediction.columns) == expected, name
        assert len(prediction) == 5 * 3 * len(regions)
        assert prediction[["mean_ml", "sd_ml"]].notna().all().all(), name
        assert (prediction.lower_ml <= prediction.mean_ml).all()
        zero = prediction[(prediction.years == 0) & (prediction.region == "ventricles")]
        if not name.startswith("mixed"):  # mixed effects smooths the baseline (BLUP)
            np.testing.assert_allclose(zero.mean_ml, base.ventricles)


def test_trim_removes_exactly_20_percent_never_a_whole_group():
    groups = np.array(["CN"] * 50 + ["AD"] * 10)
    residuals = np.r_[np.zeros(50), np.full(10, 100.0)]  # AD has all the largest residuals
    keep = trim_mask(residuals, groups, 0.2)
    assert (~keep).sum() == 12
    assert keep[groups == "AD"].sum() >= 5


def test_trimmed_refit_drops_20_percent_of_visits(phantom_truth):
    truth, _ = phantom_truth
    checked = check_table(truth, ["wm"])
    model = MixedEffectsForecaster(trim=0.2).fit(truth, ["wm"])
    assert model.fits_["wm"].converged
    untrimmed = MixedEffectsForecaster().fit(truth, ["wm"])
    assert not np.allclose(model.fits_["wm"].beta, untrimmed.fits_["wm"].beta)
    assert untrimmed.fits_["wm"].visits_used == len(checked)
    assert model.fits_["wm"].visits_used == len(checked) - round(0.2 * len(checked))


def test_bad_requests_are_clear_errors(phantom_truth):
    truth, regions = phantom_truth
    with pytest.raises(DataError, match="lacks column.*'putamen'"):
        RidgeForecaster().fit(truth, ["putamen"])
    model = RidgeForecaster().fit(truth, regions)
    base = baseline_rows(check_table(truth, regions)).head(2)
    with pytest.raises(DataError, match="horizons must be finite and >= 0"):
        model.predict(base, [-1])
    with pytest.raises(DataError, match="diagnosis 'FTD' was never seen"):
        model.predict(base.assign(diagnosis="FTD"), [1])
    few = truth[truth.participant_id.isin(truth.participant_id.unique()[:8])]
    with pytest.raises(DataError, match="too few"):
        MixedEffectsForecaster().fit(few, ["wm"])
    gap = truth.copy()
    gap.loc[3, "wm"] = np.nan
    with pytest.raises(DataError, match="region 'wm' has a missing"):
        RidgeForecaster().fit(gap, ["wm"])


def test_single_visit_participant_is_a_baseline_only(phantom_truth):
    truth, regions = phantom_truth
    single = truth.groupby("participant_id").head(1).iloc[:1].assign(participant_id="solo")
    model = NoChangeForecaster().fit(pd.concat([truth, single]), regions)
    prediction = model.predict(single, [2])
    assert len(prediction) == len(regions)


def test_a_degenerate_powell_fit_is_refitted_with_bfgs():
    # Measured phantom volumes (tests/data: one cross-validation fold of a 4 mm demo
    # cohort) on which statsmodels' Powell reports convergence at a point whose
    # fixed-effects covariance is not positive definite, with a spurious slope that made
    # a training prior's SD zero. fit_mixed must refit with BFGS; statsmodels' own BFGS
    # fit of the same design is the reference.
    from pathlib import Path

    from predictor.regression import check_table

    path = Path(__file__).parent / "data" / "mixed_model_degenerate_powell.tsv"
    table = pd.read_csv(path, sep="\t")
    model = MixedEffectsForecaster(design="diagnosis-by-time").fit(table, ["hippocampus_right"])
    fit = model.fits_["hippocampus_right"]
    assert fit.converged and np.linalg.eigvalsh(fit.cov_beta).min() > 0
    checked = check_table(table, ["hippocampus_right"])
    years = checked["years"].to_numpy(float)
    reference = sm.MixedLM(
        checked["hippocampus_right"].to_numpy(float),
        model._design(checked, years),
        groups=checked["participant_id"].to_numpy(),
        exog_re=np.column_stack([np.ones(len(years)), years]),
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        powell = reference.fit(reml=True, method=["powell"])
        bfgs = reference.fit(reml=True, method=["bfgs"])
    k = len(fit.beta)
    assert np.linalg.eigvalsh(np.asarray(powell.cov_params())[:k, :k]).min() < 0  # the case
    np.testing.assert_allclose(fit.beta, bfgs.fe_params, rtol=1e-6, atol=1e-8)
    prediction = model.predict(checked.groupby("participant_id").head(1), [2.0])
    assert (prediction["sd_ml"] > 0).all()
