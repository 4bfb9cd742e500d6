"""The progression viewer (predictor.viewer) and the reader study (predictor.reader_study),
driven in headless Chromium (Debian's chromium and chromium-driver, through selenium)."""

from __future__ import annotations

import hashlib
import json
import re
import shutil
import time
from itertools import combinations
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from typer.testing import CliRunner

from predictor.cli import app
from predictor.reader_study import (
    KEY,
    PAGE,
    ab_order,
    accuracy_row,
    choose_cases,
    fleiss,
    noise_sd,
    score_study,
    streams,
)

runner = CliRunner()
CHROMIUM, DRIVER = Path("/usr/bin/chromium"), Path("/usr/bin/chromedriver")
EXTERNAL = re.compile(r"(https?:)?//[a-z0-9.-]+\.[a-z]{2,}", re.IGNORECASE)


@pytest.fixture(scope="module")
def browser():
    """Headless Chromium with no network use (the flags keep it from calling out)."""
    webdriver = pytest.importorskip("selenium.webdriver")
    if not (CHROMIUM.is_file() and DRIVER.is_file()):
        pytest.skip("Debian's chromium and chromium-driver are not installed (make installs them)")
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync"):  # fmt: skip
        options.add_argument(flag)
    driver = webdriver.Chrome(service=Service(str(DRIVER)), options=options)
    yield driver
    driver.quit()


def opened(driver, page: Path):
    """Open ``page`` and wait until its script marks it ready (10 s at most)."""
    driver.get(page.resolve().as_uri())
    for _ in range(200):
        if driver.execute_script("return document.body.dataset.ready") == "1":
            return driver
        time.sleep(0.05)
    raise AssertionError(f"{page.name} never became ready")


@pytest.fixture(scope="module")
def forecast_folder(tiny_model, tiny_workspace, tmp_path_factory):
    """One tiny scan forecast at 1 and 3 years (viewer and GIF written beside it)."""
    from predictor.forecast_io import forecast_one
    from predictor.workspace import Layout

    row = Layout(tiny_workspace).read_cohort().iloc[0]
    out = tmp_path_factory.mktemp("viewer")
    forecast_one(tiny_model, row["image"], row["age"], row["sex"], row["diagnosis"], [1.0, 3.0],
                 out)  # fmt: skip
    return out, Path(row["image"])


def test_viewer_opens_offline_and_its_horizon_slider_changes_the_frame(browser, forecast_folder):
    from PIL import Image

    out, _ = forecast_folder
    (page,) = out.glob("*_desc-forecast_viewer.html")
    text = page.read_text()
    assert not EXTERNAL.search(text), EXTERNAL.search(text)  # nothing fetched from outside
    assert "Research use only" in text
    driver = opened(browser, page)
    assert driver.execute_script("return document.getElementById('horizon').max") == "2"
    before = driver.execute_script("return document.getElementById('axial').toDataURL()")
    driver.execute_script(
        "const h = document.getElementById('horizon'); h.value = '2';"
        "h.dispatchEvent(new Event('input'));"
    )
    assert driver.execute_script("return document.body.dataset.frame") == "2"
    assert driver.find_element("id", "horizon-label").text == "+3 years"
    after = driver.execute_script("return document.getElementById('axial').toDataURL()")
    assert after != before
    driver.find_element("css selector", "input[value=jacobian]").click()
    assert "log volume ratio" in driver.find_element("id", "legend-unit").text
    assert driver.get_log("browser") == []  # no script error
    (gif,) = out.glob("*_desc-forecast_progression.gif")
    assert Image.open(gif).n_frames == 3  # baseline and two horizons


def test_view_rebuilds_the_viewer_of_an_earlier_forecast(forecast_folder, tmp_path):
    out, image = forecast_folder
    copy = tmp_path / "old"
    shutil.copytree(out, copy)
    for page in copy.glob("*_viewer.html"):
        page.unlink()
    result = runner.invoke(app, ["view", str(copy), "--scan", str(image)])
    assert result.exit_code == 0, result.output
    assert len(list(copy.glob("*_viewer.html"))) == 1
    other = tmp_path / "other.nii.gz"
    other.write_bytes(image.read_bytes() + b"\0")
    wrong = runner.invoke(app, ["view", str(copy), "--scan", str(other)])
    assert wrong.exit_code == 2 and "no forecast of other.nii.gz" in wrong.output
    absent = runner.invoke(app, ["view", str(copy), "--scan", str(tmp_path / "none.nii.gz")])
    assert absent.exit_code == 2 and "Traceback" not in absent.output


