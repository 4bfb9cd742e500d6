"""Extra covariates a cohort records (genotype carrier counts, cognitive scores, education,
amyloid status): their declarations, parsing, and one encoding shared by every model.

A covariate is declared in the cohort settings (``[covariates.NAME]`` of a cohort TOML,
or of the file given to ``predictor prepare --covariates``)::

    [covariates.cognition]
    kind = "numeric"          # or "categorical"
    unit = "points"
    range = [0.0, 30.0]       # plausible values; others are refused as errors
    missing = true            # may a value be missing ("", "n/a")?

    [covariates.risk_carrier]
    kind = "categorical"
    levels = ["no", "yes"]    # in order; the first is the reference
    missing = false

A table carries one column per covariate; in BIDS, ``participants.tsv`` (per
participant) or ``sessions.tsv`` (per visit). Models read the value at the
forecast's starting visit: for the regressions and a forecast, the baseline.

:class:`Encoder` turns values into the columns every model sees, learnt from
training participants only: a numeric covariate is standardised with the training
mean and SD; a categorical one gets an indicator per level after the first; a
covariate that may be missing adds a missing indicator and takes, where missing, the
training mean (numeric) or most frequent level (categorical): a single imputation
whose indicator lets each model learn what missingness itself says (common practice).
A column that does not vary among the training participants (a level none of them
has, a missing indicator none of them needs, a constant) carries nothing to learn
and would make the mixed model's design singular: it is left out, and a forecast
that needs it (a level unseen in training) is refused.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from predictor.errors import CohortError, DataError

KINDS = ("numeric", "categorical")
#: spellings of a missing value in a table (BIDS writes n/a); never a level
MISSING = ("", "n/a", "na", "nan")
#: cohort and model columns a covariate may not be named after
RESERVED = ("participant_id", "session_id", "age", "sex", "diagnosis", "image", "brain_mask",
            "rescan", "key", "rescan_key", "within_subject", "years", "baseline_age")  # fmt: skip


@dataclass(frozen=True)
class Covariate:
    """One declared covariate: numeric (unit, plausible range) or categorical (levels)."""

    name: str
    kind: str
    unit: str = ""
    range: tuple[float, float] | None = None
    levels: tuple[str, ...] = ()
    missing: bool = False  # may a value be missing

    def __post_init__(self):
        if self.kind not in KINDS:
            raise ValueError(f"covariate '{self.name}': kind must be one of {list(KINDS)}")
        if self.kind == "categorical" and (
            len(self.levels) < 2 or len(set(self.levels)) != len(self.levels)
        ):
            raise ValueError(f"covariate '{self.name}': give at least 2 distinct levels")
        if self.kind == "numeric" and (
            self.levels or self.range is None or not self.range[0] < self.range[1]
        ):
            raise ValueError(
                f"covariate '{self.name}': a numeric covariate needs range = [low, high] "
                "(low < high) and no levels"
            )

    def parse(self, value, where: str):
        """A table cell -> float, level, or None (missing); CohortError naming ``where``."""
        text = level_text(value)
        if text is None:
            if not self.missing:
                raise CohortError(
                    f"{where}: covariate '{self.name}' is missing and may not be "
                    "(declare missing = true to allow it)"
                )
            return None
        if self.kind == "categorical":
            for level in self.levels:
                if level.lower() == text.lower():
                    return level
            raise CohortError(
                f"{where}: covariate '{self.name}' value '{text}' is not one of "
                f"{', '.join(self.levels)}"
            )
        try:
            number = float(text)
        except ValueError:
            raise CohortError(
                f"{where}: covariate '{self.name}' value '{text}' is not a number"
                + (f" ({self.unit})" if self.unit else "")
            ) from None
        low, high = self.range
        if not math.isfinite(number) or not low <= number <= high:
            raise CohortError(
                f"{where}: covariate '{self.name}' value {text} is outside the plausible "
                f"{low:g}-{high:g}{' ' + self.unit if self.unit else ''}"
            )
        return number

    def to_dict(self) -> dict:
        raw = {"kind": self.kind, "missing": self.missing}
        if self.kind == "numeric":
            return raw | {"unit": self.unit, "range": list(self.range)}
        return raw | {"levels": list(self.levels)}


def level_text(value) -> str | None:
    """A cell as text, or None when missing; 1.0 read back from a table is "1"."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return None
    if isinstance(value, float) and value.is_integer():
        value = int(value)
    text = str(value).strip()
    return None if text.lower() in MISSING else text


