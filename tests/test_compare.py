"""Held-out comparison and its report (predictor.compare, predictor.report)."""

from __future__ import annotations

import json
import shutil
import subprocess
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from predictor.compare import (
    NETWORK,
    CompareSettings,
    bootstrap_ci,
    cluster_bootstrap_ci,
    compare,
    paired_tests,
    ssim_map,
)
from predictor.errors import DataError
from predictor.regions import RegionSet
from predictor.report import format_number, write_report

REGIONS = RegionSet.from_toml().names


@pytest.fixture(scope="module")
def population_model(tiny_workspace, tmp_path_factory):
    """The tiny config with the template as every participant's image (1 epoch)."""
    from predictor.config import CONFIG_DIR
    from predictor.training import TrainConfig, train

    raw = TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml").to_dict()
    raw["training"]["image_input"] = "template"
    folder = tmp_path_factory.mktemp("population") / "model"
    train(tiny_workspace, folder, TrainConfig.from_dict(raw), epochs=1)
    return folder


@pytest.fixture(scope="module")
def comparison(tiny_model, population_model, tiny_workspace, tmp_path_factory):
    result = compare(tiny_model, tiny_workspace, jobs=2, population=population_model)
    out = tmp_path_factory.mktemp("report")
    write_report(result, out)
    return result, out


class Cells(HTMLParser):
    """Collects tagged numbers (data-source) and image sources of a page."""

    def __init__(self):
        super().__init__()
        self.cells, self.images, self.links, self.current = [], [], [], None

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        if "data-source" in attributes:
            self.current = attributes | {"text": ""}
        if tag == "img":
            self.images.append(attributes.get("src", ""))
        for key in ("href", "src"):
            if key in attributes and tag != "img":
                self.links.append(attributes[key])

    def handle_data(self, data):
        if self.current is not None:
            self.current["text"] += data

    def handle_endtag(self, tag):
        if self.current is not None and tag in ("td", "span"):
            self.cells.append(self.current)
            self.current = None


def test_every_number_on_the_page_equals_its_tsv_value(comparison):
    _, out = comparison
    parser = Cells()
    parser.feed((out / "report.html").read_text())
    assert len(parser.cells) > 200
    tables = {}
    for cell in parser.cells:
        source = cell["data-source"]
        if source not in tables:
            tables[source] = pd.read_csv(out / source, sep="\t")
        value = tables[source].loc[int(cell["data-row"]), cell["data-column"]]
        if isinstance(value, str):
            assert cell["text"] == value
        else:
            assert cell["text"] == format_number(value), (source, cell)


def test_no_change_error_is_exactly_the_observed_change(comparison):
    result, _ = comparison
    still = result.errors[result.errors["method"] == "no-change"]
    assert len(still) == len(REGIONS) * result.data["test_pairs"]
    np.testing.assert_array_equal(still["forecast_ml"], still["baseline_ml"])
    np.testing.assert_array_equal(still["error_ml"], still["baseline_ml"] - still["observed_ml"])


def test_page_is_self_contained_and_names_the_winners(comparison):
    result, out = comparison
    page = (out / "report.html").read_text()
    parser = Cells()
    parser.feed(page)
    assert parser.images and all(src.startswith("data:image/png;base64,") for src in parser.images)
    assert not parser.links  # no stylesheet, script or link is fetched
    assert "http://" not in page and "https://" not in page
    for region in REGIONS:
        assert f"<b>{region.replace('_', ' ')}</b>" in page
    assert "a check" in page and "(primary endpoint)" in page
    assert "Research use only" in page
    tests = result.tests
    assert set(tests["region"]) == set(REGIONS)
    assert list(tests["network"].unique()) == [NETWORK, "network-jacobian"]
    # each participant counted once; the floor is never a comparator
    assert (tests["participants"] == result.data["participants"]["test"]).all()
    assert "floor (best possible)" not in set(tests["comparator"])
    assert set(tests.loc[tests["role"] == "check", "region"]) == {"brain", "icv"}
    assert (tests.loc[tests["role"] == "check", "verdict"] == "check").all()
    decided = tests[tests["verdict"].isin(["network better", "comparator better"])]
    assert ((decided["ci_high_pct_tbv"] < 0) | (decided["ci_low_pct_tbv"] > 0)).all()
    if result.data["participants"]["test"] < 6:  # a sign test cannot reach 0.05
        assert decided.empty
    # the population field is a comparator, and skill is claimed only by beating it
    assert "population-field" in set(tests["comparator"])
    heads = result.headlines.set_index(["region", "network"])
    against = tests[tests["comparator"] == "population-field"].set_index(["region", "network"])
    for key, row in heads.iterrows():
        if row["role"] == "check":
            assert row["subject_specific_skill"] == "not tested"
        else:
            shown = against.loc[key, "verdict"] == "network better"
            assert row["subject_specific_skill"] == ("shown" if shown else "not shown")


