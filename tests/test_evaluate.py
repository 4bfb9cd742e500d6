"""Cross-validated evaluation (predictor.evaluate, predictor.evaluation_report)."""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from predictor.compare import JACOBIAN, POPULATION, CompareSettings, paired_tests
from predictor.config import CONFIG_DIR
from predictor.ensemble import band_of, quantile
from predictor.errors import DataError
from predictor.evaluate import (
    TuneSettings,
    annual_change,
    assign_folds,
    collect,
    coverage_table,
    evaluate,
    fit_quality,
    fold_split,
    read_folds,
    validation_score,
)
from predictor.evaluation_report import write_evaluation
from predictor.regression import LEVEL
from predictor.training import TrainConfig

SETTINGS = CompareSettings("hippocampus_left", 0.95, 500, "registration", (1.5, 2.5, 3.5))


def _volumes(counts: dict[str, int], visits: int = 3) -> pd.DataFrame:
    rows = []
    for label, count in counts.items():
        for k in range(count):
            for visit in range(visits):
                rows.append({"participant_id": f"{label}{k:02d}", "diagnosis": label,
                             "age": 70.0 + k + visit})  # fmt: skip
    return pd.DataFrame(rows)


def test_folds_are_stratified_seeded_and_cover_everyone():
    volumes = _volumes({"AD": 7, "CN": 11, "MCI": 9})
    folds = assign_folds(volumes, 5, seed=3)
    assert sorted(folds) == sorted(set(volumes["participant_id"]))  # everyone exactly once
    sizes = np.bincount(list(folds.values()))[1:]
    assert sizes.max() - sizes.min() <= 1
    for label, count in {"AD": 7, "CN": 11, "MCI": 9}.items():
        per_fold = np.bincount([k for p, k in folds.items() if p.startswith(label)], minlength=6)
        assert per_fold[1:].max() - per_fold[1:].min() <= 1, (label, per_fold)
        assert per_fold.sum() == count
    assert folds == assign_folds(volumes, 5, seed=3)
    assert folds != assign_folds(volumes, 5, seed=4)
    with pytest.raises(DataError, match="9 participants are too few for 5 folds"):
        assign_folds(_volumes({"CN": 9}), 5, seed=0)


def test_fold_split_holds_the_fold_out_and_draws_validation_from_the_rest():
    volumes = _volumes({"AD": 6, "CN": 8, "MCI": 6})
    folds = assign_folds(volumes, 4, seed=0)
    for fold in range(1, 5):
        split = fold_split(volumes, folds, fold, share=0.2, seed=0)
        assert split["test"] == sorted(p for p, k in folds.items() if k == fold)
        assert not set(split["test"]) & (set(split["train"]) | set(split["validation"]))
        assert not set(split["train"]) & set(split["validation"])
        assert len(split["validation"]) == round(0.2 * 15)
        assert len(split["train"]) + len(split["validation"]) + len(split["test"]) == 20


def test_fit_quality_matches_scikit_learn_and_scipy(rng):
    from sklearn.metrics import r2_score

    predicted = rng.normal(size=30)
    observed = 0.6 * predicted + rng.normal(scale=0.5, size=30)
    slope, r2 = fit_quality(predicted, observed)
    assert r2 == pytest.approx(r2_score(observed, predicted), rel=1e-12)
    assert slope == pytest.approx(stats.linregress(predicted, observed).slope, rel=1e-12)
    assert np.isnan(fit_quality(np.zeros(30), observed)[0])  # no change: no slope


def test_holm_within_each_comparator_matches_the_step_down_by_hand():
    # Holm (1979): sort the m p-values, multiply the i-th smallest by (m - i + 1), take the
    # running maximum, cap at 1; compared with paired_tests on 4 target regions (the first
    # primary, uncorrected) and a check region (never tested).
    rng = np.random.default_rng(11)
    regions = ["hippocampus_left", "hippocampus_right", "ventricles", "wm", "icv"]
    rows = []
    for participant in range(9):
        for k, region in enumerate(regions):
            for method, shift in (("network-jacobian", -0.05 * k), ("ridge", 0.0)):
                error = 0.5 + shift + rng.normal(scale=0.05)
                rows.append({"participant_id": f"p{participant}", "region": region,
                             "method": method, "abs_error_pct_tbv": error})  # fmt: skip
    tests = paired_tests(pd.DataFrame(rows), regions, ["icv"], SETTINGS, seed=0)
    tests = tests[tests["network"] == JACOBIAN].set_index("region")
    raw = tests.loc[regions[1:4], "sign_test_p"].to_numpy()
    order = np.argsort(raw)
    stepped = np.minimum(1, np.maximum.accumulate(raw[order] * (len(raw) - np.arange(len(raw)))))
    expected = np.empty_like(raw)
    expected[order] = stepped
    np.testing.assert_allclose(tests.loc[regions[1:4], "holm_p"].to_numpy(), expected)
    assert tests.loc["hippocampus_left", "holm_p"] == tests.loc["hippocampus_left", "sign_test_p"]
    assert tests.loc["icv", "verdict"] == "check"


