"""Configuration: frozen dataclasses read from the TOML files in ``configs/``.

Every default lives once, in a TOML file shipped with the package
(``predictor.configs``, the repository's top-level ``configs/`` folder); the
dataclasses hold no defaults of their own. A user's file given by path is
laid over the shipped one (tables merge key by key), then every section,
nested ones included, is validated: an unknown key or a wrong type is a
:class:`~predictor.errors.ConfigError` naming the file, the section and the
key, with a "did you mean" suggestion where one is close.
"""

from __future__ import annotations

import difflib
import os
import tomllib
import types
import typing
from dataclasses import dataclass, field, fields, is_dataclass
from importlib import resources
from pathlib import Path
from typing import Any

from predictor.errors import ConfigError

#: the shipped configuration folder (``configs/`` of the repository)
CONFIG_DIR = Path(str(resources.files("predictor.configs")))
#: the shipped phantom scenarios (``synthetic_phantoms/`` of the repository)
SCENARIO_DIR = Path(str(resources.files("predictor.scenarios")))


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


def merged(base: dict, override: dict) -> dict:
    """``base`` with ``override`` laid over it; tables merge key by key, other values replace."""
    out = dict(base)
    for key, value in override.items():
        if isinstance(value, dict) and isinstance(out.get(key), dict):
            out[key] = merged(out[key], value)
        else:
            out[key] = value
    return out


def read_config(name: str, path: str | os.PathLike[str] | None = None) -> tuple[dict, str]:
    """The shipped ``configs/<name>`` with the user's file at ``path`` laid over it.

    Returns the merged table and the file to name in errors (the user's, if given).
    """
    raw = read_toml(CONFIG_DIR / name)
    if path is None or Path(path).resolve() == (CONFIG_DIR / name).resolve():
        return raw, str(CONFIG_DIR / name)
    return merged(raw, read_toml(path)), str(path)


def require(table: dict[str, Any], key: str, source: str, kind: type | tuple[type, ...]):
    """``table[key]`` checked against ``kind``, or ConfigError naming the key (scenario files)."""
    if key not in table:
        raise ConfigError(f"{source}: missing key '{key}'")
    value = table[key]
    kinds = kind if isinstance(kind, tuple) else (kind,)
    if (isinstance(value, bool) and bool not in kinds) or not isinstance(value, kind):
        raise ConfigError(f"{source}: '{key}' must be {kind}, got {value!r}")
    return value


def _where(source: str, section: tuple[str, ...]) -> str:
    return f"{source} [{'.'.join(section)}]" if section else source


def _type_name(hint) -> str:
    return getattr(hint, "__name__", None) or str(hint).replace("typing.", "")


def _check(value, hint, source: str, section: tuple[str, ...], key: str):
    """``value`` checked (and converted: lists to tuples, ints to floats) against ``hint``."""
    origin, args = typing.get_origin(hint), typing.get_args(hint)

    def wrong():
        return ConfigError(
            f"{_where(source, section)} '{key}': must be {_type_name(hint)}, got {value!r}"
        )

    if is_dataclass(hint):
        if not isinstance(value, dict):
            raise wrong()
        return settings_from_table(hint, value, source, (*section, key))
    if origin in (types.UnionType, typing.Union):
        for option in args:
            try:
                return _check(value, option, source, section, key)
            except ConfigError:
                continue
        raise wrong()
    if hint is bool:
        if not isinstance(value, bool):
            raise wrong()
        return value
    if hint in (int, float, str):
        accepted = (int, float) if hint is float else hint
        if isinstance(value, bool) or not isinstance(value, accepted):
            raise wrong()
        return float(value) if hint is float else value
    if origin is tuple:
        if not isinstance(value, list | tuple):
            raise wrong()
        kinds = [args[0]] * len(value) if len(args) == 2 and args[1] is Ellipsis else args
        if len(value) != len(kinds):
            raise wrong()
        pairs = zip(value, kinds, strict=True)
        return tuple(_check(item, kind, source, section, key) for item, kind in pairs)
    if origin is dict:
        if not isinstance(value, dict):
            raise wrong()
        return {
            name: _check(item, args[1], source, section, f"{key}.{name}")
            for name, item in value.items()
        }
    raise TypeError(f"unsupported configuration type {hint!r}")  # a bug, not a user error


