"""Out-of-range anatomy: Mahalanobis distance of regional volumes (predictor.atypical)."""

from __future__ import annotations

import json
from dataclasses import replace

import pandas as pd
import pytest
from scipy.spatial import distance
from sklearn.covariance import LedoitWolf

from predictor.atypical import anatomy_note, anatomy_reference, mahalanobis
from predictor.workspace import read_workspace


def test_distance_is_scipys_mahalanobis(rng):
    # scipy.spatial.distance.mahalanobis under scikit-learn's Ledoit-Wolf precision
    x = rng.normal(size=(30, 5))
    fitted = LedoitWolf().fit(x)
    for row in x[:5]:
        expected = distance.mahalanobis(row, fitted.location_, fitted.precision_)
        assert mahalanobis(row, fitted.location_, fitted.precision_) == pytest.approx(expected)


@pytest.fixture(scope="module")
def visits(tiny_workspace):
    workspace = read_workspace(tiny_workspace)
    return workspace.volumes, workspace.regions


def test_training_participants_pass_and_fourfold_ventricles_are_flagged(visits):
    # Calibrated on the participants themselves (each participant's scans against a fit
    # without it): none of their scans is flagged; ventricles four times the largest seen
    # are, and the note names them.
    table, regions = visits
    reference = anatomy_reference(table, regions)
    assert reference["participants"] == table["participant_id"].nunique() == 20
    assert reference["scans"] == len(table)
    assert regions.head_size not in reference["regions"]
    for row in table.to_dict("records"):
        assert anatomy_note(reference, row) is None, row["key"]
    odd = table.iloc[0].to_dict() | {"ventricles": 4 * table["ventricles"].max()}
    note = anatomy_note(reference, odd)
    assert note is not None and "furthest from their mean: ventricles" in note
    few = table[table["participant_id"].isin(sorted(set(table["participant_id"]))[:9])]
    assert anatomy_reference(few, regions) is None  # too few participants to calibrate


def test_forecast_warns_about_an_unusual_anatomy(tiny_model, tiny_workspace):
    # The model keeps its training participants' reference in model.json; a forecast of a
    # training participant's scan carries no anatomy warning, the same scan read with
    # ventricles four times the training maximum does (in the notes written to the
    # summary and provenance).
    from predictor.forecast import forecast, prepare_for
    from predictor.modelstore import load_model
    from predictor.nifti import load_scan

    model = load_model(tiny_model)
    stored = json.loads((tiny_model / "model.json").read_text())["training_range"]["anatomy"]
    assert stored["participants"] == len(model.info.split["train"])
    cohort = pd.read_csv(tiny_workspace / "cohort.tsv", sep="\t")
    row = cohort[cohort["participant_id"] == model.info.split["train"][0]].iloc[0]
    scan = load_scan(row["image"])
    prepared = prepare_for(model, scan)
    request = (row["age"], row["sex"], row["diagnosis"], [1.0])
    plain = forecast(model, scan, *request, prepared=prepared)
    assert not [note for note in plain.warnings if "Mahalanobis" in note]
    training = read_workspace(tiny_workspace).volumes
    largest = training[training["participant_id"].isin(model.info.split["train"])]["ventricles"]
    volumes = prepared.volumes | {"ventricles": 4 * largest.max()}
    odd = forecast(model, scan, *request, prepared=replace(prepared, volumes=volumes))
    assert [note for note in odd.warnings if "furthest from their mean: ventricles" in note]
