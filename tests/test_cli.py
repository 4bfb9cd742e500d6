"""Command line (predictor.cli) through typer's CliRunner."""

from __future__ import annotations

import json

import pandas as pd
import pytest
from typer.testing import CliRunner

from predictor.cli import app

runner = CliRunner()


def test_help_states_units_and_caution():
    result = runner.invoke(app, ["--help"])
    assert result.exit_code == 0
    assert "Research use only" in result.output
    phantoms = runner.invoke(app, ["phantoms", "--help"])
    assert "mm" in phantoms.output and "years" in phantoms.output


def test_phantoms_command_and_one_line_error(tmp_path):
    out = tmp_path / "cohort"
    result = runner.invoke(app, ["phantoms", str(out), "--participants", "1", "--seed", "2"])
    assert result.exit_code == 0, result.output
    assert (out / "participants.tsv").is_file()
    again = runner.invoke(app, ["phantoms", str(out), "--participants", "1"])
    assert again.exit_code == 2
    assert "not empty" in again.output
    assert "Traceback" not in again.output


def test_unknown_size_is_a_clear_error(tmp_path):
    result = runner.invoke(app, ["phantoms", str(tmp_path / "x"), "--size", "huge"])
    assert result.exit_code == 2
    assert "size 'huge' is not one of demo, tiny" in result.output


@pytest.mark.slow
def test_demo_quick_runs_every_stage_then_prepare_reuses_its_cache(tmp_path):
    out = tmp_path / "demo"
    result = runner.invoke(app, ["demo", str(out), "--quick"])
    assert result.exit_code == 0, result.output
    assert "measured against true volumes" in result.output
    assert "Research use only" in result.output
    for path in (
        "evaluation/folds.json",
        "evaluation/fold-3/network/weights.pt",
        "evaluation/evaluation.html",
        "evaluation/tests.tsv",
        "forecasts/forecasts.tsv",
        "trial/enrichment.tsv",
        "trial/enrichment.png",
    ):
        assert (out / path).is_file(), path
    assert f"report: {out / 'evaluation' / 'evaluation.html'}" in result.output
    assert "Cross-validated (3 folds" in result.output
    # trial sizes from the evaluation's held-out forecasts, every rule beside the network
    trial = json.loads((out / "trial" / "trial_size.json").read_text())
    assert trial["source"].startswith("held-out forecasts of cross-validation")
    assert "cheapest design" in result.output and trial["network_rule"] is not None
    # every participant's baseline forecast by the network of the fold that held it out
    folds = json.loads((out / "evaluation" / "folds.json").read_text())["assignment"]
    forecasts = pd.read_csv(out / "forecasts" / "forecasts.tsv", sep="\t")
    assert set(forecasts["participant_id"]) == set(folds)
    for participant, fold in folds.items():
        provenance = next((out / "forecasts" / participant).glob("*/anat/*provenance*"))
        model = json.loads((out / "evaluation" / f"fold-{fold}" / "network" / "model.json")
                           .read_text())  # fmt: skip
        assert json.loads(provenance.read_text())["model"]["weights_sha256"] == model[
            "weights_sha256"
        ], participant
    listing = runner.invoke(app, ["volumes", str(out / "work"), "--json"])
    assert listing.exit_code == 0

    rows = json.loads(listing.output)
    assert rows and rows[0]["brain"] > 0 and abs(rows[0]["brain_pct_tbv"] - 100) < 1e-9
    again = runner.invoke(
        app,
        [
            "prepare",
            str(out / "cohort"),
            str(out / "work"),
            "--template",
            str(out / "cohort" / "derivatives" / "phantom-template"),
            "--grid-mm",
            "4",
        ],
    )
    assert again.exit_code == 0, again.output
    assert f"0 prepared, {len(rows)} from cache" in again.output


def test_prepare_bad_shard_and_missing_cohort(tmp_path):
    result = runner.invoke(app, ["prepare", str(tmp_path / "none"), str(tmp_path / "w")])
    assert result.exit_code == 2 and "no such cohort" in result.output
