"""Cohort reading (predictor.cohort): BIDS folders, tables, and every validation branch."""

from __future__ import annotations

import nibabel as nib
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from predictor.cohort import COLUMNS, read_cohort
from predictor.errors import CohortError

HEADER = "participant_id\tsession_id\tage\tsex\tdiagnosis\timage\n"
GOOD_ROWS = [
    "p1\tbl\t70.5\tF\tCN\timg/p1_bl.nii.gz",
    "p1\tm12\t71.5\tF\tMCI\timg/p1_m12.nii.gz",
    "p2\tbl\t80\tmale\tAD\timg/p2_bl.nii.gz",
]


@pytest.fixture
def table_dir(tmp_path):
    (tmp_path / "img").mkdir()
    for name in ("p1_bl", "p1_m12", "p2_bl", "extra"):
        nib.save(
            nib.Nifti1Image(np.ones((3, 3, 3), np.float32), np.eye(4)),
            tmp_path / "img" / f"{name}.nii.gz",
        )
    return tmp_path


def _table(folder, rows, header=HEADER, name="cohort.tsv"):
    path = folder / name
    path.write_text(header + "\n".join(rows) + "\n")
    return path


def test_reads_phantom_bids(tiny_cohort):
    table = read_cohort(tiny_cohort)
    assert list(table.columns) == list(COLUMNS)
    assert table["participant_id"].nunique() == 4
    for _, visits in table.groupby("participant_id"):
        assert np.all(np.diff(visits["age"]) > 0)
        assert visits["sex"].nunique() == 1
    assert all(path.endswith("_T1w.nii.gz") for path in table["image"])
    assert table["brain_mask"].isna().all()


def test_reads_table_sorted_with_aliases(table_dir):
    rows = [GOOD_ROWS[2], GOOD_ROWS[1], GOOD_ROWS[0]]
    table = read_cohort(_table(table_dir, rows))
    assert table["participant_id"].tolist() == ["p1", "p1", "p2"]
    assert table["session_id"].tolist() == ["bl", "m12", "bl"]
    assert table.loc[2, "sex"] == "M"  # "male" is an alias of M in configs/cohort.toml


def test_reads_csv_with_brain_mask(table_dir):
    text = HEADER.replace("\t", ",").strip() + ",brain_mask\n"
    text += "p1,bl,70,F,CN,img/p1_bl.nii.gz,img/extra.nii.gz\n"
    path = table_dir / "cohort.csv"
    path.write_text(text)
    table = read_cohort(path)
    assert table.loc[0, "brain_mask"].endswith("extra.nii.gz")
    assert table["rescan"].isna().all()


def test_a_same_day_rescan_is_read_from_a_table_and_bids_runs(table_dir, tiny_cohort, tmp_path):
    # table: a 'rescan' column; BIDS (specification 1.9, "run" entity): two runs of a
    # session are its scan (run-1) and a same-day rescan (run-2); three are refused
    import shutil

    rows = [GOOD_ROWS[0] + "\timg/extra.nii.gz", GOOD_ROWS[1] + "\t"]
    table = read_cohort(_table(table_dir, rows, HEADER.replace("image", "image\trescan")))
    assert table.loc[0, "rescan"].endswith("extra.nii.gz") and table["rescan"].isna()[1]
    copy = tmp_path / "bids"
    shutil.copytree(tiny_cohort, copy, ignore=shutil.ignore_patterns("derivatives"))
    anat = copy / "sub-002" / "ses-01" / "anat"
    scan = anat / "sub-002_ses-01_T1w.nii.gz"
    for run in (2, 1):  # run-2 first: the order on disk must not matter
        shutil.copy(scan, anat / f"sub-002_ses-01_run-{run}_T1w.nii.gz")
    scan.unlink()
    row = read_cohort(copy).set_index(["participant_id", "session_id"]).loc[("sub-002", "ses-01")]
    assert row["image"].endswith("run-1_T1w.nii.gz") and row["rescan"].endswith("run-2_T1w.nii.gz")
    shutil.copy(anat / "sub-002_ses-01_run-1_T1w.nii.gz", anat / "sub-002_ses-01_run-3_T1w.nii.gz")
    with pytest.raises(CohortError, match="sub-002_sessions.tsv line 2: 3 T1w images"):
        read_cohort(copy)
    (anat / "sub-002_ses-01_run-2_T1w.nii.gz").unlink()  # run-1 and run-3: not a rescan pair
    with pytest.raises(CohortError, match="2 T1w images.*run-1 and run-2"):
        read_cohort(copy)


