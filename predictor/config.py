"""Configuration: frozen dataclasses read from TOML files in ``configs/``.

Every default lives in a TOML file; code only validates and carries it.
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from predictor.errors import ConfigError

#: the project's configuration folder (``configs/`` beside the package)
CONFIG_DIR = Path(__file__).resolve().parent.parent / "configs"


def read_toml(path: str | os.PathLike[str]) -> dict[str, Any]:
    """Parse a TOML file; a missing or malformed file raises ConfigError naming it."""
    path = Path(path)
    try:
        with open(path, "rb") as stream:
            return tomllib.load(stream)
    except FileNotFoundError as error:
        raise ConfigError(f"{path}: configuration file not found") from error
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
        raise ConfigError(f"{path}: not valid TOML ({error})") from error


def require(table: dict[str, Any], key: str, source: str, kind: type | tuple[type, ...]):
    """Return ``table[key]`` checked against ``kind``, or raise ConfigError naming the key."""
    if key not in table:
        raise ConfigError(f"{source}: missing key '{key}'")
    value = table[key]
    if isinstance(value, bool) and bool not in (kind if isinstance(kind, tuple) else (kind,)):
        raise ConfigError(f"{source}: '{key}' must be {kind}, got {value!r}")
    if not isinstance(value, kind):
        raise ConfigError(f"{source}: '{key}' must be {kind}, got {value!r}")
    return value


@dataclass(frozen=True)
class CohortSettings:
    """Accepted diagnosis labels (in severity order), sex codes and age range (years)."""

    diagnosis_labels: tuple[str, ...] = ("CN", "MCI", "AD")
    diagnosis_aliases: dict[str, str] = field(default_factory=dict)
    sex_codes: tuple[str, ...] = ("F", "M")
    sex_aliases: dict[str, str] = field(default_factory=dict)
    age_range: tuple[float, float] = (0.0, 120.0)

    def __post_init__(self):
        if not self.diagnosis_labels or len(set(self.diagnosis_labels)) != len(
            self.diagnosis_labels
        ):
            raise ConfigError(
                f"diagnosis labels must be unique and non-empty: {self.diagnosis_labels}"
            )
        if not self.sex_codes:
            raise ConfigError("sex codes must be non-empty")
        for alias, target in self.diagnosis_aliases.items():
            if target not in self.diagnosis_labels:
                raise ConfigError(f"diagnosis alias '{alias}' points to unknown label '{target}'")
        for alias, target in self.sex_aliases.items():
            if target not in self.sex_codes:
                raise ConfigError(f"sex alias '{alias}' points to unknown code '{target}'")
        low, high = self.age_range
        if not low < high:
            raise ConfigError(f"age range must be increasing, got {self.age_range}")

    @classmethod
    def from_toml(cls, path: str | os.PathLike[str] | None = None) -> CohortSettings:
        """Read ``configs/cohort.toml`` (or ``path``)."""
        path = Path(path) if path is not None else CONFIG_DIR / "cohort.toml"
        raw = read_toml(path)
        source = str(path)
        diagnosis = require(raw, "diagnosis", source, dict)
        sex = require(raw, "sex", source, dict)
        age = require(raw, "age", source, dict)
        return cls(
            diagnosis_labels=tuple(require(diagnosis, "labels", source, list)),
            diagnosis_aliases=dict(diagnosis.get("aliases", {})),
            sex_codes=tuple(require(sex, "codes", source, list)),
            sex_aliases=dict(sex.get("aliases", {})),
            age_range=(
                float(require(age, "min_years", source, (int, float))),
                float(require(age, "max_years", source, (int, float))),
            ),
        )

    @staticmethod
    def _match(value: str, codes: tuple[str, ...], aliases: dict[str, str]) -> str | None:
        lowered = value.strip().lower()
        for code in codes:
            if code.lower() == lowered:
                return code
        for alias, code in aliases.items():
            if alias.lower() == lowered:
                return code
        return None

    def diagnosis(self, value: str) -> str | None:
        """The configured label for ``value`` (case-insensitive, aliases allowed), else None."""
        return self._match(value, self.diagnosis_labels, self.diagnosis_aliases)

    def sex(self, value: str) -> str | None:
        """The configured sex code for ``value`` (case-insensitive, aliases allowed), else None."""
        return self._match(value, self.sex_codes, self.sex_aliases)


def settings_from_table(cls, table: dict[str, Any], source: str):
    """Build the frozen dataclass ``cls`` from a TOML table, naming unknown and missing keys.

    Lists become tuples; each value is checked against the field's default type
    (a float field accepts an int).
    """
    from dataclasses import MISSING, fields

    known = {item.name: item for item in fields(cls)}
    unknown = sorted(set(table) - set(known))
    if unknown:
        raise ConfigError(f"{source}: unknown key(s) {', '.join(unknown)}")
    values = {}
    for name, item in known.items():
        if name not in table:
            if item.default is MISSING:
                raise ConfigError(f"{source}: missing key '{name}'")
            continue
        value = table[name]
        default = item.default
        if isinstance(value, list):
            value = tuple(value)
        if default is not MISSING and default is not None:
            expected = float if isinstance(default, float) else type(default)
            accepted = (int, float) if expected is float else expected
            if isinstance(value, bool) and expected is not bool or not isinstance(value, accepted):
                raise ConfigError(f"{source}: '{name}' must be {expected.__name__}, got {value!r}")
            if expected is float:
                value = float(value)
        values[name] = value
    try:
        return cls(**values)
    except (TypeError, ValueError) as error:
        raise ConfigError(f"{source}: {error}") from error
