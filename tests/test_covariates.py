"""Declared covariates (predictor.covariates): reading, encoding, the regressions and the
network using them, and one-line errors for bad covariate input."""

from __future__ import annotations

import json
import math
import tomllib
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from predictor.cli import app
from predictor.cohort import read_cohort
from predictor.config import CohortSettings
from predictor.covariates import Covariate, Encoder, assignments
from predictor.errors import CohortError, ConfigError, DataError
from predictor.phantoms.generate import COVARIATES_FILE, COVARIATES_TOML

runner = CliRunner()
SCORE = Covariate("cognition", "numeric", "points", (0.0, 30.0), (), True)
CARRIER = Covariate("risk_carrier", "categorical", levels=("no", "yes"))


def coding_with_covariates() -> CohortSettings:
    raw = CohortSettings.from_toml().to_dict() | tomllib.loads(COVARIATES_TOML)
    return CohortSettings.from_dict(raw, "test")


@pytest.mark.parametrize(
    ("covariate", "value", "message"),
    [
        (SCORE, "abc", "value 'abc' is not a number (points)"),
        (SCORE, "31", "value 31 is outside the plausible 0-30 points"),
        (CARRIER, "maybe", "value 'maybe' is not one of no, yes"),
        (CARRIER, "n/a", "covariate 'risk_carrier' is missing and may not be"),
    ],
)
def test_bad_values_are_one_line_errors_naming_the_row(covariate, value, message):
    with pytest.raises(CohortError) as error:
        covariate.parse(value, "cohort.tsv line 7")
    assert str(error.value).startswith("cohort.tsv line 7: ") and message in str(error.value)
    assert "\n" not in str(error.value)


def test_encoding_matches_scikit_learn_imputer_and_pandas_dummies():
    """Missing indicator + training-mean (numeric) or most frequent level (categorical):
    scikit-learn's SimpleImputer(add_indicator=True); standardisation with pandas' SD
    (ddof 1); indicators of the levels after the first: pandas get_dummies(drop_first)."""
    from sklearn.impute import SimpleImputer

    score = Covariate("cognition", "numeric", "points", (0.0, 30.0), (), True)
    level = Covariate("amyloid", "categorical", levels=("negative", "positive"), missing=True)
    train = pd.DataFrame(
        {
            "cognition": [28.0, np.nan, 21.0, 25.0, 30.0],
            "amyloid": ["positive", "negative", "positive", "n/a", "positive"],
        }
    )
    encoder = Encoder.fit((score, level), train)
    assert encoder.columns == ["cognition", "cognition missing", "amyloid=positive",
                               "amyloid missing"]  # fmt: skip
    new = pd.DataFrame({"cognition": [np.nan, 24.0], "amyloid": ["negative", None]})
    encoded = encoder.encode(new)

    numeric = SimpleImputer(strategy="mean", add_indicator=True).fit(train[["cognition"]])
    imputed, indicator = numeric.transform(new[["cognition"]]).T
    present = train["cognition"].dropna()
    np.testing.assert_allclose(encoded[:, 0], (imputed - present.mean()) / present.std())
    np.testing.assert_array_equal(encoded[:, 1], indicator)

    text = train[["amyloid"]].replace("n/a", np.nan)
    categorical = SimpleImputer(strategy="most_frequent", add_indicator=True).fit(text)
    filled = categorical.transform(new[["amyloid"]].astype(object))
    dummies = pd.get_dummies(
        pd.Categorical(filled[:, 0], categories=["negative", "positive"]), drop_first=True
    )
    np.testing.assert_array_equal(encoded[:, 2], dummies.to_numpy(float)[:, 0])
    np.testing.assert_array_equal(encoded[:, 3], filled[:, 1].astype(float))
    again = Encoder.from_dict(json.loads(json.dumps(encoder.to_dict(), sort_keys=True)))
    np.testing.assert_array_equal(again.encode(new), encoded)  # the order survives JSON