def test_ab_order_is_balanced_and_independent_of_the_case_draw():
    """Over 200 cases the forecast is on A half the time (scipy binomtest, 5%), and when
    every pair is drawn the side does not follow the pairs' order (their participant order):
    over 100 seeds the share of cases on A among the first half of the table is about half
    and never all."""
    import pandas as pd

    sides = ab_order(200, streams(7)["sides"])
    assert stats.binomtest(sides.count("A"), 200, 0.5).pvalue > 0.05
    assert sides == ab_order(200, streams(7)["sides"]) != ab_order(200, streams(8)["sides"])
    pairs = pd.DataFrame({"participant_id": [f"sub-{k:02d}" for k in range(20)]})
    shares = []
    for seed in range(100):
        draw = streams(seed)
        chosen = choose_cases(pairs, 20, draw["cases"])
        order = dict(zip(chosen["participant_id"], ab_order(20, draw["sides"]), strict=True))
        shares.append(np.mean([order[f"sub-{k:02d}"] == "A" for k in range(10)]))
    assert max(shares) < 1 and abs(np.mean(shares) - 0.5) < 0.05


def test_noise_estimate_of_pure_noise():
    """The median-absolute-difference estimate recovers the SD of Gaussian noise (5%)."""
    rng = np.random.default_rng(3)
    image = 50 + rng.normal(0, 2.0, (40, 40, 40))
    assert noise_sd(image, np.ones(image.shape, bool)) == pytest.approx(2.0, rel=0.05)


def fleiss_by_hand(table: np.ndarray) -> float:
    """Fleiss (1971): items x categories counts, n raters each."""
    n = table.sum(axis=1)[0]
    p = table.sum(axis=0) / table.sum()
    agreement = ((table**2).sum(axis=1) - n) / (n * (n - 1))
    return (agreement.mean() - (p**2).sum()) / (1 - (p**2).sum())


def shown_pixels(plane: dict) -> np.ndarray:
    """The grey values of one plane's PNG in the study page."""
    import base64
    import io

    from PIL import Image

    return np.asarray(Image.open(io.BytesIO(base64.b64decode(plane["png"]))))


def write_key(folder: Path, cases: dict) -> None:
    body = {"study": "s1", "cases": cases}
    key = body | {"sha256": hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()}
    (folder / KEY).write_text(json.dumps(key))


def test_artefact_test_with_ties_matches_the_full_permutation_distribution(tmp_path):
    """16 cases of tied whole-number differences: the score's Wilcoxon p (9999 seeded sign
    flips) within 0.01 of the exact p from all 2^16 sign flips of the signed-rank statistic
    with midranks (Wilcoxon 1945; ties share their mean rank), counted by hand here."""
    from scipy.stats import rankdata

    differences = np.array([2, 2, 1, 1, 1, 1, -1, 1, 2, 1, -1, 1, 1, 2, 1, 3])  # real - forecast
    cases = {f"c{k}": {"forecast": "A", "participant_id": f"sub-{k}", "session_to": "ses-02",
                       "years": 2.0, "diagnosis": "CN"} for k in range(16)}  # fmt: skip
    write_key(tmp_path, cases)
    answers = {f"c{k}": {"forecast": "A", "artefacts": {"A": 1, "B": 1 + int(d)} if d > 0
                         else {"A": 1 - int(d), "B": 1}, "diagnosis": None}
               for k, d in enumerate(differences)}  # fmt: skip
    path = tmp_path / "r1.json"
    path.write_text(json.dumps({"study": "s1", "rater": "r1", "answers": answers}))
    p = score_study(tmp_path, [path])["artefacts_real_vs_forecast"]["p"]
    ranks = rankdata(np.abs(differences))
    observed = ranks[differences > 0].sum()
    signs = (np.arange(2**16)[:, None] >> np.arange(16)) & 1
    statistics = signs @ ranks
    centre = ranks.sum() / 2
    exact = np.mean(np.abs(statistics - centre) >= abs(observed - centre) - 1e-9)
    assert p == pytest.approx(exact, abs=0.01)


def test_one_case_and_malformed_answers(tmp_path):
    cases = {"c0": {"forecast": "B", "participant_id": "sub-1", "session_to": "ses-02",
                    "years": 2.0, "diagnosis": "AD"}}  # fmt: skip
    write_key(tmp_path, cases)
    path = tmp_path / "r1.json"
    answer = {"forecast": "B", "artefacts": {"A": 2, "B": 3}, "diagnosis": "AD"}
    path.write_text(json.dumps({"study": "s1", "rater": "r1", "answers": {"c0": answer}}))
    summary = score_study(tmp_path, [path])  # one case: no Wilcoxon test, no crash
    assert summary["accuracy"][0]["correct"] == 1 and "p" not in summary[
        "artefacts_real_vs_forecast"]  # fmt: skip
    for broken in ({"forecast": "B", "artefacts": [1, 2]}, {"forecast": "C"},
                   {"forecast": "A", "artefacts": {"A": "x"}}):  # fmt: skip
        path.write_text(json.dumps({"study": "s1", "rater": "r1", "answers": {"c0": broken}}))
        result = runner.invoke(app, ["reader-study", "score", str(tmp_path), str(path)])
        assert result.exit_code == 2 and "not an exported answers file" in result.output


