"""A blinded two-alternative reader study of forecast realism: build the page, score answers.

Build: for held-out participants of a model (its test split), each case shows
the baseline and two follow-ups at the same interval, the real one and the
network's forecast, as A and B in a balanced random order. Every image is the
workspace's prepared T1 (bias-corrected, white matter = 1, brain only) in the
baseline's own space and resolution: the real follow-up rigidly registered to
the baseline and resampled once, the forecast the baseline warped once, both
with the forecast's interpolation (``configs/forecast.toml``; cubic B-spline by
default). All three share one intensity window, and A and B are shown inside
the same mask (where both have brain), so neither brain outline gives the other
away. Images are uncompressed PNGs (equal byte lengths for A and B). The page
holds no participant or session name and no answer: the key (which image is the
forecast, with who and when) goes to a separate file with a checksum. The case
draw, the A/B order, the noise and the case names use separate random streams of
the seed, so the A/B order is independent of which cases were drawn.

Known tells, stated in the settings file and the score report: a forecast is the
baseline resampled, so it carries the baseline's noise pattern and interpolation
blur, while a real follow-up has fresh noise. ``match`` can reduce them:
``denoise`` smooths A and B (and the baseline) alike with a light Gaussian
(sigma 0.6 voxel); ``noise`` adds Gaussian noise to the forecast, inside the
brain, of the SD that brings its noise level (median absolute first
difference, a robust estimate; common practice) up to the real follow-up's.

Score: identification accuracy per reader and pooled, with exact
(Clopper-Pearson) 95% CIs and a two-sided binomial test against chance
(scipy's ``binomtest``); agreement between readers on which image is the
forecast (Fleiss' kappa, statsmodels); artefact scores of real against forecast
images over cases (Wilcoxon signed-rank, scipy); diagnosis impressions against
the recorded diagnosis. Readers see the same cases, so the pooled test treats
their answers as independent, which they are not: the per-reader tests are the
ones to quote.
"""

from __future__ import annotations

import base64
import hashlib
import io
import json
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import ndimage, stats

from predictor.cautions import CAUTION
from predictor.errors import DataError
from predictor.files import write_json, write_text, write_tsv

PAGE = "reader_study.html"
KEY = "reader_key.json"
SETTINGS = "reader_settings.json"
SCORES = "reader_scores"
MATCHES = ("none", "denoise", "noise")
DENOISE_SIGMA_VOXELS = 0.6
TELLS = (
    "A forecast is the baseline resampled through a smooth deformation: it carries the "
    "baseline's noise pattern and some interpolation blur, while a real follow-up has fresh "
    "noise, and is resampled once into the baseline's space through a rigid motion with "
    "the same interpolation, which blurs the brain's edge more than the forecast's "
    "near-identity warp does (visible at coarse voxels: on 4 mm phantoms the real "
    "follow-up's brain outline is about 4% more voxels)."
)
INSTRUCTIONS = (
    "Each case shows a baseline scan and two follow-up scans of the same person at the same "
    "interval: one is the real follow-up, the other a computer forecast. Pick the forecast, "
    "score artefacts in each follow-up from 1 (none) to 5 (severe), and give your diagnosis "
    "impression. Your answers stay in this browser until you export them."
)


# --- building -----------------------------------------------------------------------------------
def streams(seed: int) -> dict[str, np.random.Generator]:
    """Independent random streams of a study's seed: cases, sides, noise, names."""
    children = np.random.SeedSequence(seed).spawn(4)
    names = ("cases", "sides", "noise", "names")
    return {name: np.random.default_rng(child) for name, child in zip(names, children,
                                                                      strict=True)}  # fmt: skip