def test_values_unlike_training_warn_or_are_refused():
    """Outside the training range: a warning; a missing value no training participant had:
    a warning (its indicator would be constant, so it is left out); a level no training
    participant had: an error (its indicator is left out too)."""
    train = pd.DataFrame({"cognition": [20.0, 25.0, 29.0], "risk_carrier": ["no"] * 3})
    encoder = Encoder.fit((SCORE, CARRIER), train)
    assert encoder.columns == ["cognition"]  # no one missing, no carrier: nothing to learn
    assert encoder.check({"cognition": 24.0, "risk_carrier": "no"}) == []
    (note,) = encoder.check({"cognition": 12.0, "risk_carrier": "no"})
    assert "12 points lies outside the training participants' 20-29" in note
    (note,) = encoder.check({"cognition": None, "risk_carrier": "no"})
    assert "missing, as for no training participant" in note
    with pytest.raises(DataError, match="level 'yes' was never seen in training"):
        encoder.check({"cognition": 24.0, "risk_carrier": "yes"})


def test_declarations_are_checked(tmp_path):
    bad = tmp_path / "covariates.toml"
    bad.write_text('[covariates.age]\nkind = "numeric"\nrange = [0, 1]\n')
    with pytest.raises(ConfigError, match="not a cohort column"):
        CohortSettings.from_toml(None, bad)
    bad.write_text('[covariates.score]\nkind = "numeric"\n')
    with pytest.raises(ConfigError, match=r"needs range = \[low, high\]"):
        CohortSettings.from_toml(None, bad)
    bad.write_text('[covariates.score]\nkind = "numeric"\nrange = [0, 1]\ncolour = 1\n')
    with pytest.raises(ConfigError, match="unknown key 'colour'"):
        CohortSettings.from_toml(None, bad)
    bad.write_text('[covariates.score]\nkind = "numeric"\nrange = [0, 1]\nmissing = "false"\n')
    with pytest.raises(ConfigError, match="'missing': must be true or false"):
        CohortSettings.from_toml(None, bad)
    bad.write_text('[covariates.amyloid]\nkind = "categorical"\nlevels = ["neg", "n/a"]\n')
    with pytest.raises(ConfigError, match="may not spell a missing value"):
        CohortSettings.from_toml(None, bad)
    plain = CohortSettings.from_toml()
    assert plain.covariates == () and "covariates" not in plain.to_dict()


def test_assignments_from_the_command_line():
    assert assignments(["risk_carrier=YES", "cognition=n/a", "score=1=2"]) == {
        "risk_carrier": "YES", "cognition": "n/a", "score": "1=2"}  # fmt: skip
    for texts, message in (
        (["risk_carrier"], "write NAME=VALUE"),
        (["=1"], "write NAME=VALUE"),
        (["cognition=20", "cognition=21"], "cognition is given twice"),
    ):
        with pytest.raises(CohortError, match=message):
            assignments(texts)


def test_table_and_bids_cohorts_carry_covariates(tiny_cohort, tmp_path):
    """A table column per covariate; in BIDS, participants.tsv or sessions.tsv; a missing
    column or a refused value is one error naming the file and line."""
    coding = coding_with_covariates()
    with pytest.raises(CohortError, match="no 'risk_carrier' column here nor in participants"):
        read_cohort(tiny_cohort, coding)
    plain = read_cohort(tiny_cohort)
    table = plain.assign(risk_carrier="no", cognition="n/a").drop(columns=["brain_mask", "rescan"])
    table.loc[0, "risk_carrier"] = "YES"
    table.loc[1, "cognition"] = "27"
    path = tmp_path / "with_covariates.tsv"
    table.to_csv(path, sep="\t", index=False)
    read = read_cohort(path, coding, allow_outside=True)
    assert list(read.columns[-2:]) == ["risk_carrier", "cognition"]
    assert read.loc[0, "risk_carrier"] == "yes" and read.loc[1, "cognition"] == 27.0
    assert pd.isna(read.loc[2, "cognition"])
    table.loc[3, "risk_carrier"] = ""
    table.to_csv(path, sep="\t", index=False)
    with pytest.raises(CohortError, match=r"with_covariates.tsv line 5: covariate 'risk_carrier'"):
        read_cohort(path, coding, allow_outside=True)


