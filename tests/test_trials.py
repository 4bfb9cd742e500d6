"""Trial sample size and enrichment (predictor.trials)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.power import TTestIndPower
from typer.testing import CliRunner

from predictor.cli import app, expand_lists
from predictor.errors import DataError
from predictor.phantoms.generate import true_volume_table
from predictor.phantoms.scenario import Scenario
from predictor.trials import (
    FORECAST,
    RANDOM,
    Costs,
    Design,
    n_normal,
    n_t,
    participant_rates,
    rate_slope,
    trial_report,
)

DESIGN = Design(effect=1.0, power=0.8, alpha=0.05)  # effect 1: d = mean / sd


@pytest.mark.parametrize("d", [0.1, 0.2, 0.3, 0.43, 0.5, 0.8, 1.0, 1.2])
def test_sample_size_formulas_agree_with_statsmodels(d):
    # statsmodels' TTestIndPower (noncentral t): our exact root equals it, and the normal
    # approximation n = 2 (z_{1-a/2} + z_{1-b})^2 sigma^2 / delta^2 needs at most one
    # participant fewer (whole participants, rounded up).
    reference = TTestIndPower().solve_power(effect_size=d, alpha=0.05, power=0.8, ratio=1.0)
    assert n_t(d, 1.0, DESIGN) == pytest.approx(reference, abs=0.01)
    assert 0 <= np.ceil(reference) - np.ceil(n_normal(d, 1.0, DESIGN)) <= 1


@pytest.mark.parametrize(("d", "table"), [(0.5, 64), (0.8, 26), (0.2, 393)])
def test_cohen_table_2_4_1(d, table):
    # Cohen (1988), Statistical Power Analysis for the Behavioral Sciences, Table 2.4.1:
    # n per group at alpha = 0.05 two-tailed, power 0.80.
    assert round(n_t(d, 1.0, DESIGN)) == table


def test_readme_worked_example_matches_published_order_of_magnitude():
    # An AD-like hippocampal rate of 4.66 %/yr (Barnes et al. 2009) with a between-participant
    # SD of 2.7 %/yr and a 25% slowing at 80% power: Schott et al. 2010, Neurobiology of Aging,
    # report 88 per arm for AD hippocampal atrophy.
    design = Design(effect=0.25, power=0.8, alpha=0.05)
    n = n_t(-4.66, 2.7, design)
    assert n == pytest.approx(88, rel=0.10)
    assert 85 <= int(np.ceil(n)) <= 87  # the README quotes 86


@pytest.mark.parametrize(
    ("keywords", "message"),
    [
        ({"effect": 0.0}, r"effect must be within \(0, 1\]"),
        ({"effect": 1.5}, r"effect must be within \(0, 1\]"),
        ({"power": 1.0}, r"power must be within \(0, 1\)"),
        ({"alpha": 0.6}, r"alpha must be within \(0, 0.5\]"),
        ({"years": 2.0, "window": 2.0}, r"window must be within \[0, years\)"),
    ],
)
def test_bad_design_is_a_clear_error(keywords, message):
    with pytest.raises(DataError, match=message):
        Design(**keywords)


def test_an_overwhelming_effect_needs_the_smallest_trial():
    # no spread at all (a forecast that is one rate per group): power is reached at n = 2
    assert n_t(-4.5, 1e-15, Design(effect=0.25)) == 2.0


def test_rate_slope_is_numpy_polyfit():
    # hand case: visits at uneven intervals, the slope of numpy.polyfit(deg=1)
    years, percent = [0.0, 0.9, 2.1, 2.4], [0.0, -3.0, -5.5, -7.0]
    assert rate_slope(years, percent) == pytest.approx(np.polyfit(years, percent, 1)[0], rel=1e-12)


def _rows(participant, diagnosis, age, visits, method="network-jacobian", region="ventricles"):
    """errors.tsv rows of one participant: visits = [(years, observed_ml, forecast_ml)],
    baseline 100 mL."""
    return [
        {"participant_id": participant, "session_id": f"ses-{k + 2:02d}", "diagnosis": diagnosis,
         "age": age, "years": years, "region": region, "method": method, "baseline_ml": 100.0,
         "observed_ml": observed, "forecast_ml": forecast}
        for k, (years, observed, forecast) in enumerate(visits)
    ]  # fmt: skip


def test_rates_of_a_fixed_duration_design_use_only_its_visits():
    # A 2-year design (window 0.5): visits after 2.5 years never enter a rate, and a
    # participant whose follow-up stops at 1 year is left out rather than mixing horizons.
    errors = pd.DataFrame(
        _rows("sub-a", "AD", 70.0, [(1.0, 103.0, 102.0), (2.1, 105.0, 104.0), (3.0, 112.0, 106.0)])
        + _rows("sub-b", "CN", 71.0, [(1.0, 101.0, 101.0)])
        + _rows("sub-c", "MCI", 72.0, [(2.4, 104.0, 103.0), (4.0, 120.0, 110.0)])
    )
    rates = participant_rates(errors, "ventricles", Design(years=2.0, window=0.5))
    assert list(rates["participant_id"]) == ["sub-a", "sub-c"]
    a, c = rates.iloc[0], rates.iloc[1]
    assert a["observed"] == pytest.approx(np.polyfit([0, 1.0, 2.1], [0, 3.0, 5.0], 1)[0])
    assert c["observed"] == pytest.approx(4.0 / 2.4)
    assert a["visits"] == 2 and a["last_years"] == 2.1
    # forecast rate: least squares through the baseline, sum(t y) / sum(t^2)
    assert a[FORECAST + "network-jacobian"] == pytest.approx((1 * 2 + 2.1 * 4) / (1 + 2.1**2))


def _held_out(truth: pd.DataFrame, forecasts: dict, regions) -> pd.DataFrame:
    """errors.tsv of every baseline -> follow-up pair of ``truth`` (mL), one block per
    forecast table."""
    rows = []
    for method, table in forecasts.items():
        both = truth.merge(table, on=["participant_id", "session_id"], suffixes=("", "_f"))
        for _, visits in both.groupby("participant_id", sort=True):
            base = visits.iloc[0]
            for _, visit in visits.iloc[1:].iterrows():
                rows += [
                    {"participant_id": base["participant_id"], "session_id": visit["session_id"],
                     "diagnosis": base["diagnosis"], "age": base["age"], "years": visit["years"],
                     "region": region, "method": method, "baseline_ml": base[region],
                     "observed_ml": visit[region], "forecast_ml": visit[f"{region}_f"]}
                    for region in regions
                ]  # fmt: skip
    return pd.DataFrame(rows)


@pytest.fixture(scope="module")
def evaluation_folder(tmp_path_factory):
    """An evaluation folder (errors.tsv) of 200 memory-clinic phantoms: observed volumes are
    the truth with 1% noise per visit; forecasts are the generator's best forecast
    ('network-jacobian', informative), the same forecasts dealt to other participants
    ('shuffled', no information) and no change. The phantoms' rates vary by participant with
    a stage visible at baseline (synthetic_phantoms/memory_clinic.toml)."""
    root = tmp_path_factory.mktemp("trial") / "evaluation"
    truth, best = true_volume_table(Scenario.from_toml(), 200, seed=2)
    rng = np.random.default_rng(5)
    regions = ["hippocampus_left", "hippocampus_right", "ventricles", "brain"]
    observed = truth.copy()
    for region in regions:
        observed[region] *= 1 + 0.01 * rng.normal(size=len(observed))
    observed.loc[observed["years"] == 0, regions] = truth.loc[truth["years"] == 0, regions]
    shuffled = _dealt(best, regions, rng)
    no_change = best.copy()
    for region in regions:
        no_change[region] = best.groupby("participant_id")[region].transform("first")
    errors = _held_out(
        observed,
        {"network-jacobian": best, "shuffled": shuffled, "no-change": no_change},
        regions,
    )
    root.mkdir()
    errors.to_csv(root / "errors.tsv", sep="\t", index=False)
    (root / "evaluation.json").write_text("{}")
    return root


def _dealt(best: pd.DataFrame, regions, rng) -> pd.DataFrame:
    """Each participant's forecast change (visit by visit) taken from another participant's."""
    change = {p: (v[regions] / v[regions].iloc[0]).to_numpy()
              for p, v in best.groupby("participant_id")}  # fmt: skip
    dealt = dict(zip(change, rng.permutation(list(change)), strict=True))
    frames = []
    for participant, visits in best.groupby("participant_id"):
        other = change[dealt[participant]]
        k = np.minimum(np.arange(len(visits)), len(other) - 1)
        frames.append(visits.assign(**{r: visits[r].iloc[0] * other[k, j]
                                       for j, r in enumerate(regions)}))  # fmt: skip
    return pd.concat(frames, ignore_index=True)


@pytest.fixture(scope="module")
def hippocampus_trial(evaluation_folder):
    summary = trial_report(
        evaluation_folder,
        evaluation_folder.parent / "out",
        "hippocampus_left",
        Design(effect=0.25, years=2.0),
        [0.5, 0.25],
        Costs(screen=1.0, enrol=10.0),
    )
    return summary, pd.DataFrame(summary["enrichment"]).set_index(["rule", "fraction"])


def test_enrichment_by_an_informative_forecast_lowers_the_observed_n(hippocampus_trial):
    summary, table = hippocampus_trial
    network = FORECAST + "network-jacobian"
    unenriched = table.loc[(RANDOM, 1.0), "total_n_per_arm"]
    assert summary["participants"] > 150
    assert table.loc[(network, 0.5), "total_n_per_arm"] < unenriched
    assert table.loc[(network, 0.25), "total_n_per_arm_ci_high"] < unenriched
    for q in (0.5, 0.25):
        assert table.loc[(network, q), "screened_per_enrolled"] == pytest.approx(1 / q, rel=0.02)
    assert "no-change" not in " ".join(table.index.get_level_values("rule"))


def test_a_growing_region_enrols_the_fastest_growers(evaluation_folder):
    # ventricles grow with disease (configs/regions.toml): the informative forecast enrols
    # the fastest expansion, and the observed n falls
    summary = trial_report(evaluation_folder, evaluation_folder.parent / "vent", "ventricles",
                           Design(effect=0.25, years=2.0), [0.5])  # fmt: skip
    table = pd.DataFrame(summary["enrichment"]).set_index(["rule", "fraction"])
    network = (FORECAST + "network-jacobian", 0.5)
    assert table.loc[network, "mean_rate_pct_per_year"] > table.loc[(RANDOM, 1.0),
                                                                    "mean_rate_pct_per_year"] > 0
    assert table.loc[network, "total_n_per_arm"] < table.loc[(RANDOM, 1.0), "total_n_per_arm"]
    assert summary["warnings"] == []


def test_a_forecast_with_no_information_gains_nothing_beyond_chance(hippocampus_trial):
    # The same forecasts dealt to other participants, and a random order: their bootstrap
    # 95% CI of the honest n covers the unenriched figure at every enrolled fraction.
    _, table = hippocampus_trial
    unenriched = table.loc[(RANDOM, 1.0), "total_n_per_arm"]
    for rule in (FORECAST + "shuffled", RANDOM):
        for q in (0.5, 0.25):
            row = table.loc[(rule, q)]
            assert row["total_n_per_arm_ci_low"] <= unenriched <= row["total_n_per_arm_ci_high"]


def test_apparent_n_from_forecast_spread_is_optimistic(hippocampus_trial):
    # Forecast rates have no measurement noise and no unexplained variation: the n from
    # their spread is smaller than the honest one, and is labelled apparent.
    summary, table = hippocampus_trial
    row = table.loc[(FORECAST + "network-jacobian", 1.0)]
    assert row["apparent_n_per_arm"] < row["total_n_per_arm"]


def test_disease_related_effect_against_a_hand_computation(evaluation_folder, hippocampus_trial):
    # delta = effect x mean(rate - CN line at the same age), the CN line by numpy.polyfit;
    # sigma = SD of the rates; n by the exact t-test (checked against statsmodels above).
    _, table = hippocampus_trial
    rates = pd.read_csv(evaluation_folder.parent / "out" / "rates.tsv", sep="\t")
    normal = rates[rates["diagnosis"] == "CN"]
    slope, intercept = np.polyfit(normal["age"], normal["observed"], 1)
    excess = rates["observed"] - (intercept + slope * rates["age"])
    expected = n_t(excess.mean(), rates["observed"].std(ddof=1), Design(effect=0.25))
    row = table.loc[(RANDOM, 1.0)]
    assert row["disease_n_per_arm"] == pytest.approx(expected, rel=1e-6)  # TSV digits
    assert row["disease_n_per_arm"] > row["total_n_per_arm"]  # CN ageing is not slowed


def test_costs_and_the_cheapest_design(hippocampus_trial):
    # total = screened x 1 + enrolled x 10, both arms, whole participants: with n per arm
    # enrolled and n x (screened per enrolled) screened, 2 ceil(n) (10 + screened/enrolled)
    summary, table = hippocampus_trial
    for (_rule, q), row in table.iterrows():
        if np.isfinite(row["total_n_per_arm"]):
            expected = 2 * np.ceil(row["total_n_per_arm"]) * (10 + row["screened_per_enrolled"])
            assert row["total_cost"] == pytest.approx(expected)
            assert row["screened_per_enrolled"] == pytest.approx(1 / q, rel=0.02)
    # the cheapest of no enrichment and every rule below q = 1 (the random order is a control)
    enriched = table.drop(index=RANDOM, level="rule").query("fraction < 1")["total_cost"]
    rule, q = enriched.idxmin()
    cheapest = f"cheapest design: {rule} enrolling {q:g}"
    if table.loc[(RANDOM, 1.0), "total_cost"] < enriched.min():
        cheapest = "cheapest design: no enrichment"
    assert summary["verdicts"][-1].startswith(cheapest)
    assert "statisticians" in summary["caution"]


def test_forecasts_of_training_participants_are_refused(tmp_path):
    folder = tmp_path / "forecasts"
    folder.mkdir()
    (folder / "forecasts.tsv").write_text("participant_id\n")
    with pytest.raises(DataError, match="held-out forecasts"):
        trial_report(folder, tmp_path / "out", "hippocampus_left")


def test_trial_size_command(evaluation_folder, tmp_path):
    runner = CliRunner()
    base = ["trial-size", "--from", str(evaluation_folder), "--years", "2"]
    unknown = runner.invoke(app, [*base, "--region", "amygdala"])
    assert unknown.exit_code == 2 and "region 'amygdala' is not one of" in unknown.output
    few = runner.invoke(app, expand_lists([*base, "--region", "hippocampus_left", "--enrich",
                                           "0.01"]))  # fmt: skip
    assert few.exit_code == 2 and "at least 10 are needed" in few.output
    effect = runner.invoke(app, [*base, "--region", "hippocampus_left", "--effect", "2"])
    assert effect.exit_code == 2 and "effect must be within" in effect.output
    half = runner.invoke(app, [*base, "--region", "hippocampus_left", "--screen-cost", "1"])
    assert half.exit_code == 2 and "give both --screen-cost and --enrol-cost" in half.output
    good = runner.invoke(
        app,
        expand_lists([*base, "--region", "hippocampus_left", "--enrich", "0.5", "0.3",
                      "--out", str(tmp_path / "cli")]),
    )  # fmt: skip
    assert good.exit_code == 0, good.output
    assert "planning aid only" in good.output.lower()
    assert "enrolling 0.5: fewest per arm among the non-network rules" in good.output
    assert (tmp_path / "cli" / "enrichment.png").stat().st_size > 5_000