def check_keys(table: dict, known, where: str) -> None:
    """ConfigError for the first key of ``table`` not in ``known``, with a close match."""
    known = list(known)
    for key in table:
        if key not in known:
            close = difflib.get_close_matches(key, known, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise ConfigError(f"{where} '{key}': unknown key{hint}")


def settings_from_table(cls, table: dict[str, Any], source: str, section: tuple[str, ...] = ()):
    """Build the frozen dataclass ``cls`` (nested ones too) from a TOML table.

    Unknown, missing and mistyped keys raise ConfigError naming ``source``,
    the section and the key; a value the dataclass itself refuses (its
    ``__post_init__`` raises ValueError) is reported the same way.
    """
    where = _where(source, section)
    if not isinstance(table, dict):
        raise ConfigError(f"{where}: must be a table, got {table!r}")
    hints = typing.get_type_hints(cls)
    known = [item.name for item in fields(cls) if item.init]
    check_keys(table, known, where)
    missing = [key for key in known if key not in table]
    if missing:
        raise ConfigError(f"{where} '{missing[0]}': missing key")
    values = {key: _check(table[key], hints[key], source, section, key) for key in known}
    try:
        return cls(**values)
    except ValueError as error:
        if isinstance(error, ConfigError):
            raise
        raise ConfigError(f"{where}: {error}") from error


def load_settings(cls, name: str, path=None, table: str | None = None, overrides=None):
    """``cls`` from the shipped ``configs/<name>`` (a ``table`` of it), with ``path`` over it.

    ``overrides`` (a nested dict) is laid over the file last, e.g. a command-line option.
    """
    raw, source = read_config(name, path)
    section: tuple[str, ...] = ()
    if table is not None:
        if table not in raw:
            raise ConfigError(f"{source}: no table [{table}]")
        raw, section = raw[table], (table,)
    if overrides:
        raw = merged(raw, overrides)
    return settings_from_table(cls, raw, source, section)


# --- cohort coding ------------------------------------------------------------------------------
@dataclass(frozen=True)
class Coding:
    """Accepted values of one categorical column: codes in order, and other spellings."""

    codes: tuple[str, ...]
    aliases: dict[str, str]

    def __post_init__(self):
        if not self.codes or len(set(self.codes)) != len(self.codes):
            raise ValueError(f"'codes' must be unique and non-empty, got {list(self.codes)}")
        for alias, target in self.aliases.items():
            if target not in self.codes:
                raise ValueError(f"alias '{alias}' points to unknown code '{target}'")

    def match(self, value: str) -> str | None:
        """The code for ``value`` (case-insensitive, aliases allowed), else None."""
        lowered = str(value).strip().lower()
        for code in self.codes:
            if code.lower() == lowered:
                return code
        for alias, code in self.aliases.items():
            if alias.lower() == lowered:
                return code
        return None


@dataclass(frozen=True)
class AgeRange:
    """Plausible ages (years)."""

    min_years: float
    max_years: float

    def __post_init__(self):
        if not self.min_years < self.max_years:
            raise ValueError(f"'min_years' must be below 'max_years', got {self}")


@dataclass(frozen=True)
class CohortSettings:
    """Diagnosis labels (in severity order), sex codes, age range and declared extra
    covariates (``configs/cohort.toml``; :mod:`predictor.covariates`).

    The first sex code is the reference of every model's sex indicator and the
    diagnosis order that of every one-hot code; a model saves these settings,
    so no module spells a code.
    """

    diagnosis: Coding
    sex: Coding
    age: AgeRange
    # the [covariates] table has free names, so from_dict reads it (not settings_from_table)
    covariates: tuple = field(init=False)

    @classmethod
    def from_toml(
        cls,
        path: str | os.PathLike[str] | None = None,
        covariates: str | os.PathLike[str] | None = None,
    ) -> CohortSettings:
        """Read ``configs/cohort.toml`` with the file at ``path`` (if any) laid over it, and
        the ``[covariates]`` of the file ``covariates`` (if any) over that."""
        raw, source = read_config("cohort.toml", path)
        if covariates is not None:
            extra = read_toml(covariates)
            if set(extra) != {"covariates"}:
                raise ConfigError(f"{covariates}: must hold only [covariates.NAME] tables")
            raw, source = merged(raw, extra), str(covariates)
        return cls.from_dict(raw, source)

    @classmethod
    def from_dict(cls, raw: dict, source: str = "cohort settings") -> CohortSettings:
        from predictor.covariates import declarations

        raw = dict(raw)
        declared = raw.pop("covariates", {})
        settings = settings_from_table(cls, raw, source)
        if not isinstance(declared, dict):
            raise ConfigError(f"{source} [covariates]: must be a table of [covariates.NAME]")
        try:
            object.__setattr__(settings, "covariates", declarations(declared, source))
        except ValueError as error:
            raise ConfigError(str(error)) from None
        return settings

    def to_dict(self) -> dict:
        raw = {
            "diagnosis": {"codes": list(self.diagnosis.codes), "aliases": self.diagnosis.aliases},
            "sex": {"codes": list(self.sex.codes), "aliases": self.sex.aliases},
            "age": {"min_years": self.age.min_years, "max_years": self.age.max_years},
        }
        if self.covariates:  # absent otherwise: a model without covariates keeps its checksum
            raw["covariates"] = {c.name: c.to_dict() for c in self.covariates}
        return raw

    @property
    def covariate_names(self) -> tuple[str, ...]:
        return tuple(c.name for c in self.covariates)

    @property
    def diagnosis_labels(self) -> tuple[str, ...]:
        return self.diagnosis.codes

    @property
    def sex_codes(self) -> tuple[str, ...]:
        return self.sex.codes

    def sex_indicators(self, values) -> Any:
        """(N, S - 1) float array: one indicator per sex code after the first (the reference)."""
        import numpy as np

        values = np.asarray(values, dtype=object)
        return np.stack([values == code for code in self.sex.codes[1:]], axis=1).astype(
            np.float64
        ).reshape(len(values), len(self.sex.codes) - 1)
