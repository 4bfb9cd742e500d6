"""Read a cohort: a BIDS folder or a plain TSV/CSV table, validated into one table.

The result is a pandas DataFrame with one row per scan and the columns
:data:`COLUMNS`, sorted by participant and age (years). Image paths are
absolute. Every problem raises :class:`~predictor.errors.CohortError` whose
message names the file and line.

BIDS layout read here::

    participants.tsv                participant_id, sex[, diagnosis][, covariates]
    sub-<id>/sub-<id>_sessions.tsv  session_id, age[, diagnosis][, covariates]
    sub-<id>/ses-<id>/anat/*_T1w.nii[.gz]   one scan, or two runs (run-1, run-2):
                                            run-2 is a same-day rescan of run-1

Table layout: columns participant_id, session_id, age, sex, diagnosis,
image[, brain_mask][, rescan], and one column per declared covariate
(:mod:`predictor.covariates`; a BIDS covariate is read from the sessions file
where it has the column, else from participants.tsv); the validated table
gains a column per covariate after :data:`COLUMNS`, None where missing. Paths
are relative to the table's folder. A
rescan (same-day repeat scan of the image) measures the change measurement's
noise floor; it is never a visit of its own.
"""

from __future__ import annotations

import csv
import io
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from predictor.config import CohortSettings
from predictor.errors import CohortError

COLUMNS = (
    "participant_id", "session_id", "age", "sex", "diagnosis", "image", "brain_mask", "rescan"
)  # fmt: skip
RUN = re.compile(r"_run-(\d+)_")
REQUIRED_TABLE_COLUMNS = ("participant_id", "session_id", "age", "sex", "diagnosis", "image")
IMAGE_SUFFIXES = (".nii", ".nii.gz")


@dataclass(frozen=True)
class RawRow:
    """One scan's fields as text, with where they came from (file and line)."""

    fields: dict[str, str]
    source: Path
    line: int
    base: Path  # folder that relative paths start from

    def where(self) -> str:
        return f"{self.source} line {self.line}"


def read_cohort(
    source: str | os.PathLike[str],
    settings: CohortSettings | None = None,
    allow_outside: bool = False,
) -> pd.DataFrame:
    """Read and validate a cohort from a BIDS folder or a TSV/CSV table.

    Parameters
    ----------
    source : a BIDS dataset folder or a ``.tsv``/``.csv`` table
    settings : accepted labels and codes; ``configs/cohort.toml`` when None
    allow_outside : accept image paths that resolve outside the cohort folder

    Returns
    -------
    DataFrame with :data:`COLUMNS`, sorted by participant_id then age.
    """
    settings = settings or CohortSettings.from_toml()
    source = Path(source)
    names = settings.covariate_names
    if source.is_dir():
        rows, root = _bids_rows(source, names), source
    elif source.is_file():
        rows, root = _table_rows(source, names), source.parent
    else:
        raise CohortError(f"{source}: no such cohort file or folder")
    return _validate(rows, settings, root, allow_outside)


def read_delimited(
    path: Path, required: tuple[str, ...] = ()
) -> tuple[list[str], list[tuple[int, list[str]]]]:
    """Parse a TSV/CSV file into a lower-cased header and ``(line, fields)`` rows.

    Raises CohortError when a ``required`` column is missing or a row's field
    count differs from the header's.

    The delimiter is a tab for ``.tsv``, a comma for ``.csv``, and otherwise
    whichever of the two the header line contains.
    """
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except UnicodeDecodeError as error:
        raise CohortError(f"{path}: not UTF-8 text (byte {error.start})") from error
    except OSError as error:
        raise CohortError(f"{path}: cannot be read ({error.strerror})") from error
    if "\x00" in text:
        raise CohortError(f"{path}: contains NUL bytes; not a text table")
    first_line = text.split("\n", 1)[0]
    suffix = path.suffix.lower()
    if suffix == ".tsv" or (suffix != ".csv" and "\t" in first_line):
        delimiter = "\t"
    else:
        delimiter = ","
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    try:
        records = [(reader.line_num, row) for row in reader]
    except csv.Error as error:
        raise CohortError(f"{path} line {reader.line_num}: {error}") from error
    records = [(line, row) for line, row in records if any(cell.strip() for cell in row)]
    if not records:
        raise CohortError(f"{path}: the table is empty")
    header = [cell.strip().lower() for cell in records[0][1]]
    duplicated = sorted({name for name in header if header.count(name) > 1})
    if duplicated:
        raise CohortError(f"{path}: duplicate column(s) {', '.join(map(repr, duplicated))}")
    _require_columns(header, required, path)
    body = []
    for line, row in records[1:]:
        if len(row) != len(header):
            raise CohortError(
                f"{path} line {line}: {len(row)} fields where the header has {len(header)}"
            )
        body.append((line, [cell.strip() for cell in row]))
    return header, body


