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
from predictor.trials import Design, n_normal, n_t, sample_size, trial_report

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


def test_bootstrap_interval_brackets_the_estimate(rng):
    rates = rng.normal(-4.66, 2.7, size=120)
    result = sample_size(rates, Design(effect=0.25))
    assert result["n_ci_low"] < result["n_per_arm_exact"] < result["n_ci_high"]
    assert result["n_per_arm"] == int(np.ceil(result["n_per_arm_exact"]))


@pytest.mark.parametrize(
    ("keywords", "message"),
    [
        ({"effect": 0.0}, r"effect must be within \(0, 1\]"),
        ({"effect": 1.5}, r"effect must be within \(0, 1\]"),
        ({"power": 1.0}, r"power must be within \(0, 1\)"),
        ({"alpha": 0.6}, r"alpha must be within \(0, 0.5\]"),
    ],
)
def test_bad_design_is_a_clear_error(keywords, message):
    with pytest.raises(DataError, match=message):
        Design(**keywords)


@pytest.fixture(scope="module")
def phantom_trial_folders(tmp_path_factory):
    """Forecasts (the generator's best forecast) and observed volumes (1% noise) of 200 phantoms.

    The phantoms' true rates vary by participant with a visible disease stage
    (synthetic_phantoms/memory_clinic.toml), so a forecast can rank them.
    """
    root = tmp_path_factory.mktemp("trial")
    truth, best = true_volume_table(Scenario.from_toml(), 200, seed=2)
    rng = np.random.default_rng(5)
    observed = truth.copy()
    observed["hippocampus_left"] *= 1 + 0.01 * rng.normal(size=len(observed))
    first = best.groupby("participant_id").head(1).set_index("participant_id")
    rows = []
    for record in best[best["years"].between(1.5, 2.5)].to_dict("records"):
        base = first.loc[record["participant_id"], "hippocampus_left"]
        rows.append(
            {
                "participant_id": record["participant_id"],
                "session_id": "ses-01",
                "age": record["age"] - record["years"],
                "sex": record["sex"],
                "diagnosis": record["diagnosis"],
                "region": "hippocampus_left",
                "years": 2.0,
                "network_percent_per_year": 100
                * (record["hippocampus_left"] / base - 1)
                / record["years"],
            }
        )
    (root / "forecasts").mkdir()
    pd.DataFrame(rows).to_csv(root / "forecasts" / "forecasts.tsv", sep="\t", index=False)
    (root / "work").mkdir()
    observed.to_csv(root / "work" / "volumes.tsv", sep="\t", index=False)
    return root


def test_enrichment_lowers_observed_n_and_screening_is_one_over_q(phantom_trial_folders):
    root = phantom_trial_folders
    summary = trial_report(
        root / "forecasts",
        root / "out",
        "hippocampus_left",
        Design(effect=0.25, years=2.0),
        [0.5, 0.25],
        observed=root / "work",
    )
    table = pd.DataFrame(summary["enrichment"]).set_index("fraction")
    assert table.loc[1.0, "observed_participants"] > 150
    assert table.loc[0.5, "observed_n_per_arm"] < table.loc[1.0, "observed_n_per_arm"]
    assert table.loc[0.25, "observed_n_per_arm"] < table.loc[0.5, "observed_n_per_arm"]
    for q in (0.5, 0.25):
        assert table.loc[q, "screened_per_enrolled"] == pytest.approx(1 / q, rel=0.02)
    assert (root / "out" / "enrichment.png").stat().st_size > 5_000
    assert "statisticians" in summary["caution"]


def test_trial_size_command_errors(phantom_trial_folders):
    root = phantom_trial_folders
    runner = CliRunner()
    base = ["trial-size", "--from", str(root / "forecasts"), "--years", "2"]
    unknown = runner.invoke(app, [*base, "--region", "amygdala"])
    assert unknown.exit_code == 2 and "region 'amygdala' is not one of" in unknown.output
    few = runner.invoke(app, expand_lists([*base, "--region", "hippocampus_left", "--enrich",
                                           "0.01"]))  # fmt: skip
    assert few.exit_code == 2 and "at least 10 are needed" in few.output
    effect = runner.invoke(app, [*base, "--region", "hippocampus_left", "--effect", "2"])
    assert effect.exit_code == 2 and "effect must be within" in effect.output
    good = runner.invoke(
        app,
        expand_lists([*base, "--region", "hippocampus_left", "--enrich", "0.5", "0.3",
                      "--out", str(root / "cli")]),
    )  # fmt: skip
    assert good.exit_code == 0, good.output
    assert "planning aid only" in good.output.lower()