@pytest.mark.parametrize(
    ("rows", "header", "message"),
    [
        (GOOD_ROWS, HEADER.replace("\tage", ""), "missing column.*'age'"),
        (
            ["p1\tbl\tseventy\tF\tCN\timg/p1_bl.nii.gz"],
            HEADER,
            "line 2: age 'seventy' is not a number",
        ),
        (["p1\tbl\t150\tF\tCN\timg/p1_bl.nii.gz"], HEADER, "line 2: age 150 is outside"),
        (
            ["p1\tbl\t70\tF\tCN\timg/none.nii.gz"],
            HEADER,
            "line 2: image 'img/none.nii.gz' not found",
        ),
        ([GOOD_ROWS[0], GOOD_ROWS[0]], HEADER, "line 3: duplicate participant/session p1/bl"),
        (
            ["p1\tses-1\t72\tF\tCN\timg/p1_bl.nii.gz", "p1\tses-2\t71\tF\tCN\timg/p1_m12.nii.gz"],
            HEADER,
            "line 3: age 71 at session ses-2 is not above 72",
        ),
        (["p1\tbl\t70\tF\tFTD\timg/p1_bl.nii.gz"], HEADER, "line 2: diagnosis 'FTD' is not one of"),
        (["p1\tbl\t70\tX\tCN\timg/p1_bl.nii.gz"], HEADER, "line 2: sex 'X' is not one of F, M"),
        (["p1\tbl\t70\tF\tCN"], HEADER, "line 2: 5 fields where the header has 6"),
        (["p1\tbl\t70\tF\tCN\t../outside.nii.gz"], HEADER, "outside the cohort folder"),
    ],
    ids=[
        "missing-column",
        "age-text",
        "age-range",
        "missing-image",
        "duplicate",
        "age-order",
        "diagnosis",
        "sex",
        "short-row",
        "outside",
    ],
)
def test_bad_tables_name_file_and_line(table_dir, rows, header, message):
    nib.save(
        nib.Nifti1Image(np.ones((3, 3, 3), np.float32), np.eye(4)),
        table_dir.parent / "outside.nii.gz",
    )
    path = _table(table_dir, rows, header)
    with pytest.raises(CohortError, match=message) as caught:
        read_cohort(path)
    assert str(path) in str(caught.value)


def test_outside_paths_allowed_on_request(table_dir):
    outside = table_dir.parent / "outside.nii.gz"
    nib.save(nib.Nifti1Image(np.ones((3, 3, 3), np.float32), np.eye(4)), outside)
    path = _table(table_dir, ["p1\tbl\t70\tF\tCN\t../outside.nii.gz"])
    assert read_cohort(path, allow_outside=True).loc[0, "image"] == str(outside.resolve())


def test_symlink_leaving_the_folder_is_refused(table_dir):
    outside = table_dir.parent / "elsewhere.nii.gz"
    nib.save(nib.Nifti1Image(np.ones((3, 3, 3), np.float32), np.eye(4)), outside)
    (table_dir / "img" / "link.nii.gz").symlink_to(outside)
    with pytest.raises(CohortError, match="outside the cohort folder"):
        read_cohort(_table(table_dir, ["p1\tbl\t70\tF\tCN\timg/link.nii.gz"]))


def test_bids_errors(tiny_cohort, tmp_path):
    import shutil

    copy = tmp_path / "bids"
    shutil.copytree(tiny_cohort, copy, ignore=shutil.ignore_patterns("derivatives"))
    sessions = copy / "sub-001" / "sub-001_sessions.tsv"
    sessions.write_text(
        sessions.read_text().replace("CN", "XYZ").replace("MCI", "XYZ").replace("AD", "XYZ")
    )
    with pytest.raises(CohortError, match="sub-001_sessions.tsv line 2: diagnosis 'XYZ'"):
        read_cohort(copy)
    (copy / "participants.tsv").unlink()
    with pytest.raises(CohortError, match="participants.tsv missing"):
        read_cohort(copy)


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(
    content=st.one_of(
        st.binary(max_size=400),
        st.text(max_size=400).map(lambda text: text.encode("utf-8")),
        st.lists(
            st.lists(
                st.sampled_from(
                    [
                        "participant_id",
                        "session_id",
                        "age",
                        "sex",
                        "diagnosis",
                        "image",
                        "p1",
                        "70",
                        "1e308",
                        "nan",
                        "F",
                        "CN",
                        '"',
                        "img/p1_bl.nii.gz",
                        "",
                        "é",
                        ";",
                    ]
                ),
                max_size=8,
            ),
            max_size=6,
        ).map(lambda rows: "\n".join("\t".join(r) for r in rows).encode()),
    )
)
def test_random_table_bytes_give_table_or_cohort_error(table_dir, content):
    # Property: any bytes give either a validated table or CohortError, never another exception.
    for suffix in (".tsv", ".csv", ".txt"):
        path = table_dir / f"random{suffix}"
        path.write_bytes(content)
        try:
            table = read_cohort(path)
        except CohortError:
            continue
        assert list(table.columns) == list(COLUMNS)