def _require_columns(header: list[str], required: tuple[str, ...], path: Path) -> None:
    missing = [name for name in required if name not in header]
    if missing:
        raise CohortError(f"{path}: missing column(s) {', '.join(map(repr, missing))}")


def _table_rows(path: Path, covariates: tuple[str, ...]) -> list[RawRow]:
    header, body = read_delimited(path, REQUIRED_TABLE_COLUMNS + covariates)
    return [
        RawRow(dict(zip(header, row, strict=True)), path, line, path.parent) for line, row in body
    ]


def _bids_rows(root: Path, covariates: tuple[str, ...]) -> list[RawRow]:
    participants_file = root / "participants.tsv"
    if not participants_file.is_file():
        raise CohortError(f"{root}: not a BIDS folder (participants.tsv missing)")
    header, body = read_delimited(participants_file, ("participant_id", "sex"))
    participants = {}
    for line, row in body:
        record = dict(zip(header, row, strict=True))
        participant = record["participant_id"]
        if not participant.startswith("sub-"):
            raise CohortError(
                f"{participants_file} line {line}: participant_id '{participant}' "
                "must start with 'sub-'"
            )
        if participant in participants:
            raise CohortError(
                f"{participants_file} line {line}: duplicate participant '{participant}'"
            )
        participants[participant] = record
    for folder in sorted(root.glob("sub-*")):
        if folder.is_dir() and folder.name not in participants:
            raise CohortError(f"{participants_file}: folder '{folder.name}' has no row here")

    rows: list[RawRow] = []
    for participant, record in participants.items():
        sessions_file = root / participant / f"{participant}_sessions.tsv"
        if not sessions_file.is_file():
            raise CohortError(f"{sessions_file}: sessions file missing for '{participant}'")
        session_header, session_body = read_delimited(sessions_file, ("session_id", "age"))
        for column in ("diagnosis", *covariates):
            if column not in session_header and column not in record:
                raise CohortError(
                    f"{sessions_file}: no '{column}' column here nor in {participants_file.name}"
                )
        for line, session_row in session_body:
            fields = dict(zip(session_header, session_row, strict=True))
            session = fields["session_id"]
            anat = root / participant / session / "anat"
            images = (
                sorted(p for p in anat.glob("*_T1w.nii*") if p.name.endswith(IMAGE_SUFFIXES))
                if anat.is_dir()
                else []
            )
            runs = sorted((int(RUN.search(p.name)[1]), p) for p in images if RUN.search(p.name))
            stems = {RUN.sub("_", p.name) for p in images}  # the names without their run
            paired = [n for n, _ in runs] == [1, 2] and len(stems) == 1
            if len(images) > 1 and not paired:
                names = ", ".join(p.name for p in images)
                raise CohortError(
                    f"{sessions_file} line {line}: {len(images)} T1w images in {anat} ({names}); "
                    "keep one, or run-1 and run-2 (a same-day rescan), or list the scans in a table"
                )
            if len(images) == 2:
                images = [path for _, path in runs]
            fields = {
                "participant_id": participant,
                "session_id": session,
                "age": fields["age"],
                "sex": record["sex"],
                "diagnosis": fields.get("diagnosis") or record.get("diagnosis", ""),
                "image": str(images[0].relative_to(root))
                if images
                else f"{participant}/{session}/anat/{participant}_{session}_T1w.nii.gz",
                "rescan": str(images[1].relative_to(root)) if len(images) == 2 else "",
            } | {name: fields[name] if name in fields else record[name] for name in covariates}
            rows.append(RawRow(fields, sessions_file, line, root))
    return rows


def _natural_key(text: str) -> tuple:
    return tuple(int(part) if part.isdigit() else part for part in re.split(r"(\d+)", text))