def test_population_model_must_share_the_split(tiny_model, population_model, tmp_path):
    moved = tmp_path / "moved"
    shutil.copytree(population_model, moved)
    info = json.loads((moved / "model.json").read_text())
    info["split"]["test"], info["split"]["train"] = info["split"]["train"], info["split"]["test"]
    (moved / "model.json").write_text(json.dumps(info))
    from predictor.compare import _population
    from predictor.forecast import as_ensemble

    with pytest.raises(DataError, match="another participant split"):
        _population(moved, as_ensemble(tiny_model).lead)
    with pytest.raises(DataError, match="not a population-field model"):
        _population(tiny_model, as_ensemble(tiny_model).lead)


def test_a_leaked_split_fails_loudly(tiny_model, tiny_workspace, tmp_path):
    leaked = tmp_path / "leaked"
    shutil.copytree(tiny_model, leaked)
    info = json.loads((leaked / "model.json").read_text())
    info["split"]["train"].append(info["split"]["test"][0])
    (leaked / "model.json").write_text(json.dumps(info))
    with pytest.raises(DataError, match=r"leaked split: participant\(s\) sub-\d+ are in both"):
        compare(leaked, tiny_workspace)


def test_ssim_matches_scikit_image(rng):
    # scikit-image's structural_similarity (Gaussian window, sigma 1.5, population covariance)
    from skimage.metrics import structural_similarity

    a = rng.normal(size=(20, 22, 18))
    b = a + 0.3 * rng.normal(size=a.shape)
    _, expected = structural_similarity(
        a, b, data_range=4.0, gaussian_weights=True, sigma=1.5,
        use_sample_covariance=False, full=True,
    )  # fmt: skip
    ours = ssim_map(a, b, data_range=4.0)
    inner = (slice(6, -6),) * 3  # border handling may differ
    np.testing.assert_allclose(ours[inner], expected[inner], atol=1e-6)


def _errors(values: dict[str, list[float]]) -> pd.DataFrame:
    """An error table of two regions: method -> |error| per pair (two pairs a participant)."""
    rows = []
    for method, numbers in values.items():
        for region in ("hippocampus_left", "ventricles"):
            for k, number in enumerate(numbers):
                rows.append({"participant_id": f"p{k // 2}", "region": region, "method": method,
                             "abs_error_pct_tbv": number})  # fmt: skip
    return pd.DataFrame(rows)


def test_participant_level_tests_count_each_participant_once():
    """Hand cases: 2 pairs a participant; the network is better for every participant.

    Pair-level Wilcoxon would count pairs; here the sign test counts participants:
    p = 2 (1/2)^n (scipy's binomtest), 0.125 for n = 4 and 0.03125 for n = 6. With 4
    participants the bootstrap CI lies below zero but the sign test cannot reach 0.05:
    no verdict. With 6 it can.
    """
    from statsmodels.stats.multitest import multipletests

    errors = _errors({
        "network": [0.1, 0.3, 0.2, 0.2, 0.1, 0.1, 0.5, 0.3],
        "network-jacobian": [0.1] * 8,
        "ridge": [0.4, 0.4, 0.3, 0.5, 0.2, 0.2, 0.6, 0.6],
    })  # fmt: skip
    settings = CompareSettings(
        primary_region="hippocampus_left",
        level=0.95,
        bootstrap=2000,
        observed_change="registration",
        interval_bands_years=(1.5,),
    )
    tests = paired_tests(errors, ["hippocampus_left", "ventricles"], [], settings, seed=0)
    row = tests[(tests["network"] == "network") & (tests["region"] == "hippocampus_left")].iloc[0]
    # participant means: network 0.2, 0.2, 0.1, 0.4; ridge 0.4, 0.4, 0.2, 0.6
    assert row["difference_pct_tbv"] == pytest.approx(np.mean([-0.2, -0.2, -0.1, -0.2]))
    assert row["participants"] == 4 and row["participants_better"] == 4
    assert row["sign_test_p"] == pytest.approx(0.125)
    assert row["role"] == "primary" and row["holm_p"] == pytest.approx(0.125)
    # every bootstrap mean of {-0.2, -0.2, -0.1, -0.2} lies in [-0.2, -0.1]: CI below zero
    assert -0.2 - 1e-12 <= row["ci_low_pct_tbv"] <= row["ci_high_pct_tbv"] <= -0.1 + 1e-12
    assert row["verdict"] == "no difference shown"  # 4 participants can never be enough
    six = _errors({
        "network": [0.1, 0.3, 0.2, 0.2, 0.1, 0.1, 0.5, 0.3, 0.2, 0.2, 0.3, 0.1],
        "network-jacobian": [0.1] * 12,
        "ridge": [0.4, 0.4, 0.3, 0.5, 0.2, 0.2, 0.6, 0.6, 0.5, 0.3, 0.4, 0.4],
    })  # fmt: skip
    tests = paired_tests(six, ["hippocampus_left", "ventricles"], [], settings, seed=0)
    row = tests[(tests["network"] == "network") & (tests["region"] == "hippocampus_left")].iloc[0]
    assert row["sign_test_p"] == pytest.approx(0.03125)
    assert row["verdict"] == "network better"
    secondary = tests[(tests["region"] == "ventricles")]
    expected = multipletests(secondary["sign_test_p"].to_numpy()[:1], method="holm")[1][0]
    assert secondary["holm_p"].iloc[0] == pytest.approx(expected)
    with pytest.raises(DataError, match="primary region 'wm' is not a target region"):
        paired_tests(errors, ["hippocampus_left", "ventricles"], [],
                     CompareSettings("wm", 0.95, 2000, "registration", (1.5,)),
                     seed=0)  # fmt: skip