def declarations(raw: dict, source: str) -> tuple[Covariate, ...]:
    """Covariates from a ``[covariates]`` table ({name: {kind, ...}}); ValueError naming one."""
    known = {"kind", "unit", "range", "levels", "missing"}
    covariates = []
    for name, spec in raw.items():
        where = f"{source} [covariates.{name}]"
        if not isinstance(spec, dict):
            raise ValueError(f"{where}: must be a table")
        if name.lower() != name or name in RESERVED or not name.replace("_", "").isalnum():
            raise ValueError(
                f"{where}: a name must be lower-case letters, digits and '_', and not a "
                f"cohort column ({', '.join(RESERVED)})"
            )
        unknown = sorted(set(spec) - known)
        if unknown:
            raise ValueError(f"{where}: unknown key '{unknown[0]}'")
        span, levels = spec.get("range"), spec.get("levels", [])
        missing, kind, unit = spec.get("missing", False), spec.get("kind"), spec.get("unit", "")
        if not isinstance(missing, bool):
            raise ValueError(f"{where} 'missing': must be true or false, got {missing!r}")
        if not isinstance(kind, str) or not isinstance(unit, str):
            raise ValueError(f"{where}: 'kind' and 'unit' must be text")
        if not isinstance(levels, list) or not all(isinstance(v, str) for v in levels):
            raise ValueError(f"{where} 'levels': must be a list of texts, got {levels!r}")
        if any(level.strip().lower() in MISSING for level in levels):
            raise ValueError(f"{where} 'levels': a level may not spell a missing value")
        numbers = isinstance(span, list) and len(span) == 2 and all(
            isinstance(v, int | float) and not isinstance(v, bool) for v in span
        )
        if span is not None and not numbers:
            raise ValueError(f"{where} 'range': must be [low, high] numbers, got {span!r}")
        try:
            covariates.append(
                Covariate(name, kind, unit, None if span is None else tuple(map(float, span)),
                          tuple(levels), missing)  # fmt: skip
            )
        except ValueError as error:
            raise ValueError(f"{source}: {error}") from None
    return tuple(covariates)