@pytest.fixture(scope="module")
def carrier_model(tmp_path_factory):
    """24 tiny phantom participants whose carriers' rates are doubled (the shipped scenario's
    1.3 made stronger, so that 4 epochs of the tiny network can learn it), prepared with
    their declared covariates and trained (configs/train-tiny.toml)."""
    from helpers import BOUNDARY_CHANGE_ONLY

    from predictor.config import CONFIG_DIR
    from predictor.phantoms.generate import TEMPLATE, generate_cohort
    from predictor.prepare import prepare_cohort
    from predictor.training import TrainConfig, train

    root = tmp_path_factory.mktemp("carrier")
    scenario = root / "strong_carrier.toml"
    scenario.write_text(
        'extends = "memory_clinic_covariates"\nname = "test"\ndescription = "test"\n'
        "[covariates]\ncarrier_fraction = 0.5\ncarrier_rate_factor = 2.0\n"
    )
    cohort = generate_cohort(root / "bids", 24, "tiny", seed=4, scenario_path=scenario, jobs=2)
    coding = CohortSettings.from_toml(None, cohort / COVARIATES_FILE)
    table = read_cohort(cohort, coding)
    unmeasured = replace(BOUNDARY_CHANGE_ONLY.longitudinal, enabled=False)  # not needed here
    settings = replace(BOUNDARY_CHANGE_ONLY, longitudinal=unmeasured)
    prepare_cohort(table, root / "work", cohort / TEMPLATE, settings, 2, coding=coding)
    config = TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml")
    train(root / "work", root / "model", config, epochs=4)
    return root, table


def test_the_network_forecasts_faster_atrophy_for_carriers(carrier_model):
    """The same held-out scan forecast with the carrier flag switched: more brain loss as a
    carrier, on average over the held-out (test and validation) participants."""
    from predictor.forecast import as_ensemble, forecast, prepare_for
    from predictor.nifti import load_scan

    root, table = carrier_model
    model = as_ensemble(root / "model")
    info = model.lead.info
    assert {"risk_carrier=yes", "cognition"} <= set(info.covariates.columns)
    volumes = pd.read_csv(root / "work" / "volumes.tsv", sep="\t")
    assert {"risk_carrier", "cognition"} <= set(volumes.columns)
    prior = model.lead.prior
    assert prior.design_ == "diagnosis-by-time" and "years*risk_carrier=yes" in prior.names_
    held_out = info.split["test"] + info.split["validation"]
    differences = []
    for participant in held_out:
        row = table[table["participant_id"] == participant].iloc[0]
        scan = load_scan(row["image"])
        prepared = prepare_for(model.lead, scan)
        change = {}
        for flag in ("no", "yes"):
            covariates = {"risk_carrier": flag, "cognition": row["cognition"]}
            result = forecast(model, scan, row["age"], row["sex"], row["diagnosis"], [3.0],
                              prepared=prepared, covariates=covariates)  # fmt: skip
            brain = result.volumes.set_index("region").loc["brain"]
            change[flag] = brain["network_ml"] - brain["baseline_ml"]
        differences.append(change["yes"] - change["no"])
    assert len(differences) >= 3
    assert np.mean(differences) < 0, differences


@pytest.mark.parametrize(
    ("options", "message"),
    [
        (["--covariate", "colour=1"], "covariate 'colour' is unknown to this model"),
        (["--covariate", "risk_carrier=maybe", "--covariate", "cognition=20"],
         "value 'maybe' is not one of no, yes"),
        (["--covariate", "risk_carrier=no", "--covariate", "cognition=high"], "not a number"),
        (["--covariate", "cognition=20"], "this model needs covariate 'risk_carrier'"),
        (["--covariate", "cognition=20", "--covariate", "cognition=21"], "given twice"),
    ],
)
def test_bad_covariate_options_exit_2_with_one_line(carrier_model, tmp_path, options, message):
    root, table = carrier_model
    out = tmp_path / "out"
    arguments = ["forecast", str(root / "model"), table["image"].iloc[0], "--age", "70",
                 "--sex", "F", "--diagnosis", "CN", "--out", str(out), *options]  # fmt: skip
    result = runner.invoke(app, arguments)
    assert result.exit_code == 2 and message in result.output, result.output
    assert len(result.output.strip().splitlines()) == 1 and not out.exists()


def test_a_model_without_covariates_refuses_one_and_keeps_working(tiny_model):
    from predictor.forecast import as_ensemble, covariate_values
    from predictor.modelstore import read_model_json

    info = read_model_json(tiny_model)
    assert info.covariates.width == 0 and info.condition_size == 5
    assert covariate_values(as_ensemble(tiny_model).lead, None) == {}
    with pytest.raises(DataError, match=r"unknown to this model \(it knows: none\)"):
        covariate_values(as_ensemble(tiny_model).lead, {"risk_carrier": "yes"})


