"""Ensembles and their conformal intervals (predictor.ensemble, ensemble forecasts)."""

from __future__ import annotations

import json
import shutil
from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
import torch
from typer.testing import CliRunner

from predictor.cli import app
from predictor.config import CONFIG_DIR
from predictor.ensemble import (
    band_of,
    calibrate,
    coverage_note,
    cross_fitted,
    interval_scale,
    one_per_participant,
    quantile,
    residual_var,
    train_members,
)
from predictor.errors import DataError, ModelError
from predictor.forecast import as_ensemble, forecast
from predictor.forecast_io import write_forecast
from predictor.modelstore import Ensemble, TrainedModel, load_ensemble
from predictor.pairs import bootstrap_counts
from predictor.training import TrainConfig, prepare_run


def _scores(
    groups: dict[str, list[float]], fold: int = 1, region: str = "r", years: float = 2.0
) -> pd.DataFrame:
    rows = [{"participant_id": p, "fold": fold, "region": region, "score": s,
             "forecast_ml": 10.0, "scale_ml": 1.0, "years": years}
            for p, scores in groups.items() for s in scores]  # fmt: skip
    return pd.DataFrame(rows)


def test_conformal_quantile_counts_each_participant_once_by_hand():
    # Split-conformal quantile (Lei et al. 2018, JASA, section 2.2): the
    # ceil((n + 1)(1 - alpha))-th smallest of n calibration scores. Participant A has five
    # pairs, all scored 1; B-E one each (2..5). Counted once each, n = 5 scores {1..5}: at
    # level 0.5 the ceil(6 * 0.5) = 3rd smallest is 3 (counting A's five pairs, n = 9 and
    # the 5th smallest would be 1). At level 0.9, ceil(6 * 0.9) = 6 > 5: no finite interval.
    scores = _scores({"A": [1, 1, 1, 1, 1], "B": [2], "C": [3], "D": [4], "E": [5]})
    assert quantile(scores, 0.5, seed=0) == (3.0, 5)
    assert quantile(scores, 0.9, seed=0) == (np.inf, 5)
    chosen = one_per_participant(scores["participant_id"], seed=0)
    assert sorted(scores["participant_id"].iloc[chosen]) == ["A", "B", "C", "D", "E"]
    again = one_per_participant(scores["participant_id"], seed=0)
    np.testing.assert_array_equal(chosen, again)  # seeded


def test_one_pair_per_participant_gives_the_nominal_coverage_by_simulation():
    # Exchangeable participants with 1-4 correlated pairs each (a participant effect plus
    # pair noise). Split-conformal with one pair per participant (Dunn, Wasserman and
    # Ramdas, JASA 2023) covers a new participant's random pair with probability within
    # [level, level + 1 / (n + 1)] (Lei et al. 2018, Theorem 2.2), here [0.8, 0.85] for
    # n = 19; 4000 repetitions give a Monte Carlo SD of about 0.006.
    rng = np.random.default_rng(11)
    hits = []
    for repetition in range(4000):
        sizes = rng.integers(1, 5, size=20)
        effects = rng.normal(size=20) * 2.0
        rows = [(f"p{i}", abs(effects[i] + rng.normal())) for i in range(20)
                for _ in range(sizes[i])]  # fmt: skip
        table = pd.DataFrame(rows, columns=["participant_id", "score"])
        calibration = table[table["participant_id"] != "p19"]
        q, n = quantile(calibration, 0.8, seed=repetition)
        new = table[table["participant_id"] == "p19"]["score"].to_numpy()
        hits.append(rng.choice(new) <= q)
    assert n == 19
    assert 0.8 - 0.02 <= np.mean(hits) <= 0.85 + 0.02


def test_an_infinite_score_counts_and_a_missing_one_does_not():
    scores = _scores({"A": [np.inf], "B": [1.0], "C": [2.0], "D": [np.nan]})
    assert quantile(scores, 0.5, seed=0) == (2.0, 3)  # ceil(4 * 0.5) = 2nd of {1, 2, inf}
    assert quantile(scores, 0.7, seed=0) == (np.inf, 3)


def test_each_fold_is_calibrated_on_the_other_folds_only():
    first = _scores({f"a{i}": [float(i)] for i in range(1, 10)}, fold=1)  # scores 1..9
    second = _scores({f"b{i}": [10.0 * i] for i in range(1, 10)}, fold=2)  # 10..90
    table = cross_fitted(pd.concat([first, second], ignore_index=True), 0.8, 0, (1.5, 2.5, 3.5))
    # n = 9: the ceil(10 * 0.8) = 8th smallest of the other fold's scores
    assert set(table.loc[table["fold"] == 1, "quantile"]) == {80.0}
    assert set(table.loc[table["fold"] == 2, "quantile"]) == {8.0}
    np.testing.assert_allclose(table["upper_ml"] - table["forecast_ml"], table["quantile"])