def test_annual_change_is_the_least_squares_slope_through_the_origin():
    # one participant, pairs at 1 and 2 years with 2% and 6% change: sum(c t) / sum(t^2)
    # = (2 + 12) / 5 = 2.8 % per year (the mean of the per-pair rates would be 2.5)
    errors = pd.DataFrame({
        "region": "wm", "method": "ridge", "participant_id": "a", "years": [1.0, 2.0],
        "baseline_ml": 100.0, "forecast_ml": [101.0, 104.0], "observed_ml": [102.0, 106.0],
    })  # fmt: skip
    change = annual_change(errors).iloc[0]
    assert change["observed"] == pytest.approx(2.8)
    assert change["predicted"] == pytest.approx((1 + 8) / 5)


def test_coverage_counts_pairs_inside_their_interval():
    pairs = pd.DataFrame({
        "participant_id": ["a", "a", "b", "c"], "diagnosis": ["CN", "CN", "AD", "AD"],
        "years": [1.0, 2.1, 1.2, 0.9], "wm_follow": [10.0, 9.0, 8.0, 7.0],
    })  # fmt: skip
    bounds = {"ridge": np.array([[[9.5, 10.5]], [[9.5, 10.5]], [[7.0, 8.0]], [[np.nan, 8]]])}
    table = coverage_table(pairs, bounds, ["wm"], (1.5, 2.5, 3.5)).set_index(["grouping", "group"])
    assert table.loc[("all", "all"), "pairs"] == 3  # the NaN interval is not counted
    assert table.loc[("all", "all"), "coverage"] == pytest.approx(2 / 3)
    assert table.loc[("diagnosis", "AD"), "coverage"] == 1.0
    assert table.loc[("horizon", "2 y"), "coverage"] == 0.0
    # the network's calibration bands: 1.0, 1.2 (0.9 has no interval) below 1.5 years
    assert table.loc[("band", "<1.5 y"), ["pairs", "coverage"]].tolist() == [2, 1.0]
    assert table.loc[("band", "1.5-2.5 y"), "coverage"] == 0.0


# --- a real cross-validation of the tiny workspace -------------------------------------------
@pytest.fixture(scope="module")
def one_epoch_config(tmp_path_factory):
    """The tiny config, one epoch of 16 pairs (a TOML that --config also reads): these tests
    check the cross-validation's bookkeeping, not what the network learns (all pairs took
    12.3 s a training, 16 pairs 2.3 s; the evaluation trains 8 networks)."""
    path = tmp_path_factory.mktemp("evalconfig") / "train.toml"
    text = (CONFIG_DIR / "train-tiny.toml").read_text().replace("epochs = 8", "epochs = 1")
    assert "max_pairs_per_epoch = 0" in text
    text = text.replace("max_pairs_per_epoch = 0", "max_pairs_per_epoch = 16")
    path.write_text(text)
    return path


@pytest.fixture(scope="module")
def evaluated(tiny_workspace, one_epoch_config, tmp_path_factory):
    """2-fold cross-validation of the 20 tiny participants, each fold's network an ensemble
    of 2 members, report written."""
    out = tmp_path_factory.mktemp("evaluation") / "cv"
    config = TrainConfig.from_toml(one_epoch_config)
    evaluation = evaluate(tiny_workspace, out, 2, config, jobs=2, settings=SETTINGS,
                          measure=False, members=2)  # fmt: skip
    write_evaluation(evaluation, out)
    return out, evaluation


def test_every_participant_is_forecast_once_by_models_that_never_saw_it(evaluated):
    out, evaluation = evaluated
    folds = read_folds(out)["assignment"]
    seen = {}
    for fold in (1, 2):
        members = {p for p, k in folds.items() if k == fold}
        for name in ("network/member-1", "network/member-2", "population/member-1",
                     "population/member-2"):  # fmt: skip
            split = json.loads((out / f"fold-{fold}" / name / "model.json").read_text())["split"]
            assert sorted(split["test"]) == sorted(members)
            assert not members & (set(split["train"]) | set(split["validation"]))
        forecasts = pd.read_csv(out / f"fold-{fold}" / "forecasts.tsv", sep="\t")
        for participant in set(forecasts["participant_id"]):
            assert participant in members and participant not in seen
            seen[participant] = fold
    assert set(seen) == set(evaluation.errors["participant_id"])
    assert evaluation.data["forecast_participants"] == len(seen) == 20