def ab_order(cases: int, rng: np.random.Generator) -> list[str]:
    """Which side (A or B) shows the forecast in each case: half each (the odd one out drawn
    too), in a random order."""
    odd = [str(rng.choice(["A", "B"]))] if cases % 2 else []
    sides = np.array(["A"] * (cases // 2) + ["B"] * (cases // 2) + odd)
    return [str(side) for side in rng.permutation(sides)]


def noise_sd(image: np.ndarray, mask: np.ndarray) -> float:
    """Robust noise SD inside ``mask``: 1.4826 x the median absolute first difference along
    the first axis, divided by sqrt(2) (a difference of two noisy voxels)."""
    difference = np.diff(image, axis=0)[mask[1:] & mask[:-1]]
    if difference.size == 0:
        return 0.0
    spread = np.median(np.abs(difference - np.median(difference)))
    return float(1.4826 * spread / np.sqrt(2.0))


def matched(
    real: np.ndarray, forecast: np.ndarray, baseline: np.ndarray, mask: np.ndarray, match: str,
    rng: np.random.Generator,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, dict]:
    """(real, forecast, baseline) after ``match`` (see the module docstring), and what was
    done."""
    if match == "denoise":
        smooth = [ndimage.gaussian_filter(a, DENOISE_SIGMA_VOXELS) for a in (real, forecast,
                                                                            baseline)]  # fmt: skip
        return *smooth, {"sigma_voxels": DENOISE_SIGMA_VOXELS}
    if match == "noise":
        real_sd, forecast_sd = noise_sd(real, mask), noise_sd(forecast, mask)
        added = float(np.sqrt(max(real_sd**2 - forecast_sd**2, 0.0)))
        inside = mask & (forecast > 0)  # never speckle on background
        noisy = forecast + np.where(inside, rng.normal(0.0, added, forecast.shape), 0.0)
        return real, noisy.astype(forecast.dtype), baseline, {
            "real_noise_sd": real_sd, "forecast_noise_sd": forecast_sd, "added_sd": added
        }
    return real, forecast, baseline, {}


def plane_pictures(volume: np.ndarray, centre, top: float, voxel_mm) -> list[dict]:
    """Axial, coronal and sagittal planes through ``centre`` as PNGs at the scan's own
    resolution, intensity 0-``top`` (shared by every image of a case)."""
    from PIL import Image

    from predictor.figures import PLANE_AXES, PLANE_NAMES, planes

    pictures = []
    for name, plane, (column, row) in zip(PLANE_NAMES, planes(volume, centre), PLANE_AXES,
                                          strict=True):  # fmt: skip
        scaled = np.clip(np.flipud(plane) / top, 0.0, 1.0)
        buffer = io.BytesIO()
        # uncompressed: a compressed size would tell a smooth image from a noisy one
        picture = Image.fromarray(np.round(255 * scaled).astype(np.uint8))
        picture.save(buffer, "PNG", compress_level=0)
        pictures.append({
            "name": name,
            "png": base64.b64encode(buffer.getvalue()).decode(),
            "width_mm": round(plane.shape[1] * float(voxel_mm[column]), 2),
            "height_mm": round(plane.shape[0] * float(voxel_mm[row]), 2),
        })  # fmt: skip
    return pictures


def choose_cases(pairs: pd.DataFrame, cases: int, rng: np.random.Generator) -> pd.DataFrame:
    """``cases`` baseline -> follow-up pairs, spread over participants: a random order of
    participants, each giving its pairs in turn (one per participant per round)."""
    if cases > len(pairs):
        raise DataError(
            f"only {len(pairs)} held-out visit pairs are available; ask for at most that many "
            "cases"
        )
    shuffled = pairs.iloc[rng.permutation(len(pairs))]
    rounds = shuffled.groupby("participant_id").cumcount().to_numpy()
    order = np.argsort(rounds, kind="stable")[:cases]
    return shuffled.iloc[order].reset_index(drop=True)


def build_study(
    model_dir, work, out, cases: int, seed: int = 0, match: str = "none", progress=None
) -> dict:
    """Write the study page, its settings and the answer key into ``out`` (new or empty);
    returns the settings. Cases come from the model's held-out (test) participants."""
    from predictor.compare import baseline_pairs, check_split, prepared_like
    from predictor.forecast import ForecastSettings, as_ensemble, forecast, prepare_for
    from predictor.longitudinal import Visit, aligned_t1
    from predictor.nifti import load_scan
    from predictor.prepare import PrepareSettings, read_prepared
    from predictor.workspace import read_workspace

    if match not in MATCHES:
        raise DataError(f"match must be one of {', '.join(MATCHES)}; '{match}' was given")
    out = Path(out)
    if out.exists() and any(out.iterdir()):
        raise DataError(f"{out}: not empty; give a new folder for the study")
    model = as_ensemble(model_dir)
    lead = model.lead
    workspace = read_workspace(work)
    split = lead.info.split
    check_split(split)
    absent = sorted((set(split["test"]) | set(split["train"])) - set(workspace.volumes[
        "participant_id"]))  # fmt: skip
    if absent:
        raise DataError(f"{work}: the model's participants {', '.join(absent[:5])} are not here")
    covariates = workspace.cohort.covariate_names
    pairs = baseline_pairs(workspace.volumes, split["test"], workspace.regions, covariates)
    draw = streams(seed)
    chosen = choose_cases(pairs, cases, draw["cases"])
    sides = ab_order(len(chosen), draw["sides"])
    layout = workspace.layout
    images = layout.read_cohort().set_index("key")["image"]
    settings = PrepareSettings.from_dict(workspace.prepare_settings).longitudinal
    interpolation = ForecastSettings.from_toml().interpolation  # the forecast's and the real's
    page_cases, key_cases = [], {}
    for number, pair in enumerate(chosen.to_dict("records")):
        scan = load_scan(images.loc[pair["base_key"]])
        if prepared_like(layout, lead):
            prepared = read_prepared(layout.scan(pair["base_key"]), scan, lead.info.region_set)
        else:
            prepared = prepare_for(lead, scan)
        if prepared.native_t1.shape != scan.data.shape:
            raise DataError(f"{images.loc[pair['base_key']]}: its prepared T1 is not on its grid")
        base = replace(scan, data=prepared.native_t1)
        values = {name: pair[name] for name in lead.info.coding.covariate_names}
        result = forecast(model, base, pair["age"], pair["sex"], pair["diagnosis"],
                          [pair["years"]], prepared=prepared, covariates=values)  # fmt: skip
        follow = Visit.read(layout.scan(pair["follow_key"]).folder, workspace.regions)
        real = aligned_t1(Visit.of(prepared), follow, settings, cubic=interpolation == "cubic")
        mask, predicted = prepared.native_t1 > 0, result.horizons[0].image
        top = max(float(np.percentile(prepared.native_t1[mask], 99.5)), 1e-6) if (
            mask.any()) else 1.0  # fmt: skip
        # one outline for A and B: where both show (at least half a display step) before
        # any matching; inside it, nothing darker than that step, so no hole tells either
        step = 0.5 * top / 255
        both = (real >= step) & (predicted >= step)
        real, predicted, baseline, detail = matched(
            real, predicted, prepared.native_t1, mask, match, draw["noise"]
        )
        real, predicted = (np.where(both, np.maximum(image, step), 0.0)
                           for image in (real, predicted))  # fmt: skip
        centre = np.argwhere(mask).mean(axis=0) if mask.any() else np.array(mask.shape) / 2
        pictures = {name: plane_pictures(array, centre, top, scan.voxel_size_mm)
                    for name, array in (("baseline", baseline), ("real", real),
                                        ("forecast", predicted))}  # fmt: skip
        case_id = draw["names"].bytes(5).hex()
        forecast_side = sides[number]
        shown = {forecast_side: pictures["forecast"],
                 "B" if forecast_side == "A" else "A": pictures["real"]}  # fmt: skip
        page_cases.append({  # keys in a fixed order: the order never tells the forecast
            "id": case_id,
            "years": round(float(pair["years"]), 1),
            "baseline": pictures["baseline"],
            "A": shown["A"],
            "B": shown["B"],
        })  # fmt: skip
        key_cases[case_id] = {
            "forecast": forecast_side,
            "participant_id": pair["participant_id"],
            "session_to": pair["session_id"],
            "years": float(pair["years"]),
            "diagnosis": pair["diagnosis"],
        } | ({"match": detail} if detail else {})
        if progress:
            progress()
    # a study is its cases, model, matching and seed: another build has another id
    identity = {"cases": key_cases, "model": model.checksum, "match": match, "seed": seed}
    study = hashlib.sha256(json.dumps(identity, sort_keys=True).encode()).hexdigest()[:16]
    zoom = 260.0 / max(max(p["width_mm"], p["height_mm"]) for c in page_cases
                       for p in c["baseline"])  # fmt: skip
    data = {
        "study": study,
        "caution": CAUTION,
        "instructions": INSTRUCTIONS,
        "diagnoses": [*lead.info.coding.diagnosis_labels, "unsure"],
        "zoom": round(zoom, 4),
        "cases": page_cases,
    }
    setting = {
        "kind": "predictor reader study",
        "study": study,
        "cases": len(page_cases),
        "seed": seed,
        "match": match,
        "known_tells": TELLS,
        "images": "prepared T1 (bias-corrected, white matter = 1, brain only) in the "
        "baseline's own space and resolution; one intensity window per case",
        "model": {"folder": model.folder.name, "weights_sha256": model.checksum},
        "cautions": CAUTION,
    }
    body = {"study": study, "cases": key_cases}
    key = body | {"sha256": hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest()}
    out.mkdir(parents=True, exist_ok=True)
    write_json(out / KEY, key)
    write_json(out / SETTINGS, setting)
    template = _template("study.html")
    write_text(out / PAGE, template.replace("/*DATA*/", json.dumps(data).replace("</", "<\\/")))
    return setting


def _template(name: str) -> str:
    from importlib import resources

    return resources.files("predictor.web").joinpath(name).read_text()


# --- scoring ------------------------------------------------------------------------------------
def read_key(out: Path) -> dict:
    """The answer key of the study in ``out``, its checksum verified."""
    path = Path(out) / KEY
    try:
        key = json.loads(path.read_text())
        body = {"study": key["study"], "cases": key["cases"]}
    except (OSError, ValueError, KeyError, TypeError) as error:
        raise DataError(f"{path}: not a reader-study key ({error})") from None
    if hashlib.sha256(json.dumps(body, sort_keys=True).encode()).hexdigest() != key.get("sha256"):
        raise DataError(f"{path}: the checksum does not match its content; the key was changed")
    return key


def read_answers(path: Path, study: str) -> dict:
    """One reader's exported answers, checked against the study."""
    try:
        answers = json.loads(Path(path).read_text())
        given, rater = answers["answers"], answers["rater"]
    except (OSError, ValueError, KeyError, TypeError) as error:
        raise DataError(f"{path}: not an exported answers file ({error})") from None
    if not isinstance(given, dict) or not isinstance(rater, str) or not all(
        _well_formed(answer) for answer in given.values()
    ):
        raise DataError(f"{path}: not an exported answers file (each answer holds forecast "
                        "A/B, artefacts {A, B} of 1-5 and a diagnosis text, or nulls)")  # fmt: skip
    if answers.get("study") != study:
        raise DataError(f"{path}: answers to study '{answers.get('study')}', not '{study}'")
    return answers


def _well_formed(answer) -> bool:
    if answer is None:
        return True
    if not isinstance(answer, dict) or answer.get("forecast") not in ("A", "B", None):
        return False
    artefacts = answer.get("artefacts") or {}
    scores_ok = isinstance(artefacts, dict) and all(
        v is None or (isinstance(v, int) and not isinstance(v, bool) and 1 <= v <= 5)
        for v in artefacts.values()
    )
    return scores_ok and isinstance(answer.get("diagnosis"), str | None)


def accuracy_row(rater: str, correct: int, total: int) -> dict:
    """Identification accuracy with its exact 95% CI and two-sided test against 0.5."""
    if total == 0:
        return {"rater": rater, "cases": 0, "correct": 0, "accuracy": np.nan,
                "ci_low": np.nan, "ci_high": np.nan, "p_chance": np.nan}  # fmt: skip
    test = stats.binomtest(correct, total, 0.5)
    interval = test.proportion_ci(0.95, method="exact")
    return {"rater": rater, "cases": total, "correct": correct, "accuracy": correct / total,
            "ci_low": interval.low, "ci_high": interval.high, "p_chance": test.pvalue}  # fmt: skip


def fleiss(table: pd.DataFrame) -> float:
    """Fleiss' kappa (statsmodels) of a cases x raters table of categories (no gaps)."""
    from statsmodels.stats.inter_rater import aggregate_raters, fleiss_kappa

    if table.shape[1] < 2 or table.empty:
        return float("nan")
    counts, _ = aggregate_raters(table.to_numpy())
    with np.errstate(divide="ignore", invalid="ignore"):  # all alike: kappa undefined (NaN)
        return float(fleiss_kappa(counts, method="fleiss"))


def score_study(out, answer_files) -> dict:
    """Score every answers file against the key in ``out``; writes reader_scores.tsv,
    .json and .html there and returns the summary."""
    out = Path(out)
    key = read_key(out)
    cases = key["cases"]
    readers = [read_answers(path, key["study"]) for path in answer_files]
    raters = [r["rater"] for r in readers]
    if len(set(raters)) != len(raters):
        raise DataError(f"reader codes repeat: {', '.join(raters)}; one file per reader")
    rows, long = [], []
    for reader in readers:
        given = {case: a for case, a in reader["answers"].items() if case in cases and a}
        unknown = sorted(set(reader["answers"]) - set(cases))
        if unknown:
            raise DataError(f"reader '{reader['rater']}': case '{unknown[0]}' is not in the study")
        for case, answer in given.items():
            truth = cases[case]
            real_side = "B" if truth["forecast"] == "A" else "A"
            artefacts = answer.get("artefacts") or {}
            long.append({
                "rater": reader["rater"], "case": case,
                "picked": answer.get("forecast"),
                "correct": answer.get("forecast") == truth["forecast"],
                "artefact_forecast": artefacts.get(truth["forecast"]),
                "artefact_real": artefacts.get(real_side),
                "diagnosis": answer.get("diagnosis"), "recorded": truth["diagnosis"],
            })  # fmt: skip
    answers = pd.DataFrame(long, columns=["rater", "case", "picked", "correct",
                                          "artefact_forecast", "artefact_real", "diagnosis",
                                          "recorded"])  # fmt: skip
    picked = answers[answers["picked"].isin(["A", "B"])]
    for rater in raters:
        mine = picked[picked["rater"] == rater]
        rows.append(accuracy_row(rater, int(mine["correct"].sum()), len(mine))
                    | {"unanswered": len(cases) - len(mine)})  # fmt: skip
    rows.append(accuracy_row("pooled", int(picked["correct"].sum()), len(picked))
                | {"unanswered": len(cases) * len(raters) - len(picked)})  # fmt: skip
    table = pd.DataFrame(rows)
    choices = picked.pivot(index="case", columns="rater", values="picked").dropna()
    scored = answers.dropna(subset=["artefact_forecast", "artefact_real"])
    per_case = scored.groupby("case")[["artefact_forecast", "artefact_real"]].mean()
    artefacts = {"cases": len(per_case)}
    differs = (per_case["artefact_real"] != per_case["artefact_forecast"]).any()
    if len(per_case) >= 2 and differs:
        # scores are small whole numbers with many ties: a permutation p-value (exact
        # enumeration up to 13 cases, else 9999 seeded resamples), not the tie-free table
        method = stats.PermutationMethod(n_resamples=9999, random_state=0)
        test = stats.wilcoxon(per_case["artefact_real"], per_case["artefact_forecast"],
                              method=method)  # fmt: skip
        artefacts |= {"statistic": float(test.statistic), "p": float(test.pvalue)}
    artefacts |= {"median_real": float(per_case["artefact_real"].median()) if len(per_case)
                  else None, "median_forecast": float(per_case["artefact_forecast"].median())
                  if len(per_case) else None}  # fmt: skip
    impressions = answers.dropna(subset=["diagnosis"])
    impressions = impressions[impressions["diagnosis"] != "unsure"]
    agreement = {
        rater: float((mine["diagnosis"] == mine["recorded"]).mean())
        for rater, mine in impressions.groupby("rater")
    }
    dx = impressions.pivot(index="case", columns="rater", values="diagnosis").dropna()
    try:
        settings = json.loads((out / SETTINGS).read_text()) if (out / SETTINGS).is_file() else {}
    except ValueError as error:
        raise DataError(f"{out / SETTINGS}: not JSON ({error})") from None
    summary = {
        "kind": "predictor reader study scores",
        "study": key["study"],
        "primary": "identification accuracy per reader (chance 0.5; exact binomial test)",
        "accuracy": table.to_dict("records"),
        "fleiss_kappa_choice": fleiss(choices),
        "artefacts_real_vs_forecast": artefacts,
        "diagnosis_agreement_with_recorded": agreement,
        "fleiss_kappa_diagnosis": fleiss(dx),
        "match": settings.get("match"),
        "known_tells": settings.get("known_tells", TELLS),
        "note": "readers share cases, so the pooled test is optimistic; quote the per-reader",
        "cautions": CAUTION,
    }
    write_tsv(out / f"{SCORES}.tsv", table)
    write_json(out / f"{SCORES}.json", _plain(summary))
    write_text(out / f"{SCORES}.html", score_page(summary, table))
    return summary


def _plain(value):
    """``value`` with NaN as None (JSON has no NaN)."""
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_plain(v) for v in value]
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def score_page(summary: dict, table: pd.DataFrame) -> str:
    """A plain HTML summary of the scores (no external resources)."""
    from html import escape

    rows = "".join(
        "<tr>" + "".join(f"<td>{escape(_cell(v))}</td>" for v in row) + "</tr>"
        for row in table.itertuples(index=False)
    )
    head = "".join(f"<th>{escape(c)}</th>" for c in table.columns)
    artefacts = summary["artefacts_real_vs_forecast"]
    return f"""<!doctype html><html lang="en"><head><meta charset="utf-8">
<title>Reader study scores</title></head><body style="font-family: system-ui, sans-serif">
<h1>Reader study: can readers tell forecasts from real follow-ups?</h1>
<p style="background:#fff3d6;padding:0.4rem">{escape(CAUTION)}</p>
<p>Primary: {escape(summary['primary'])}. {escape(summary['note'])}.</p>
<table border="1" cellpadding="4"><tr>{head}</tr>{rows}</table>
<p>Fleiss' kappa of the readers' choices: {_cell(summary['fleiss_kappa_choice'])};
of their diagnosis impressions: {_cell(summary['fleiss_kappa_diagnosis'])}.</p>
<p>Artefact scores (1 none - 5 severe), per case over readers: median real
{_cell(artefacts.get('median_real'))}, forecast {_cell(artefacts.get('median_forecast'))},
Wilcoxon signed-rank p = {_cell(artefacts.get('p'))} over {artefacts['cases']} cases.</p>
<p>Matching of known tells: {escape(str(summary['match']))}. {escape(summary['known_tells'])}</p>
</body></html>
"""


def _cell(value) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "-"
    return f"{value:.3g}" if isinstance(value, float) else str(value)