def test_scores_match_scipy_and_statsmodels_on_hand_cases(tmp_path):
    """Three readers, ten cases: accuracy, exact CI and p from scipy's binomtest (and 8/10's
    two-sided p by hand, 2 x 56 / 1024); kappa from the Fleiss (1971) formula by hand and
    statsmodels; Wilcoxon from scipy."""
    import pandas as pd

    cases = {f"c{k}": {"forecast": "A" if k % 2 else "B", "participant_id": f"sub-{k}",
                       "session_to": "ses-02", "years": 2.0, "diagnosis": "AD"}
             for k in range(10)}  # fmt: skip
    body = {"study": "s1", "cases": cases}
    key = body | {"sha256": hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()}
    (tmp_path / KEY).write_text(json.dumps(key))
    wrong = {"A": "B", "B": "A"}
    right = [8, 6, 5]
    files = []
    for reader, hits in zip(("r1", "r2", "r3"), right, strict=True):
        answers = {}
        for k, (case, truth) in enumerate(cases.items()):
            side = truth["forecast"] if k < hits else wrong[truth["forecast"]]
            other = wrong[truth["forecast"]]
            answers[case] = {"forecast": side, "artefacts": {truth["forecast"]: 3, other: 1},
                             "diagnosis": "AD" if k < 7 else "CN"}  # fmt: skip
        path = tmp_path / f"{reader}.json"
        path.write_text(json.dumps({"study": "s1", "rater": reader, "answers": answers}))
        files.append(path)
    summary = score_study(tmp_path, files)
    rows = {row["rater"]: row for row in summary["accuracy"]}
    assert rows["r1"]["p_chance"] == pytest.approx(2 * 56 / 1024)
    pooled = stats.binomtest(19, 30, 0.5)
    assert rows["pooled"]["p_chance"] == pytest.approx(pooled.pvalue)
    assert rows["pooled"]["ci_low"] == pytest.approx(pooled.proportion_ci(method="exact").low)
    picked = pd.DataFrame(
        {r: [(cases[c]["forecast"] if k < h else wrong[cases[c]["forecast"]]) for k, c in
             enumerate(cases)] for r, h in zip(("r1", "r2", "r3"), right, strict=True)}
    )  # fmt: skip
    counts = np.stack([(picked == side).sum(axis=1) for side in ("A", "B")], axis=1)
    assert summary["fleiss_kappa_choice"] == pytest.approx(fleiss_by_hand(counts))
    assert fleiss(picked) == pytest.approx(fleiss_by_hand(counts))
    artefacts = summary["artefacts_real_vs_forecast"]
    assert artefacts["median_real"] == 1 and artefacts["median_forecast"] == 3
    assert artefacts["p"] == pytest.approx(2 / 2**10)  # every sign alike: 2 of 2^10 flips
    assert summary["diagnosis_agreement_with_recorded"]["r1"] == pytest.approx(0.7)
    assert (tmp_path / "reader_scores.html").is_file() and accuracy_row("x", 0, 0)["cases"] == 0
    (tmp_path / "broken.json").write_text(json.dumps({"study": "s1", "rater": "x",
                                                       "answers": []}))  # fmt: skip
    result = runner.invoke(app, ["reader-study", "score", str(tmp_path),
                                 str(tmp_path / "broken.json")])  # fmt: skip
    assert result.exit_code == 2 and "not an exported answers file" in result.output
    tampered = dict(key, cases={**cases, "c0": {**cases["c0"], "forecast": "A"}})
    (tmp_path / KEY).write_text(json.dumps(tampered))
    result = runner.invoke(app, ["reader-study", "score", str(tmp_path), str(files[0])])
    assert result.exit_code == 2 and "checksum does not match" in result.output