def test_each_horizon_band_is_calibrated_on_its_own_scores():
    # Mondrian conformal (Vovk et al. 2005, chapter 4): the quantile of a 1-year pair comes
    # from the other fold's 1-year scores only, a 4-year pair's from its 4-year scores. The
    # same participants, with 10x larger errors at 4 years.
    parts = [
        _scores({f"{f}{i}": [float(i) * factor] for i in range(1, 10)}, fold=k, years=years)
        for k, f in ((1, "a"), (2, "b"))
        for years, factor in ((1.0, 1.0), (4.0, 10.0))
    ]
    table = cross_fitted(pd.concat(parts, ignore_index=True), 0.8, 0, (1.5, 2.5, 3.5))
    assert list(band_of([0.5, 1.5, 2.0, 3.49, 3.5, 9.0], (1.5, 2.5, 3.5))) == [0, 1, 1, 2, 3, 3]
    assert set(table.loc[table["years"] == 1.0, "quantile"]) == {8.0}
    assert set(table.loc[table["years"] == 4.0, "quantile"]) == {80.0}


def test_a_diagnosis_covered_off_the_level_is_named():
    # 85-95% for a 90% interval is within tolerance; AD at 70% and CN at 100% are not
    calibration = {"level": 0.9, "coverage_by_diagnosis": {
        "MCI": {"brain": 0.86, "ventricles": 0.94},
        "AD": {"brain": 0.70, "ventricles": 0.88},
        "CN": {"brain": 1.0, "ventricles": 0.97},
    }}  # fmt: skip
    assert coverage_note(calibration, "MCI") is None
    assert coverage_note(calibration, "other") is None  # a diagnosis it did not measure
    assert coverage_note(None, "AD") is None
    ad = coverage_note(calibration, "AD")
    assert "held-out AD participants' follow-ups at brain 70%" in ad and "ventricles" not in ad
    assert "brain 100%, ventricles 97%" in coverage_note(calibration, "CN")


def test_scale_adds_the_member_spread_to_the_observation_noise():
    np.testing.assert_allclose(interval_scale([3.0, 0.0], [16.0, 4.0]), [5.0, 2.0])


def test_member_bootstraps_are_seeded_and_stratified_by_diagnosis():
    participants = [f"p{i:02d}" for i in range(30)]
    diagnosis = {p: ("CN", "MCI", "AD")[i % 3] for i, p in enumerate(participants)}
    one, two = (bootstrap_counts(participants, diagnosis, 5, k) for k in (1, 2))
    assert one == bootstrap_counts(participants, diagnosis, 5, 1) and one != two
    for counts in (one, two):
        assert set(counts) == set(participants) and min(counts.values()) == 0  # P(none) ~ 1e-4
        for label in ("CN", "MCI", "AD"):  # each diagnosis keeps its size
            assert sum(n for p, n in counts.items() if diagnosis[p] == label) == 10


def test_a_participant_drawn_twice_trains_on_its_pairs_twice(tiny_workspace):
    config = TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml")
    run, _ = prepare_run(tiny_workspace, config, seed=0)
    member, _ = prepare_run(tiny_workspace, config, seed=0, member=1)
    assert member.split == run.split  # the split, and so the prior, are shared
    before = run.pairs["train"]["participant_id"].value_counts()
    after = member.pairs["train"]["participant_id"].value_counts()
    counts = member.info.bootstrap
    assert sum(counts.values()) == len(run.split["train"]) and max(counts.values()) >= 2
    for participant, pairs in before.items():
        assert after.get(participant, 0) == counts[participant] * pairs, participant
    assert member.info.fingerprint != run.info.fingerprint


def _perturbed(model: TrainedModel, size: float, seed: int) -> TrainedModel:
    """A copy of ``model`` whose every weight has Gaussian noise of SD ``size`` added."""
    network = type(model.network)(model.network.settings, model.info.condition_size)
    network.load_state_dict(model.network.state_dict())
    generator = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for parameter in network.parameters():
            parameter.add_(size * torch.randn(parameter.shape, generator=generator))
    network.eval()
    return replace(model, network=network)