@dataclass(frozen=True)
class Encoder:
    """Training statistics of the declared covariates, and the columns they encode to.

    ``centre``, ``scale`` and ``fill`` are per covariate: mean and SD (numeric; SD 1 when
    constant) or None, and the imputed value (training mean, or most frequent level);
    ``observed`` the training range of a numeric covariate, or the levels seen in
    training of a categorical one; ``kept`` the encoded columns that vary among the
    training participants (the others are left out, see the module docstring).
    """

    covariates: tuple[Covariate, ...]
    centre: tuple[float | None, ...]
    scale: tuple[float | None, ...]
    fill: tuple[float | str, ...]
    observed: tuple[tuple, ...]
    kept: tuple[str, ...]

    @classmethod
    def fit(cls, covariates: Sequence[Covariate], frame: pd.DataFrame) -> Encoder:
        """Statistics from ``frame`` (one row per training participant, a column each)."""
        centre, scale, fill, observed = [], [], [], []
        for covariate in covariates:
            values = [covariate.parse(v, "training participant") for v in frame[covariate.name]]
            present = [v for v in values if v is not None]
            if not present:
                raise CohortError(
                    f"covariate '{covariate.name}' has no value in any training participant"
                )
            if covariate.kind == "numeric":
                array = np.asarray(present, dtype=float)
                sd = float(array.std(ddof=1)) if len(array) > 1 else 0.0
                centre.append(float(array.mean()))
                scale.append(sd if sd > 0 else 1.0)
                fill.append(float(array.mean()))
                observed.append((float(array.min()), float(array.max())))
            else:
                counts = [present.count(level) for level in covariate.levels]
                centre.append(None)
                scale.append(None)
                fill.append(covariate.levels[int(np.argmax(counts))])
                observed.append(tuple(level for level in covariate.levels if level in present))
        every = cls(tuple(covariates), tuple(centre), tuple(scale), tuple(fill),
                    tuple(observed), ())  # fmt: skip
        encoded = every._all(frame)
        varying = encoded.max(axis=0) > encoded.min(axis=0) if len(encoded) else []
        kept = tuple(name for name, v in zip(every.all_columns, varying, strict=True) if v)
        return cls(every.covariates, every.centre, every.scale, every.fill, every.observed, kept)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.covariates)

    @property
    def all_columns(self) -> list[str]:
        """Every column a covariate can encode to, in order (``kept`` is a subset)."""
        names = []
        for covariate in self.covariates:
            if covariate.kind == "numeric":
                names.append(covariate.name)
            else:
                names += [f"{covariate.name}={level}" for level in covariate.levels[1:]]
            if covariate.missing:
                names.append(f"{covariate.name} missing")
        return names

    @property
    def columns(self) -> list[str]:
        """Names of the encoded columns, in order."""
        return [name for name in self.all_columns if name in self.kept]

    @property
    def width(self) -> int:
        return len(self.kept)

    def _all(self, frame: pd.DataFrame) -> np.ndarray:
        blocks = [np.zeros((len(frame), 0))]
        for covariate, centre, scale, fill in zip(
            self.covariates, self.centre, self.scale, self.fill, strict=True
        ):
            if covariate.name not in frame.columns:
                raise CohortError(f"no value given for covariate '{covariate.name}'")
            ids = frame["participant_id"] if "participant_id" in frame else range(len(frame))
            values = [covariate.parse(v, f"participant {p}")
                      for p, v in zip(ids, frame[covariate.name], strict=True)]  # fmt: skip
            missing = np.array([v is None for v in values], dtype=float)
            filled = [fill if v is None else v for v in values]
            if covariate.kind == "numeric":
                block = ((np.asarray(filled, dtype=float) - centre) / scale)[:, None]
            else:
                block = np.array(
                    [[v == level for level in covariate.levels[1:]] for v in filled], dtype=float
                ).reshape(len(frame), -1)
            blocks.append(block)
            if covariate.missing:
                blocks.append(missing[:, None])
        return np.concatenate(blocks, axis=1)

    def encode(self, frame: pd.DataFrame) -> np.ndarray:
        """(N, width) float64 columns for ``frame``'s rows (one column per covariate)."""
        keep = [k for k, name in enumerate(self.all_columns) if name in self.kept]
        return self._all(frame)[:, keep]

    def check(self, values: dict) -> list[str]:
        """A forecast's parsed ``values``: DataError for a level unseen in training; warnings
        for a numeric value outside the training range and for a missing value that no
        training participant had (it takes the training value, with no indicator)."""
        notes = []
        for covariate, seen, fill in zip(self.covariates, self.observed, self.fill, strict=True):
            value = values.get(covariate.name)
            if value is None:
                if f"{covariate.name} missing" not in self.kept:
                    notes.append(
                        f"covariate '{covariate.name}' is missing, as for no training "
                        f"participant: the training value {fill} is used in its place"
                    )
                continue
            if covariate.kind == "categorical":
                if value not in seen:
                    raise DataError(
                        f"covariate '{covariate.name}' level '{value}' was never seen in "
                        f"training (seen: {', '.join(seen)})"
                    )
            elif not seen[0] <= float(value) <= seen[1]:
                notes.append(
                    f"covariate '{covariate.name}' {float(value):g}"
                    f"{' ' + covariate.unit if covariate.unit else ''} lies outside the "
                    f"training participants' {seen[0]:g}-{seen[1]:g}: the forecast extrapolates"
                )
        return notes

    def to_dict(self) -> dict:
        return {  # a list: JSON written with sorted keys keeps the columns' order
            "covariates": [{"name": c.name} | c.to_dict() for c in self.covariates],
            "centre": list(self.centre),
            "scale": list(self.scale),
            "fill": list(self.fill),
            "observed": [list(o) for o in self.observed],
            "kept": list(self.kept),
        }

    @classmethod
    def from_dict(cls, raw: dict | None, source: str = "model") -> Encoder:
        """The encoder saved by :meth:`to_dict`; None (a model without covariates) is empty."""
        if not raw:
            return cls((), (), (), (), (), ())
        try:
            specs = {spec["name"]: {k: v for k, v in spec.items() if k != "name"}
                     for spec in raw["covariates"]}  # fmt: skip
            return cls(
                declarations(specs, source),
                tuple(raw["centre"]),
                tuple(raw["scale"]),
                tuple(raw["fill"]),
                tuple(tuple(o) for o in raw["observed"]),
                tuple(raw["kept"]),
            )
        except (KeyError, TypeError, ValueError) as error:
            raise DataError(f"{source}: malformed covariate statistics ({error})") from None


def assignments(texts: Sequence[str]) -> dict[str, str]:
    """``NAME=VALUE`` command-line options -> {name: value as typed}; CohortError for one
    without "=" or a name given twice. The model checks and parses the values
    (:func:`predictor.forecast.covariate_values`)."""
    values = {}
    for text in texts:
        name, sep, value = text.partition("=")
        name = name.strip()
        if not sep or not name:
            raise CohortError(f"--covariate '{text}': write NAME=VALUE")
        if name in values:
            raise CohortError(f"--covariate '{text}': {name} is given twice")
        values[name] = value
    return values