def test_reader_study_page_is_blind_and_answers_round_trip(
    browser, tiny_model, tiny_workspace, tmp_path
):
    """Build three cases, answer them in the browser, export, and score the export."""
    out = tmp_path / "study"
    result = runner.invoke(app, ["reader-study", "build", str(tiny_model), str(tiny_workspace),
                                 str(out), "--cases", "3", "--match", "noise"])  # fmt: skip
    assert result.exit_code == 0, result.output
    page, key = (out / PAGE).read_text(), json.loads((out / KEY).read_text())
    assert not EXTERNAL.search(page) and "Research use only" in page
    assert key["sha256"] not in page
    data = json.loads(re.search(r'id="study-data" type="application/json">(.*?)</script>',
                                page, re.DOTALL)[1])  # fmt: skip
    for shown in data["cases"]:  # A and B alike: nothing but the images says which is which
        assert list(shown) == ["id", "years", "baseline", "A", "B"]  # order too
        assert [(p["name"], len(p["png"])) for p in shown["A"]] == [
            (p["name"], len(p["png"])) for p in shown["B"]]  # fmt: skip
        for a, b in zip(shown["A"], shown["B"], strict=True):  # one outline, no holes
            assert np.array_equal(shown_pixels(a) > 0, shown_pixels(b) > 0)
    for case in key["cases"].values():
        assert case["participant_id"] not in page and case["session_to"] not in page
    driver = opened(browser, out / PAGE)
    driver.find_element("id", "pick-A").click()
    driver.find_element("id", "next").click()  # no reader code yet: nothing moves
    assert "reader code first" in driver.find_element("id", "status").text
    assert driver.execute_script("return document.body.dataset.case") == "0"
    driver.find_element("id", "rater").send_keys("reader-1")
    driver.execute_script("document.getElementById('rater').dispatchEvent(new Event('change'))")
    kept = driver.execute_script(
        "return JSON.parse(localStorage.getItem(`reading-${STUDY.study}-reader-reader-1`))"
        ".answers[STUDY.cases[0].id].forecast"
    )
    assert kept == "A"  # the first code keeps the answer on screen
    for _ in range(3):
        driver.find_element("id", "pick-A").click()
        for side, score in (("A", "2"), ("B", "1")):
            driver.execute_script(
                f"document.getElementById('artefact-{side}').value = '{score}'"
            )
        driver.execute_script("document.getElementById('diagnosis').value = 'CN'")
        driver.find_element("id", "next").click()
    driver.find_element("id", "export").click()
    exported = json.loads(driver.find_element("id", "exported").get_attribute("value"))
    assert exported["rater"] == "reader-1" and len(exported["answers"]) == 3
    answers = tmp_path / "reader-1.json"
    answers.write_text(json.dumps(exported))
    scored = runner.invoke(app, ["reader-study", "score", str(out), str(answers)])
    assert scored.exit_code == 0, scored.output
    summary = json.loads((out / "reader_scores.json").read_text())
    expected = sum(case["forecast"] == "A" for case in key["cases"].values())
    assert summary["accuracy"][0]["correct"] == expected and summary["match"] == "noise"
    again = opened(browser, out / PAGE)  # progress is kept in the browser, per reader
    assert "3 of 3 cases answered" in again.find_element("id", "status").text
    code = again.find_element("id", "rater")
    code.clear()
    code.send_keys("reader-2")
    again.execute_script("document.getElementById('rater').dispatchEvent(new Event('change'))")
    assert "0 of 3 cases answered" in again.find_element("id", "status").text


def test_pairs_of_readers_agree_with_the_fleiss_formula():
    """statsmodels' Fleiss' kappa of two readers against the formula, on every pair."""
    import pandas as pd

    rng = np.random.default_rng(5)
    picks = pd.DataFrame({f"r{k}": rng.choice(["A", "B"], 12) for k in range(3)})
    for first, second in combinations(picks.columns, 2):
        two = picks[[first, second]]
        counts = np.stack([(two == side).sum(axis=1) for side in ("A", "B")], axis=1)
        assert fleiss(two) == pytest.approx(fleiss_by_hand(counts))


def test_page_volumes_are_block_means_like_scikit_image():
    """The page's shrunk volumes equal scikit-image's block_reduce(mean) on whole blocks."""
    from skimage.measure import block_reduce

    from predictor.viewer import MAX_SIDE, block_size, shrink

    volume = np.random.default_rng(2).normal(size=(2 * MAX_SIDE + 3, 3 * MAX_SIDE - 1, 30))
    block = block_size(volume.shape)
    assert block == (3, 3, 1) and max(shrink(volume, block).shape) <= MAX_SIDE  # thin slices
    whole = volume[: 3 * (volume.shape[0] // 3), : 3 * (volume.shape[1] // 3)]
    np.testing.assert_allclose(shrink(volume, block), block_reduce(whole, block, np.mean),
                               atol=1e-5)  # fmt: skip