def _resolve_path(value: str, row: RawRow, column: str, root: Path, allow_outside: bool) -> str:
    if not value:
        raise CohortError(f"{row.where()}: '{column}' is empty")
    path = Path(value)
    path = path if path.is_absolute() else row.base / path
    if not path.name.endswith(IMAGE_SUFFIXES):
        raise CohortError(f"{row.where()}: {column} '{value}' is not a .nii or .nii.gz file")
    if not path.is_file():
        raise CohortError(f"{row.where()}: {column} '{value}' not found")
    resolved = path.resolve()
    if not allow_outside and not resolved.is_relative_to(root.resolve()):
        raise CohortError(
            f"{row.where()}: {column} '{value}' lies outside the cohort folder "
            "(pass --allow-outside to accept it)"
        )
    return str(resolved)


def _parse_age(value: str, row: RawRow, settings: CohortSettings) -> float:
    try:
        age = float(value)
    except ValueError:
        raise CohortError(f"{row.where()}: age '{value}' is not a number (years)") from None
    low, high = settings.age.min_years, settings.age.max_years
    if not math.isfinite(age) or not low <= age <= high:
        raise CohortError(
            f"{row.where()}: age {value} is outside the plausible {low:g}-{high:g} years"
        )
    return age


def _validate(
    rows: list[RawRow], settings: CohortSettings, root: Path, allow_outside: bool
) -> pd.DataFrame:
    records, seen = [], {}
    for row in rows:
        fields = row.fields
        participant, session = fields["participant_id"], fields["session_id"]
        if not participant:
            raise CohortError(f"{row.where()}: participant_id is empty")
        if not session:
            raise CohortError(f"{row.where()}: session_id is empty")
        key = (participant, session)
        if key in seen:
            raise CohortError(
                f"{row.where()}: duplicate participant/session {participant}/{session} "
                f"(first at line {seen[key].line})"
            )
        seen[key] = row
        sex = settings.sex.match(fields["sex"])
        if sex is None:
            raise CohortError(
                f"{row.where()}: sex '{fields['sex']}' is not one of "
                f"{', '.join(settings.sex_codes)}"
            )
        diagnosis = settings.diagnosis.match(fields["diagnosis"])
        if diagnosis is None:
            raise CohortError(
                f"{row.where()}: diagnosis '{fields['diagnosis']}' is not one of "
                f"{', '.join(settings.diagnosis_labels)} (configs/cohort.toml)"
            )
        mask, rescan = fields.get("brain_mask", ""), fields.get("rescan", "")
        records.append(
            {
                "participant_id": participant,
                "session_id": session,
                "age": _parse_age(fields["age"], row, settings),
                "sex": sex,
                "diagnosis": diagnosis,
                "image": _resolve_path(fields["image"], row, "image", root, allow_outside),
                "brain_mask": _resolve_path(mask, row, "brain_mask", root, allow_outside)
                if mask
                else None,
                "rescan": _resolve_path(rescan, row, "rescan", root, allow_outside)
                if rescan
                else None,
                "_row": row,
            }
            | {c.name: c.parse(fields[c.name], row.where()) for c in settings.covariates}
        )
    if not records:
        raise CohortError(f"{root}: the cohort has no scans")
    _check_participants(records)
    table = pd.DataFrame(records).sort_values(["participant_id", "age"], kind="stable")
    columns = [*COLUMNS, *settings.covariate_names]
    return table.drop(columns="_row").reset_index(drop=True)[columns]


def _check_participants(records: list[dict]) -> None:
    """Sex is constant per participant, and ages increase with session order."""
    by_participant: dict[str, list[dict]] = {}
    for record in records:
        by_participant.setdefault(record["participant_id"], []).append(record)
    for participant, visits in by_participant.items():
        sexes = {visit["sex"] for visit in visits}
        if len(sexes) > 1:
            raise CohortError(
                f"{visits[-1]['_row'].where()}: participant {participant} has sex "
                f"{' and '.join(sorted(sexes))} in different rows"
            )
        ordered = sorted(visits, key=lambda visit: _natural_key(visit["session_id"]))
        for earlier, later in zip(ordered, ordered[1:], strict=False):
            if later["age"] <= earlier["age"]:
                raise CohortError(
                    f"{later['_row'].where()}: age {later['age']:g} at session "
                    f"{later['session_id']} is not above {earlier['age']:g} at the earlier "
                    f"session {earlier['session_id']} of {participant}"
                )