def test_no_change_error_is_the_observed_change(evaluated):
    errors = evaluated[1].errors
    still = errors[errors["method"] == "no-change"]
    np.testing.assert_array_equal(still["forecast_ml"], still["baseline_ml"])
    np.testing.assert_allclose(still["error_ml"], still["baseline_ml"] - still["observed_ml"])


def test_comparators_and_checks_are_all_there(evaluated):
    out, evaluation = evaluated
    methods = set(evaluation.errors["method"])
    assert {JACOBIAN, POPULATION, "no-change", "svr", "ridge"} <= methods
    # 9-10 training participants a fold cannot carry a mixed model: left out, with why
    assert "mixed-effects" in evaluation.data["not_fitted"]
    assert "mixed-effects" not in methods
    headlines = evaluation.headlines.set_index("region")
    assert headlines.loc["icv", "verdict"] == "check, not a region to win"
    assert headlines.loc["hippocampus_left", "role"] == "primary"
    page = (out / "evaluation.html").read_text()
    assert page.index("forest plot") < page.index("regions by methods")
    assert "research use only" in page.lower() and "primary endpoint" in page
    glance = pd.read_csv(out / "at_a_glance.tsv", sep="\t")
    assert list(glance["region"]) == [*evaluation.regions, "participants forecast"]
    assert glance.iloc[-1][JACOBIAN] == 20
    skill = evaluation.skill.set_index(["region", "method"])
    assert np.isfinite(skill.loc[("ventricles", JACOBIAN), "r2_gain_over_population"])


def test_a_leaked_or_unfinished_fold_is_a_clear_error(
    evaluated, tiny_workspace, one_epoch_config, tmp_path
):
    out = evaluated[0]
    copy = shutil.copytree(out, tmp_path / "cv")
    folds = read_folds(copy)["assignment"]
    held_out = sorted(p for p, k in folds.items() if k == 1)[0]
    model_json = copy / "fold-1" / "network" / "member-2" / "model.json"
    info = json.loads(model_json.read_text())
    info["split"]["train"].append(held_out)
    model_json.write_text(json.dumps(info))
    with pytest.raises(DataError, match=f"leaked fold: .* participant\\(s\\) {held_out}"):
        collect(tiny_workspace, copy, SETTINGS, seed=0)
    (copy / "fold-2" / "forecasts.tsv").unlink()
    shutil.copy(out / "fold-1" / "network" / "member-2" / "model.json", model_json)
    with pytest.raises(DataError, match="fold 2 is not finished"):
        collect(tiny_workspace, copy, SETTINGS, seed=0)
    with pytest.raises(DataError, match="holds 2 folds with seed 0"):
        evaluate(tiny_workspace, copy, folds=3, settings=SETTINGS)
    # a fold made with other settings is never mixed in: the default config differs
    with pytest.raises(DataError, match="fold-1: was run with other settings"):
        evaluate(tiny_workspace, copy, folds=2, settings=SETTINGS, measure=False)
    with pytest.raises(DataError, match="fold-1: was run with other settings"):
        evaluate(tiny_workspace, copy, 2, TrainConfig.from_toml(one_epoch_config),
                 settings=SETTINGS, measure=False)  # one member now, two before: refused
    with pytest.raises(DataError, match="--tune needs monitor"):
        monitored = TrainConfig.from_toml()
        monitored = replace(monitored, training=replace(monitored.training, monitor="val_total"))
        evaluate(tiny_workspace, copy, 2, monitored, tune=TuneSettings("prior_weight", (0, 1)))


@pytest.mark.slow
def test_kill_during_a_fold_then_rerun_gives_identical_tables(
    evaluated, tiny_workspace, one_epoch_config, tmp_path
):
    out, evaluation = evaluated
    copy = shutil.copytree(out, tmp_path / "cv")
    (copy / "fold-2" / "forecasts.tsv").unlink()
    shutil.rmtree(copy / "fold-2" / "population")
    command = [str(Path(sys.executable).parent / "predictor"), "evaluate",
               str(tiny_workspace), str(copy), "--folds", "2", "--fold", "2", "--members", "2",
               "--config", str(one_epoch_config), "--no-scan-volumes"]  # fmt: skip
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    checkpoint = copy / "fold-2" / "population" / "member-1" / "checkpoint.pt"
    deadline = time.monotonic() + 300
    while not checkpoint.exists() and process.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    os.kill(process.pid, signal.SIGKILL)
    assert process.wait() == -signal.SIGKILL  # killed while forecasting fold 2
    assert not (copy / "fold-2" / "forecasts.tsv").exists()
    config = TrainConfig.from_toml(one_epoch_config)
    again = evaluate(tiny_workspace, copy, 2, config, settings=SETTINGS, measure=False, members=2)
    for name in ("errors", "tests", "skill", "coverage", "conformal"):
        pd.testing.assert_frame_equal(
            getattr(again, name).reset_index(drop=True),
            getattr(evaluation, name).reset_index(drop=True),
            check_exact=False, rtol=1e-6,
        )  # fmt: skip