@pytest.fixture(scope="module")
def ensemble_forecasts(tiny_model, tiny_workspace):
    """One scan forecast by [model, model], [model, slightly perturbed], [model, more
    perturbed], calibrated with q = 1, 2, 3, 4 in the four horizon bands of every region,
    and by the model alone."""
    row = pd.read_csv(tiny_workspace / "cohort.tsv", sep="\t").iloc[0]
    model = as_ensemble(tiny_model).lead
    regions = model.info.region_set.names
    calibration = {"level": 0.9, "bands_years": [1.5, 2.5, 3.5],
                   "quantiles": dict.fromkeys(regions, [1.0, 2.0, 3.0, 4.0]),
                   "method": "test", "participants": dict.fromkeys(regions, [10] * 4)}  # fmt: skip
    results = {}
    for name, size in (("same", 0.0), ("small", 0.002), ("large", 0.02)):
        other = _perturbed(model, size, seed=1)
        ensemble = Ensemble(tiny_model, (model, other), calibration)
        results[name] = forecast(ensemble, row.image, row.age, row.sex, row.diagnosis, [0, 1, 3])
    results["single"] = forecast(model, row.image, row.age, row.sex, row.diagnosis, [0, 1, 3])
    return results


def test_ensemble_volume_is_the_member_mean_and_spread_grows_with_perturbation(
    ensemble_forecasts,
):
    same, small, large = (ensemble_forecasts[k].volumes for k in ("same", "small", "large"))
    single = ensemble_forecasts["single"].volumes
    np.testing.assert_allclose(same["network_ml"], single["network_ml"], rtol=1e-6)
    assert same["network_sd_ml"].max() < 1e-6  # identical members agree
    later = small["years"] > 0
    spread_small = small.loc[later, "network_sd_ml"].sum()
    spread_large = large.loc[later, "network_sd_ml"].sum()
    assert 0 < spread_small < spread_large
    # the voxel-wise map: zero for identical members, larger for the larger perturbation
    last = [ensemble_forecasts[k].horizons[-1].log_jacobian_sd for k in ("same", "large")]
    assert np.abs(last[0]).max() < 1e-5 and last[1].max() > 1e-3
    assert ensemble_forecasts["single"].horizons[-1].log_jacobian_sd is None


def test_intervals_widen_with_the_horizon_and_only_calibrated_ensembles_have_them(
    ensemble_forecasts, tiny_model
):
    table = ensemble_forecasts["large"].volumes
    model = as_ensemble(tiny_model).lead
    for region, rows in table.groupby("region"):
        rows = rows.set_index("years")
        assert np.isnan(rows.loc[0.0, "network_lower_ml"])  # the baseline itself: no interval
        width = (rows["network_upper_ml"] - rows["network_lower_ml"]).loc[[1.0, 3.0]]
        assert width.loc[3.0] > width.loc[1.0] > 0, region
        for years, q in ((1.0, 1.0), (3.0, 3.0)):  # bands <1.5 and 2.5-3.5
            expected = 2 * q * interval_scale(rows.loc[years, "network_sd_ml"],
                                              residual_var(model, region))  # fmt: skip
            assert width.loc[years] == pytest.approx(expected, nan_ok=True), (region, years)
    single = ensemble_forecasts["single"]
    assert single.volumes["network_lower_ml"].isna().all()
    assert any("single-member model has no spread" in note for note in single.warnings)