def test_cluster_bootstrap_ci_against_a_hand_case(rng):
    # two participants: every resample mean is one of 1, 2 or 3 (each pair of draws)
    low, high = cluster_bootstrap_ci(np.array([1.0, 3.0]), rng, 4000, 0.95)
    assert (low, high) == (1.0, 3.0)
    assert np.isnan(cluster_bootstrap_ci(np.array([1.0]), rng, 100, 0.95)[0])


def test_cluster_bootstrap_of_a_constant_is_that_constant(rng):
    low, high = bootstrap_ci(np.full(12, 0.3), np.repeat(np.arange(4), 3), rng)
    assert low == pytest.approx(0.3) and high == pytest.approx(0.3)
    low, high = bootstrap_ci(rng.normal(size=200), np.arange(200), rng)
    assert low < 0 < high


def chromium() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(
    chromium() is None, reason="Debian's chromium is not installed (.ci/run installs it)"
)
def test_report_renders_in_headless_chromium(comparison, tmp_path):
    _, out = comparison
    shot = tmp_path / "page.png"
    command = [
        chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
        "--no-first-run", "--disable-background-networking", "--disable-component-update",
        "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}", "--hide-scrollbars",
        "--window-size=1200,2400", f"--screenshot={shot}", (out / "report.html").as_uri(),
    ]  # fmt: skip
    subprocess.run(command, capture_output=True, timeout=120, check=True)
    pixels = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert pixels.shape[0] > 1000
    assert pixels.std() > 10  # text, tables and figures, not a blank page


def test_holm_matches_statsmodels(rng):
    # statsmodels' multipletests(method="holm") is the reference; ties and values near 1
    from statsmodels.stats.multitest import multipletests

    from predictor.compare import holm

    for size in (1, 2, 7, 16):
        p = np.round(rng.uniform(0, 1, size) ** 3, 3)  # rounding makes ties
        np.testing.assert_allclose(holm(p), multipletests(p, method="holm")[1], rtol=1e-12)


def test_forecast_scans_are_measured_like_the_observed_change(tiny_workspace, tmp_path):
    # A constant velocity translates the baseline (1.6 mm at 2 years on the 4 mm grid): no
    # region changes volume (a rigid motion preserves volume). With observed_change =
    # "registration" the regions with a boundary are measured on the forecast scan as the
    # observed change is (baseline volume x change by registration, whose rigid alignment
    # absorbs the shift); the other regions keep the forecast scan's segmentation volumes.
    from helpers import constant_velocity_model, write_model_folder

    from predictor.compare import baseline_pairs, network_pairs
    from predictor.config import CONFIG_DIR
    from predictor.prepare import PrepareSettings
    from predictor.training import TrainConfig
    from predictor.workspace import read_workspace

    workspace = read_workspace(tiny_workspace)
    settings = PrepareSettings.from_dict(workspace.prepare_settings)
    model = constant_velocity_model(workspace.template, (0.0, 0.0, 0.2),
                                    TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml"),
                                    settings, workspace.regions)  # fmt: skip
    folder = str(write_model_folder(model, tmp_path / "model"))
    first = workspace.volumes["participant_id"].iloc[0]
    pairs = baseline_pairs(workspace.volumes, [first], workspace.regions).head(1)
    pairs = pairs.assign(years=2.0)
    by_segmentation = network_pairs(folder, str(tiny_workspace), pairs, None, True)[0]
    by_registration = network_pairs(folder, str(tiny_workspace), pairs, None, True,
                                    "registration")[0]  # fmt: skip
    baseline = pairs.iloc[0]
    for region in workspace.regions.regions:
        key = f"measured_{region.name}"
        if region.boundary is None:
            assert by_registration[key] == by_segmentation[key], region.name
            continue
        assert abs(by_registration[key] / baseline[region.name] - 1) < 0.01, region.name
    # re-segmenting the shifted scan misreads the small regions (measured when written:
    # hippocampi +4.2% and -2.7% by segmentation, -0.2% and 0.004% by registration)
    hippocampi = [f"measured_hippocampus_{side}" for side in ("left", "right")]
    errors = {
        name: sum(abs(measured[key] / baseline[key.removeprefix("measured_")] - 1)
                  for key in hippocampi)
        for name, measured in (("registration", by_registration),
                               ("segmentation", by_segmentation))
    }  # fmt: skip
    assert errors["registration"] < errors["segmentation"]