@pytest.mark.slow
def test_tuning_chooses_on_inner_validation_only(tiny_workspace, one_epoch_config, tmp_path):
    tune = TuneSettings("prior_weight", (0.01, 1.0))
    config = TrainConfig.from_toml(one_epoch_config)
    assert evaluate(tiny_workspace, tmp_path, 2, config, fold=1, settings=SETTINGS,
                    measure=False, tune=tune) is None  # fmt: skip
    fold = tmp_path / "fold-1"
    members = {p for p, k in read_folds(tmp_path)["assignment"].items() if k == 1}
    chosen = json.loads((fold / "tuning.json").read_text())
    for name in ("network", "population"):
        candidates = [f"{name}-prior_weight-0.01", f"{name}-prior_weight-1"]
        scores = {c: validation_score(fold / c, "val_volume_error") for c in candidates}
        assert chosen[name]["validation"] == pytest.approx(scores)
        assert chosen[name]["folder"] == min(scores, key=scores.get)
        for candidate in candidates:
            info = json.loads((fold / candidate / "model.json").read_text())
            assert info["config"]["loss"]["prior_weight"] in (0.01, 1.0)
            assert not members & (set(info["split"]["train"]) | set(info["split"]["validation"]))
    assert (fold / "forecasts.tsv").is_file()
    with pytest.raises(ValueError, match="tune_parameter must be one of"):
        TuneSettings("epochs", (1.0, 2.0))


def test_network_intervals_are_calibrated_on_the_other_fold_only(evaluated):
    # normalised split-conformal (Lei et al. 2018): fold k's quantile comes from the other
    # fold's held-out scores, one pair per participant; the scores are those of the
    # network's own forecasts against the observed follow-ups of errors.tsv
    out, evaluation = evaluated
    conformal = evaluation.conformal
    assert set(conformal["fold"]) == {1, 2} and (out / "conformal.tsv").is_file()
    errors = evaluation.errors[evaluation.errors["method"] == JACOBIAN]
    both = conformal.merge(errors, on=["participant_id", "years", "region"], validate="1:1")
    np.testing.assert_allclose(both["observed_ml_x"], both["observed_ml_y"])
    np.testing.assert_allclose(both["forecast_ml_x"], both["forecast_ml_y"])
    np.testing.assert_allclose(
        conformal["score"], (conformal["observed_ml"] - conformal["forecast_ml"]).abs()
        / conformal["scale_ml"],
    )  # fmt: skip
    edges = evaluation.data["bands_years"]  # a quantile per horizon band (Mondrian)
    assert edges == list(CompareSettings.from_toml().interval_bands_years)
    bands = band_of(conformal["years"], edges)
    for (fold, region, band), rows in conformal.groupby(["fold", "region", bands]):
        others = conformal[
            (conformal["fold"] != fold) & (conformal["region"] == region) & (bands == band)
        ]
        expected, participants = quantile(others, LEVEL, 0, fold, band)
        assert participants == others["participant_id"].nunique()
        np.testing.assert_array_equal(rows["quantile"], expected)
    shown = evaluation.coverage[evaluation.coverage["method"] == JACOBIAN]
    assert {"all", "horizon", "band", "diagnosis"} <= set(shown["grouping"])
    assert evaluation.data["members"] == 2
    assert "2 member(s) per fold): conformal" in (out / "evaluation.html").read_text()


def test_phantom_errors_against_the_true_change(evaluated):
    # On a phantom cohort the forecasts are also scored against the measured baseline times
    # the generator's true change; there the floor (its best forecast from baseline) must
    # beat no change in every region that changes, whatever the measurement misses.
    out, evaluation = evaluated
    truth = evaluation.truth_summary.set_index(["region", "method"])["mean_pct_tbv"]
    for region in ("hippocampus_left", "hippocampus_right", "ventricles", "total_gm"):
        assert truth[(region, "floor (best possible)")] < truth[(region, "no-change")]
    assert set(evaluation.truth_tests["comparator"]) == set(evaluation.tests["comparator"])
    page = (out / "evaluation.html").read_text()
    assert "Against the phantom's true change" in page
    assert (out / "against_truth.tsv").is_file()


def test_the_page_says_how_the_run_was_made(evaluated):
    # measure=False: the page says the forecast scans were not measured, and never that
    # they were measured like the observed change; it states the grid and the epochs
    out, evaluation = evaluated
    page = (out / "evaluation.html").read_text()
    assert "forecast scans were not measured" in page
    assert "measured the same way" not in page
    assert "4 x 4 x 4 mm working grid for at most 1 epochs" in page
    assert evaluation.data["run"]["scan_volumes"] is False