def test_mixed_model_recovers_the_carrier_effect():
    """On the covariate scenario's true volumes (200 participants, 1% measurement noise
    added), the mixed model's carrier-by-time coefficient covers the simulated effect with
    its 95% CI (estimate +- 1.96 SE from statsmodels' fixed-effects covariance, as
    statsmodels' own conf_int) and excludes 0. The simulated effect in the model's terms:
    0.3 (the factor 1.3 - 1) times the mean non-carrier-equivalent slope (mL/year)."""
    from predictor.phantoms.generate import true_volume_table
    from predictor.phantoms.scenario import Scenario
    from predictor.regression import MixedEffectsForecaster

    truth, _ = true_volume_table(Scenario.from_toml("memory_clinic_covariates"), 200, seed=2)
    region = "hippocampus_left"
    table = truth.copy()
    table[region] *= 1 + np.random.default_rng(2).normal(0, 0.01, len(table))
    model = MixedEffectsForecaster(coding=coding_with_covariates()).fit(table, [region])
    estimate, se = model.coefficients(region).loc["years*risk_carrier=yes"]
    slopes = []
    for _, visits in truth.groupby("participant_id"):
        if len(visits) > 1:
            factor = 1.3 if visits["risk_carrier"].iloc[0] == "yes" else 1.0
            slopes.append(np.polyfit(visits["years"], visits[region], 1)[0] / factor)
    simulated = 0.3 * float(np.mean(slopes))
    assert simulated < 0 and abs(estimate - simulated) < 1.96 * se
    assert estimate + 1.96 * se < 0
    assert not math.isnan(model.predict(table.head(1), [2.0])["mean_ml"].iloc[0])


def test_regressions_use_the_covariates():
    """Ridge sees the carrier: switching it changes the forecast in the simulated direction."""
    from predictor.phantoms.generate import true_volume_table
    from predictor.phantoms.scenario import Scenario
    from predictor.regression import RidgeForecaster

    truth, _ = true_volume_table(Scenario.from_toml("memory_clinic_covariates"), 120, seed=3)
    regions = ["hippocampus_left", "brain", "icv"]
    ridge = RidgeForecaster(coding=coding_with_covariates()).fit(truth, regions)
    first = truth.groupby("participant_id").head(1).reset_index(drop=True)
    forecasts = {flag: ridge.predict(first.assign(risk_carrier=flag), [3.0])
                 for flag in ("no", "yes")}  # fmt: skip
    region = forecasts["no"]["region"] == "hippocampus_left"
    gap = forecasts["yes"]["mean_ml"][region] - forecasts["no"]["mean_ml"][region]
    assert gap.mean() < 0


def test_cohort_forecasts_read_the_covariates_from_the_table(carrier_model, tmp_path):
    from predictor.forecast_io import PROVENANCE, forecast_cohort

    root, table = carrier_model
    one = table[table["participant_id"] == table["participant_id"].iloc[0]]
    summary = forecast_cohort(root / "model", one, tmp_path, [1.0])
    assert summary["forecast"] == 1 and summary["failed"] == 0
    first = one.iloc[0]
    stem = f"{first['participant_id']}_{first['session_id']}"
    folder = tmp_path / first["participant_id"] / first["session_id"] / "anat"
    saved = json.loads((folder / f"{stem}_{PROVENANCE}").read_text())["participant"]
    assert saved["risk_carrier"] == first["risk_carrier"]


def test_prepare_refuses_bad_covariates_before_writing(tiny_cohort, tmp_path):
    work = tmp_path / "work"
    declared = tmp_path / "covariates.toml"
    declared.write_text(COVARIATES_TOML)
    result = runner.invoke(app, ["prepare", str(tiny_cohort), str(work), "--covariates",
                                 str(declared)])  # fmt: skip
    assert result.exit_code == 2 and "no 'risk_carrier' column" in result.output
    declared.write_text('[covariates.score]\nkind = "ordinal"\n')
    result = runner.invoke(app, ["prepare", str(tiny_cohort), str(work), "--covariates",
                                 str(declared)])  # fmt: skip
    assert result.exit_code == 2 and "kind must be one of" in result.output
    assert len(result.output.strip().splitlines()) == 1 and not work.exists()