@pytest.mark.slow
def test_train_members_then_calibrate_then_forecast(tiny_workspace, tmp_path):
    config = TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml")
    folder = tmp_path / "ensemble"
    train_members(tiny_workspace, folder, config, 2, seed=0, epochs=1)
    ensemble = load_ensemble(folder)
    assert len(ensemble.members) == 2 and ensemble.calibration is None
    first, second = (m.info for m in ensemble.members)
    assert first.split == second.split and first.seed + 1 == second.seed
    assert first.bootstrap != second.bootstrap
    with pytest.raises(DataError, match="holds an ensemble"):
        train_members(tiny_workspace, folder, config, 1, seed=0, epochs=1)
    # held-out scores of a (made-up) evaluation folder: participants scored 1..20 at 2 years
    # and 10..200 at 4 years in every region; at 0.9 the ceil(21 * 0.9) = 19th smallest of
    # each band. No pair below 1.5 or within 2.5-3.5 years: those bands get no interval.
    regions = ensemble.lead.info.region_set.names
    scores = pd.concat(
        [_scores({f"p{i}": [float(i) * factor] for i in range(1, 21)}, region=r, years=years)
         for r in regions for years, factor in ((2.0, 1.0), (4.0, 10.0))]  # fmt: skip
    )
    evaluation = tmp_path / "evaluation"
    evaluation.mkdir()
    scores.to_csv(evaluation / "conformal.tsv", sep="\t", index=False)
    (evaluation / "evaluation.json").write_text(
        json.dumps(
            {"members": 3, "observed_change": "segmentation", "bands_years": [1.5, 2.5, 3.5]}
        )
    )
    with pytest.raises(DataError, match="fold ensembles of 3 members and this model has 2"):
        calibrate(evaluation, folder)
    (evaluation / "evaluation.json").write_text(
        json.dumps({"members": 2, "observed_change": "segmentation", "level": 0.9,
                    "bands_years": [1.5, 2.5, 3.5]})  # fmt: skip
    )
    # the evaluation's measured coverage of the network's intervals: the forecast
    # participant's diagnosis at 70% in every region (a warning), the others at 90%
    row = pd.read_csv(tiny_workspace / "cohort.tsv", sep="\t").iloc[0]
    pd.DataFrame(
        [{"method": "network-jacobian", "region": r, "grouping": "diagnosis", "group": dx,
          "coverage": 0.7 if dx == row.diagnosis else 0.9}
         for r in regions for dx in ("CN", "MCI", "AD", row.diagnosis)]
    ).drop_duplicates().to_csv(evaluation / "coverage.tsv", sep="\t", index=False)  # fmt: skip
    result = CliRunner().invoke(app, ["calibrate", str(folder), "--from", str(evaluation)])
    assert result.exit_code == 0, result.output
    stored = json.loads((folder / "calibration.json").read_text())
    assert stored["members"] == 2 and stored["bands_years"] == [1.5, 2.5, 3.5]
    for region in regions:
        assert stored["participants"][region] == [0, 20, 0, 20]
        assert stored["quantiles"][region] == [None, 19.0, None, 190.0]  # null: no quantile
    assert "too few participants for a finite 0.9 interval at <1.5 y, 2.5-3.5 y" in result.output
    assert "(a band needs at least 9 participants)" in result.output  # ceil(10 * 0.9) = 9
    assert "<1.5 y q = none (n 0); 1.5-2.5 y q = 19 (n 20)" in result.output
    assert stored["coverage_by_diagnosis"][row.diagnosis]["brain"] == 0.7
    calibrated = as_ensemble(folder)
    assert calibrated.calibration is not None
    out = forecast(calibrated, row.image, row.age, row.sex, row.diagnosis, [2.0, 4.0, 3.0])
    table = out.volumes.set_index(["region", "years"])
    half = (table["network_upper_ml"] - table["network_lower_ml"]) / 2
    np.testing.assert_allclose(half.xs(4.0, level="years") / table["network_scale_ml"].xs(
        4.0, level="years"), 190.0)  # fmt: skip
    np.testing.assert_allclose(half.xs(2.0, level="years") / table["network_scale_ml"].xs(
        2.0, level="years"), 19.0)  # fmt: skip
    assert table.xs(3.0, level="years")["network_lower_ml"].isna().all()
    assert any("no finite interval for some regions at 3 years" in w for w in out.warnings)
    assert any(f"held-out {row.diagnosis} participants' follow-ups at" in w for w in out.warnings)
    provenance = write_forecast(out, calibrated, tmp_path / "forecast", "scan", "abc")
    assert "scan_desc-forecast24mo_logjacobiansd.nii.gz" in provenance["outputs"]
    assert provenance["model"]["members"] == 2
    assert provenance["model"]["calibration"]["level"] == 0.9
    # new weights in a member (here member 1's) make the calibration stale: refused until
    # calibrated again
    for name in ("weights.pt", "model.json"):
        shutil.copy(folder / "member-1" / name, folder / "member-2" / name)
    with pytest.raises(ModelError, match="calibration.json: was made for other member weights"):
        load_ensemble(folder)
    # a calibration of an older version (one quantile for every horizon) is refused
    stored.pop("bands_years")
    (folder / "calibration.json").write_text(json.dumps(stored))
    with pytest.raises(ModelError, match="one quantile for every horizon"):
        load_ensemble(folder)
    with pytest.raises(DataError, match="--member needs --members"):
        train_members(tiny_workspace, tmp_path / "one", config, 1, seed=0, only=1)


def test_calibrate_refuses_what_it_cannot_use(stand_in_model, tmp_path):
    with pytest.raises(DataError, match="has no conformal.tsv"):
        calibrate(tmp_path, stand_in_model)
    (tmp_path / "conformal.tsv").write_text("\n")  # as a single-member evaluation writes it
    with pytest.raises(DataError, match="holds no scores"):
        calibrate(tmp_path, stand_in_model)
    _scores({"a": [1.0]}).to_csv(tmp_path / "conformal.tsv", sep="\t", index=False)
    (tmp_path / "evaluation.json").write_text(json.dumps({"members": 2}))
    with pytest.raises(DataError, match="evaluated without horizon bands"):
        calibrate(tmp_path, stand_in_model)
    (tmp_path / "evaluation.json").write_text(json.dumps({"members": 2, "bands_years": [2.0]}))
    with pytest.raises(DataError, match="single-member model has no spread"):
        calibrate(tmp_path, stand_in_model)
    with pytest.raises(DataError, match="--level must be within"):
        calibrate(tmp_path, stand_in_model, level=1.5)
