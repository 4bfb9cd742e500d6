"""Reliability under faults and bad input: every stage, tried with what breaks tools.

Counts for the record (each a test or a parametrized case below): bad scans
tried in a cohort, fault injections (kill -9 of prepare, train and forecast,
concurrent runs, a full disk), damaged model folders, and the privacy sweep.
"""

from __future__ import annotations

import errno
import gzip
import json
import os
import pickle
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
import torch

from predictor.config import CONFIG_DIR
from predictor.errors import ModelError, OutputError
from predictor.forecast import forecast
from predictor.forecast_io import PROVENANCE, forecast_cohort, forecast_one
from predictor.modelstore import CHECKPOINT, MODEL_JSON, WEIGHTS, load_model, load_tensors
from predictor.pairs import ScanStore
from predictor.phantoms.generate import TEMPLATE
from predictor.prepare import PrepareSettings, prepare_cohort, workspace_volumes
from predictor.training import TrainConfig, train

SETTINGS = PrepareSettings.from_toml(grid_mm=4.0, longitudinal={"demons": False})  # as fast
PYTHON_CLI = [sys.executable, "-m", "predictor.cli"]


def bids(tiny_workspace: Path) -> Path:
    return tiny_workspace.parent / "bids"


def cohort_rows(tiny_workspace: Path, participants) -> pd.DataFrame:
    cohort = pd.read_csv(tiny_workspace / "cohort.tsv", sep="\t").drop(columns="key")
    cohort["brain_mask"] = ""  # the phantoms come without masks
    return cohort[cohort.participant_id.isin(participants)].reset_index(drop=True)


# --- bad scans inside a cohort ---------------------------------------------------------------
def _good(tiny_workspace):
    return nib.load(cohort_rows(tiny_workspace, ["sub-001"]).image[0])


def _save(image, path):
    nib.save(image, path)
    return path


def _raw_header_edit(path, offset, value: bytes):
    raw = bytearray(path.read_bytes())
    raw[offset : offset + len(value)] = value
    path.write_bytes(bytes(raw))
    return path


def _image(good, folder, name, data=None, affine=None):
    data = good.get_fdata() if data is None else data
    affine = good.affine if affine is None else affine
    return _save(nib.Nifti1Image(data, affine), folder / name)