def test_levels_survive_the_workspace_tables(tmp_path):
    """Levels such as "01" or "None" are read back from a workspace TSV as written."""
    from predictor.files import write_tsv
    from predictor.workspace import read_table

    path = write_tsv(tmp_path / "volumes.tsv", pd.DataFrame(
        {"key": ["a", "b", "c"], "grade": ["01", "None", None], "brain": [1.0, 2.0, 3.0]}
    ))  # fmt: skip
    table = read_table(path, ("grade",))
    assert table["grade"].tolist() == ["01", "None", ""]
    grade = Covariate("grade", "categorical", levels=("01", "None"), missing=True)
    assert [grade.parse(v, "row") for v in table["grade"]] == ["01", "None", None]


def test_the_mixed_model_reads_covariates_at_baseline():
    """Changing a later visit's score leaves the fit unchanged; the baseline's does not."""
    from predictor.phantoms.generate import true_volume_table
    from predictor.phantoms.scenario import Scenario
    from predictor.regression import MixedEffectsForecaster

    truth, _ = true_volume_table(Scenario.from_toml("memory_clinic_covariates"), 60, seed=4)
    truth["cognition"] = truth["cognition"].replace("n/a", "25")
    later = truth.assign(cognition=np.where(truth["years"] > 0, "0", truth["cognition"]))
    fits = [MixedEffectsForecaster(coding=coding_with_covariates()).fit(t, ["brain"])
            for t in (truth, later)]  # fmt: skip
    np.testing.assert_allclose(fits[0].coefficients("brain"), fits[1].coefficients("brain"))


def test_visit_pair_forecasts_start_from_each_pairs_own_covariates():
    """The training prior's forecast of a visit pair (predict_each, rows of one participant
    repeated) uses the pair's earlier visit's covariates, as a forecast from that visit
    alone (predict) does."""
    from predictor.phantoms.generate import true_volume_table
    from predictor.phantoms.scenario import Scenario
    from predictor.regression import MixedEffectsForecaster

    truth, _ = true_volume_table(Scenario.from_toml("memory_clinic_covariates"), 60, seed=4)
    truth["cognition"] = truth["cognition"].replace("n/a", "25")
    model = MixedEffectsForecaster(coding=coding_with_covariates()).fit(truth, ["brain"])
    one = truth[truth["participant_id"] == truth["participant_id"].iloc[0]]
    rows = one.iloc[:-1].assign(years=np.diff(one["years"].to_numpy()))
    assert rows["cognition"].nunique() > 1  # the visits' scores differ
    each = model.predict_each(rows)
    for k in range(len(rows)):
        alone = model.predict(rows.iloc[[k]], [rows["years"].iloc[k]])
        assert each["mean_ml"].iloc[k] == pytest.approx(alone["mean_ml"].iloc[0], rel=1e-12)


def test_covariates_leave_every_other_phantom_draw_alone():
    """The covariates come from their own random stream: the same participants as the
    scenario without them, except for the carriers' rates."""
    from predictor.phantoms.participants import draw_participant
    from predictor.phantoms.scenario import Scenario

    plain, with_them = Scenario.from_toml(), Scenario.from_toml("memory_clinic_covariates")
    for index in range(4):
        a, anatomy_a = draw_participant(plain, index, "MCI", 1)
        b, anatomy_b = draw_participant(with_them, index, "MCI", 1)
        assert a.head_scale == b.head_scale and a.baseline_age == b.baseline_age
        np.testing.assert_array_equal(anatomy_a.semi_axes, anatomy_b.semi_axes)
        for region, rate in a.rates.items():
            assert b.rates[region] == pytest.approx(rate * b.carrier_factor)


def test_the_comparison_runs_every_forecaster_with_the_covariates(carrier_model):
    """compare on the covariate workspace: the network (given each test participant's
    covariates) and every regression fitted with them, none left out."""
    from predictor.compare import CompareSettings, compare

    root, _ = carrier_model
    settings = replace(CompareSettings.from_toml(), observed_change="segmentation",
                       bootstrap=200)  # fmt: skip
    comparison = compare(root / "model", root / "work", settings=settings)
    methods = set(comparison.errors["method"])
    assert {"mixed-effects", "ridge", "svr", "no-change"} <= methods
    assert comparison.data.get("not_fitted", {}) == {}
    network = comparison.errors[comparison.errors["method"].str.startswith("network")]
    assert len(network) and np.isfinite(network["abs_error_pct_tbv"]).all()