def _truncated(good, folder):
    raw = good.to_bytes()
    (folder / "truncated.nii.gz").write_bytes(gzip.compress(raw[: len(raw) // 3]))
    return folder / "truncated.nii.gz"


def _singular(good, folder):
    image = nib.Nifti1Image(good.get_fdata(), None)
    image.header.set_sform(np.diag([4.0, 4.0, 0.0, 1.0]), code=1)
    return _save(image, folder / "singular.nii.gz")


def _with(good, value):
    data = good.get_fdata()
    return np.where(data > 500, value, data)


BAD_SCANS = {
    # name: (builder(good image, folder) -> path, words expected in the reason)
    "truncated": (_truncated, "truncated|unreadable|not a readable"),
    "wrong-magic": (
        lambda good, d: _raw_header_edit(_save(good, d / "magic.nii"), 344, b"zz1\x00"),
        "not a readable",
    ),
    "dims-disagree": (  # dim[1] says 400 voxels along x, far more than the file holds
        lambda good, d: _raw_header_edit(_save(good, d / "dims.nii"), 42, np.int16(400).tobytes()),
        "truncated|unreadable|not a readable",
    ),
    "2d": (lambda good, d: _image(good, d, "flat.nii.gz", good.get_fdata()[:, :, 10]), "2D"),
    "5d": (
        lambda good, d: _image(
            good, d, "five.nii.gz", good.get_fdata()[..., None, None].repeat(2, 4)
        ),
        "5D|volumes",
    ),
    "nan": (lambda good, d: _image(good, d, "nan.nii.gz", _with(good, np.nan)), "NaN or infinite"),
    "inf": (lambda good, d: _image(good, d, "inf.nii.gz", _with(good, np.inf)), "NaN or infinite"),
    "singular-affine": (_singular, "singular"),
    "non-finite-affine": (  # srow_x[0] = NaN
        lambda good, d: _raw_header_edit(
            _save(good, d / "nonfinite.nii"), 280, np.float32(np.nan).tobytes()
        ),
        "non-finite|singular|not a readable",
    ),
    "voxels-0.01mm": (
        lambda good, d: _image(good, d, "small.nii.gz", affine=np.diag([0.01] * 3 + [1.0])),
        "voxel size",
    ),
    "voxels-50mm": (
        lambda good, d: _image(good, d, "large.nii.gz", affine=np.diag([50.0] * 3 + [1.0])),
        "voxel size",
    ),
    "empty": (
        lambda good, d: _image(good, d, "empty.nii.gz", np.zeros(good.shape)),
        "empty or constant",
    ),
    "constant": (
        lambda good, d: _image(good, d, "constant.nii.gz", np.full(good.shape, 7.0)),
        "empty or constant",
    ),
}


def test_bad_scans_are_listed_with_their_reason_and_the_others_go_on(tiny_workspace, tmp_path):
    good = _good(tiny_workspace)
    rows = cohort_rows(tiny_workspace, ["sub-001"]).iloc[:2]
    table = [rows]
    expected = {}
    for number, (name, (build, words)) in enumerate(BAD_SCANS.items()):
        path = build(good, tmp_path)
        expected[name] = (path.name, words)
        table.append(rows.iloc[:1].assign(participant_id=f"bad-{number:02d}", image=str(path)))
    # a brain mask of another shape than its scan
    small = np.zeros((5, 6, 7))
    small[1:4, 1:5, 1:6] = 1
    mask = _save(nib.Nifti1Image(small, good.affine), tmp_path / "mask.nii.gz")
    table.append(rows.iloc[:1].assign(participant_id="bad-mask", brain_mask=str(mask)))
    expected["mask-shape"] = (rows.image[0].split("/")[-1], "brain mask shape")
    cohort = pd.concat(table, ignore_index=True)
    summary = prepare_cohort(cohort, tmp_path / "work", bids(tiny_workspace) / TEMPLATE, SETTINGS)
    assert summary["failed"] == len(expected) == 14
    assert summary["prepared"] + summary["cached"] == 2  # the good scans went on
    failures = pd.read_csv(tmp_path / "work" / "failures.tsv", sep="\t")
    reasons = dict(zip(failures.participant_id, failures.reason, strict=True))
    for number, name in enumerate(BAD_SCANS):
        reason = reasons[f"bad-{number:02d}"]
        assert pd.Series([reason]).str.contains(expected[name][1]).all(), (name, reason)
        assert str(tmp_path) not in reason
    assert "brain mask shape" in reasons["bad-mask"]


# --- kill -9 and concurrency -------------------------------------------------------------------
def _kill_when(process, ready, rng, limit=300):
    """SIGKILL ``process`` (its whole group) at a random moment after ``ready()`` holds."""
    deadline = time.time() + limit
    while time.time() < deadline and not ready():
        if process.poll() is not None:
            raise AssertionError("the process ended before it could be killed")
        time.sleep(0.05)
    time.sleep(float(rng.uniform(0.0, 1.5)))
    os.killpg(process.pid, signal.SIGKILL)
    process.wait()


def _tiny_config(tmp_path, pairs=8) -> Path:
    raw = TrainConfig.from_toml(CONFIG_DIR / "train-tiny.toml").to_dict()
    raw["training"]["max_pairs_per_epoch"] = pairs
    lines = []
    for name, table in raw.items():
        lines.append(f"[{name}]")
        for key, value in table.items():
            text = json.dumps(list(value) if isinstance(value, tuple) else value)
            lines.append(f"{key} = {text}")
    path = tmp_path / "tiny.toml"
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.mark.slow
def test_killed_training_resumes_to_bitwise_equal_weights(tiny_workspace, tmp_path, rng):
    config = _tiny_config(tmp_path)
    straight = tmp_path / "straight"
    train(tiny_workspace, straight, TrainConfig.from_toml(config), epochs=4)
    killed = tmp_path / "killed"
    command = [*PYTHON_CLI, "train", str(tiny_workspace), str(killed), "--config", str(config)]
    process = subprocess.Popen(
        [*command, "--epochs", "4"], start_new_session=True,
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )  # fmt: skip
    _kill_when(process, lambda: (killed / CHECKPOINT).is_file(), rng)
    epochs_done = len(load_tensors(killed / CHECKPOINT)["history"])
    assert 1 <= epochs_done < 4
    resumed = subprocess.run(
        [*command, "--epochs", "4", "--resume"], capture_output=True, text=True
    )
    assert resumed.returncode == 0, resumed.stderr[-1500:]
    for name in (WEIGHTS, CHECKPOINT):
        a, b = load_tensors(straight / name), load_tensors(killed / name)
        a, b = (x["model"] if name == CHECKPOINT else x for x in (a, b))
        assert all(torch.equal(a[key], b[key]) for key in a), name


@pytest.mark.slow
def test_killed_cohort_forecast_reruns_to_identical_outputs(
    tiny_model, tiny_workspace, tmp_path, rng
):
    rows = cohort_rows(tiny_workspace, ["sub-001", "sub-002", "sub-003", "sub-004"])
    table = tmp_path / "cohort.tsv"
    rows.to_csv(table, sep="\t", index=False)
    reference = tmp_path / "reference"
    forecast_cohort(tiny_model, rows, reference, [1, 3])
    out = tmp_path / "killed"
    command = [*PYTHON_CLI, "forecast", str(tiny_model), "--cohort", str(table), "--out", str(out),
               "--years", "1", "--years", "3", "--allow-outside"]  # fmt: skip
    process = subprocess.Popen(
        command, start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    _kill_when(process, lambda: any(out.rglob(f"*{PROVENANCE}")), rng)
    complete = len(list(out.rglob(f"*{PROVENANCE}")))
    assert 1 <= complete < 4
    rerun = subprocess.run(command, capture_output=True, text=True)
    assert rerun.returncode == 0, rerun.stderr[-1500:]
    assert f"{complete} already complete" in rerun.stdout
    for path in reference.rglob("*"):
        if path.suffix == ".tsv" or path.name.endswith(".nii.gz"):
            twin = out / path.relative_to(reference)
            if path.suffix == ".tsv":
                assert twin.read_bytes() == path.read_bytes(), path.name
            else:
                np.testing.assert_array_equal(nib.load(twin).dataobj, nib.load(path).dataobj)


@pytest.mark.slow
def test_two_prepare_runs_on_one_workspace_both_finish(tiny_workspace, tmp_path):
    rows = cohort_rows(tiny_workspace, ["sub-005", "sub-006"])
    table = tmp_path / "cohort.tsv"
    rows.to_csv(table, sep="\t", index=False)
    work = tmp_path / "work"
    command = [*PYTHON_CLI, "prepare", str(table), str(work), "--grid-mm", "4", "--template",
               str(bids(tiny_workspace) / TEMPLATE), "--allow-outside"]  # fmt: skip
    runs = [subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
            for _ in range(2)]  # fmt: skip
    outputs = [run.communicate(timeout=600) for run in runs]
    assert [run.returncode for run in runs] == [0, 0], outputs
    done = [int(out.split(" prepared")[0].split()[-1]) for out, _ in outputs]
    assert sum(done) == len(rows)  # every scan prepared once; the other run took it from cache
    single = prepare_cohort(rows, tmp_path / "single", bids(tiny_workspace) / TEMPLATE, SETTINGS)
    assert single["prepared"] == len(rows)
    pd.testing.assert_frame_equal(workspace_volumes(work), workspace_volumes(tmp_path / "single"))


@pytest.mark.slow
def test_two_forecast_runs_into_one_folder_both_finish(tiny_model, tiny_workspace, tmp_path):
    rows = cohort_rows(tiny_workspace, ["sub-007", "sub-008"])
    table = tmp_path / "cohort.tsv"
    rows.to_csv(table, sep="\t", index=False)
    command = [*PYTHON_CLI, "forecast", str(tiny_model), "--cohort", str(table), "--out",
               str(tmp_path / "out"), "--years", "2", "--allow-outside"]  # fmt: skip
    runs = [subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
            for _ in range(2)]  # fmt: skip
    outputs = [run.communicate(timeout=600) for run in runs]
    assert [run.returncode for run in runs] == [0, 0], outputs
    table = pd.read_csv(tmp_path / "out" / "forecasts.tsv", sep="\t")
    assert set(table.participant_id) == {"sub-007", "sub-008"}
    for path in (tmp_path / "out").rglob("*.nii.gz"):
        assert np.isfinite(np.asarray(nib.load(path).dataobj)).all()


# --- damaged model folders -------------------------------------------------------------------
class Payload:
    """A pickled object that would create a file if it were ever unpickled."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (Path(self.marker),))


def _damaged(tiny_model, tmp_path, damage):
    folder = tmp_path / "model"
    shutil.copytree(tiny_model, folder)
    damage(folder)
    return folder


def _fix_checksum(folder):
    from predictor.files import sha256_file

    info = json.loads((folder / MODEL_JSON).read_text())
    info["weights_sha256"] = sha256_file(folder / WEIGHTS)
    (folder / MODEL_JSON).write_text(json.dumps(info))


def _truncate(folder):
    data = (folder / WEIGHTS).read_bytes()
    (folder / WEIGHTS).write_bytes(data[: len(data) // 2])


def _truncate_and_fix(folder):
    _truncate(folder)
    _fix_checksum(folder)


def _tamper(folder):
    data = bytearray((folder / WEIGHTS).read_bytes())
    data[-200] ^= 0xFF
    (folder / WEIGHTS).write_bytes(bytes(data))


def _json_mismatch(folder):
    info = json.loads((folder / MODEL_JSON).read_text())
    info["config"]["network"]["channels"] = [4, 8, 16]
    (folder / MODEL_JSON).write_text(json.dumps(info))


def _other_regions(folder):
    info = json.loads((folder / MODEL_JSON).read_text())
    info["regions"] = ["amygdala"]
    (folder / MODEL_JSON).write_text(json.dumps(info))


def _newer_schema(folder):
    info = json.loads((folder / MODEL_JSON).read_text())
    info["schema"] = 99
    (folder / MODEL_JSON).write_text(json.dumps(info))


def _bad_json(folder):
    (folder / MODEL_JSON).write_text("{not json")


@pytest.mark.parametrize(
    ("damage", "message"),
    [
        (_truncate, "does not match model.json"),
        (_truncate_and_fix, "unreadable or truncated"),
        (_tamper, "does not match model.json"),
        (_json_mismatch, "does not fit the network"),
        (_other_regions, "the regions must be a table"),
        (_newer_schema, "model schema 99 is not this version's 2"),
        (_bad_json, "not valid JSON"),
        (lambda folder: (folder / WEIGHTS).unlink(), "file not found"),
    ],
    ids=["truncated", "truncated-checksum-fixed", "tampered", "json-mismatch", "regions",
         "newer-schema", "bad-json", "missing-weights"],
)  # fmt: skip
def test_damaged_model_folders_are_clear_errors(stand_in_model, tmp_path, damage, message):
    assert load_model(stand_in_model).info.schema == 2  # the undamaged folder loads
    folder = _damaged(stand_in_model, tmp_path, damage)
    with pytest.raises(ModelError, match=message):
        load_model(folder)


def test_pickled_payload_is_refused_never_executed(stand_in_model, tmp_path):
    marker = tmp_path / "executed"

    def plant(folder):
        with open(folder / WEIGHTS, "wb") as stream:
            pickle.dump({"weight": Payload(marker)}, stream)
        _fix_checksum(folder)
        torch.save({"model": Payload(marker)}, folder / CHECKPOINT)

    folder = _damaged(stand_in_model, tmp_path, plant)
    with pytest.raises(ModelError, match="refused"):
        load_model(folder)
    with pytest.raises(ModelError, match="refused"):
        load_tensors(folder / CHECKPOINT)
    assert not marker.exists()


def test_model_of_another_grid_is_refused(tiny_model, tiny_workspace):
    from helpers import constant_velocity_model

    other = constant_velocity_model(
        template=str(bids(tiny_workspace) / TEMPLATE), settings=PrepareSettings.from_toml()
    )  # a 3 mm grid; the tiny workspace (and model) use 4 mm
    row = cohort_rows(tiny_workspace, ["sub-001"]).iloc[0]
    from predictor.forecast import prepare_for
    from predictor.nifti import load_scan

    prepared = prepare_for(load_model(tiny_model), load_scan(row.image))
    with pytest.raises(ModelError, match="another working grid"):
        forecast(other, row.image, row.age, row.sex, row.diagnosis, [1], prepared=prepared)


# --- resources ---------------------------------------------------------------------------------
def test_full_disk_keeps_previous_outputs_and_says_so(tiny_model, tiny_workspace, tmp_path,
                                                      monkeypatch):  # fmt: skip
    row = cohort_rows(tiny_workspace, ["sub-001"]).iloc[0]
    out = tmp_path / "out"
    forecast_one(tiny_model, row.image, row.age, row.sex, row.diagnosis, [1], out)
    before = {p: p.read_bytes() for p in out.rglob("*") if p.is_file()}

    def full(image, path):
        with open(path, "wb") as stream:
            stream.write(b"partial")
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(nib, "save", full)
    with pytest.raises(OutputError, match="disk full while writing; the previous file"):
        forecast_one(tiny_model, row.image, row.age, row.sex, row.diagnosis, [1, 2], out)
    after = {p: p.read_bytes() for p in out.rglob("*") if p.is_file() and ".lock" not in p.name}
    assert {p: b for p, b in before.items() if ".lock" not in p.name} == after


def test_scan_store_keeps_at_most_its_capacity(tiny_workspace):
    volumes = pd.read_csv(tiny_workspace / "volumes.tsv", sep="\t", dtype={"key": str})
    store = ScanStore(tiny_workspace, capacity=5)
    for key in volumes.key[:20]:
        store[key]
    assert len(store._cache) == 5


# --- privacy -------------------------------------------------------------------------------
@pytest.mark.slow
def test_no_output_carries_header_text_or_absolute_paths(tiny_model, tiny_workspace, tmp_path):
    from typer.testing import CliRunner

    from predictor.cli import app, expand_lists

    secret = "Jane Roe born 1950-01-01"
    folder = tmp_path / "private_site_name"
    folder.mkdir()
    rows = cohort_rows(tiny_workspace, ["sub-002"])
    for index, path in enumerate(rows.image):
        image = nib.load(path)
        image.header["descrip"] = secret.encode()
        image.header["aux_file"] = b"ward-7"
        target = folder / Path(path).name
        nib.save(image, target)
        rows.loc[index, "image"] = target.name
    (folder / "cohort.tsv").write_text(rows.to_csv(sep="\t", index=False))
    runner = CliRunner()
    work, out = tmp_path / "w", tmp_path / "f"
    logs = [
        runner.invoke(app, ["prepare", str(folder / "cohort.tsv"), str(work), "--grid-mm", "4",
                            "--template", str(bids(tiny_workspace) / TEMPLATE)]),
        runner.invoke(app, expand_lists(["forecast", str(tiny_model), "--cohort",
                                         str(folder / "cohort.tsv"), "--out", str(out),
                                         "--years", "1", "2"])),
    ]  # fmt: skip
    assert [log.exit_code for log in logs] == [0, 0], [log.output for log in logs]
    text = "".join(log.output for log in logs)
    assert secret not in text and "ward-7" not in text and "private_site_name" not in text
    for path in [*work.rglob("*"), *out.rglob("*")]:
        if not path.is_file():
            continue
        content = path.read_bytes()
        if path.name.endswith(".gz"):
            content = gzip.decompress(content)
        assert secret.encode() not in content and b"ward-7" not in content, path
        if path != work / "cohort.tsv":  # the workspace's index of its input scans
            assert str(folder).encode() not in content, path  # no absolute input path
