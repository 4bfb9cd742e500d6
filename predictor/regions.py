"""Regions: one record per reported region, read from ``configs/regions.toml``.

Two kinds of region, both measured the same way on real and forecast scans:

* a *deep* region is one tissue (GM, WM or CSF) inside a template-space mask
  carried to each scan (the masks of each template kind are defined under
  ``[masks.<kind>]``, or in a template folder's own ``regions.toml``);
* a *sum* region is a weighted sum of the tissue totals and the deep
  regions (for example cortical grey matter = GM - both hippocampi).

Volumes are linear in the tissue maps, so every region is a row of one
coefficient matrix over the *bases* ``TISSUES + deep regions``: the same
matrix turns integrals into volumes (:meth:`RegionSet.volumes`) and voxel
maps into region weight maps (:meth:`RegionSet.maps`). Adding a region is an
edit of the regions file; every stage takes names and properties from here.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from predictor.config import check_keys, read_config
from predictor.errors import ConfigError

TISSUES = ("GM", "WM", "CSF")
#: sign of a region's expected change with disease
CHANGES = {"shrinks": -1, "grows": 1, "none": 0}
#: the region every "% of total brain volume" divides by
TOTAL_BRAIN = "brain"
_KEYS = ("description", "tissue", "sum", "change", "mirror", "reference", "prior", "boundary")


@dataclass(frozen=True)
class Boundary:
    """How the boundary shift integral measures a region's change (predictor.longitudinal).

    ``outside``/``inside``: the tissues on either side of the region's edge; the
    intensity window runs between their pure intensities, less ``trim`` of its
    width at each end (noise on a pure tissue then stays out of the window, so a
    voxel that turns fully from one tissue to the other counts as one voxel).
    ``band_voxels``: how far either side of the two visits' edges the integral
    reaches; a wider band also takes in the change of neighbouring structures.
    """

    outside: str
    inside: str
    band_voxels: int = 2
    trim: float = 0.0


@dataclass(frozen=True)
class Region:
    """One region and how it behaves."""

    name: str
    description: str
    change: str  # with disease: 'shrinks', 'grows' or 'none'
    reference: bool  # should not change (e.g. the intracranial volume): a check, never a target
    prior: bool  # forecast by the network's Jacobian and held to the regional prior in training
    tissue: str | None = None  # deep region: this tissue inside a template mask
    weights: dict[str, float] = field(default_factory=dict)  # sum region: base -> weight
    mirror: str | None = None  # left-right partner
    boundary: Boundary | None = None  # its edge, for the boundary shift integral

    @property
    def direction(self) -> int:
        """-1 may only shrink, +1 may only grow, 0 either (the monotone term)."""
        return CHANGES[self.change]


@dataclass(frozen=True, eq=False)
class RegionSet:
    """Every region in report order, and each template kind's deep-region masks."""

    regions: tuple[Region, ...]
    masks: dict[str, dict[str, dict]]  # template kind -> deep region -> mask definition
    raw: dict  # the validated table with its region order (saved in workspaces and models)
    source: str

    @classmethod
    def from_toml(cls, path: str | os.PathLike[str] | None = None) -> RegionSet:
        """``configs/regions.toml`` with the file at ``path`` laid over it (new regions append)."""
        raw, source = read_config("regions.toml", path)
        return cls.from_dict(raw, source)

    @classmethod
    def from_dict(cls, raw: dict, source: str = "regions") -> RegionSet:
        """Validate a regions table (as in the TOML file, or saved by a workspace or model)."""
        if not isinstance(raw, dict):
            raise ConfigError(f"{source}: the regions must be a table, got {raw!r}")
        check_keys(raw, ("regions", "masks", "order"), source)
        tables = raw.get("regions")
        if not isinstance(tables, dict) or not tables:
            raise ConfigError(f"{source} [regions]: no regions defined")
        # the report order: the file's, or the one saved beside a key-sorted JSON copy
        order = raw.get("order", list(tables))
        if sorted(order) != sorted(tables):
            raise ConfigError(f"{source}: 'order' does not list exactly the regions defined")
        regions = tuple(_region(name, tables[name], source) for name in order)
        saved = {"regions": tables, "masks": raw.get("masks", {}), "order": list(order)}
        made = cls(regions, dict(raw.get("masks", {})), saved, source)
        made._check()
        return made

    def _check(self) -> None:
        names = set(self.names)
        if TOTAL_BRAIN not in names:
            raise ConfigError(f"{self.source} [regions]: the region '{TOTAL_BRAIN}' is required")
        bases = set(self.bases)
        for region in self.regions:
            where = f"{self.source} [regions.{region.name}]"
            for base in region.weights:
                if base not in bases:
                    raise ConfigError(
                        f"{where} 'sum': '{base}' is neither a tissue ({', '.join(TISSUES)}) "
                        "nor a deep region"
                    )
            if region.mirror is not None:
                partner = self.get(region.mirror, where)
                if partner.mirror != region.name:
                    raise ConfigError(
                        f"{where} 'mirror': '{region.mirror}' does not name it back as its mirror"
                    )

    def get(self, name: str, where: str | None = None) -> Region:
        """The region called ``name``; an unknown name is a ConfigError listing the known ones."""
        for region in self.regions:
            if region.name == name:
                return region
        raise ConfigError(
            f"{where or self.source}: unknown region '{name}' (known: {', '.join(self.names)})"
        )

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(region.name for region in self.regions)

    @property
    def deep(self) -> tuple[str, ...]:
        """Deep regions (tissue inside a template mask), in file order."""
        return tuple(region.name for region in self.regions if region.tissue)

    @property
    def bases(self) -> tuple[str, ...]:
        """What every region is a weighted sum of: the tissues, then the deep regions."""
        return TISSUES + self.deep

    @property
    def prior(self) -> tuple[str, ...]:
        """Regions the network's Jacobian forecasts in training and the prior constrains."""
        return tuple(region.name for region in self.regions if region.prior)

    @property
    def checks(self) -> tuple[str, ...]:
        """Regions reported but never won: references (the ICV) and the whole brain, the
        denominator of every "% of total brain volume"."""
        return tuple(
            region.name for region in self.regions if region.reference or region.name == TOTAL_BRAIN
        )

    @property
    def head_size(self) -> str | None:
        """The first reference region (the intracranial volume): the divisor that makes
        baseline volumes head-size corrected features of the regressions; None without one."""
        return next((region.name for region in self.regions if region.reference), None)

    @cached_property
    def fingerprint(self) -> str:
        return hashlib.sha256(json.dumps(self.raw, sort_keys=True).encode()).hexdigest()[:16]

    def coefficients(self, names=None) -> np.ndarray:
        """(R, B) weights of the bases (:attr:`bases`) for ``names`` (default: every region)."""
        names = self.names if names is None else tuple(names)
        bases = self.bases
        matrix = np.zeros((len(names), len(bases)))
        for row, name in enumerate(names):
            region = self.get(name)
            weights = {region.name: 1.0} if region.tissue else region.weights
            for base, weight in weights.items():
                matrix[row, bases.index(base)] = weight
        return matrix

    def volumes(self, integrals: dict[str, float]) -> dict[str, float]:
        """Every region's volume from the integrals of the bases (same units)."""
        vector = np.array([integrals[base] for base in self.bases], dtype=np.float64)
        return dict(zip(self.names, (self.coefficients() @ vector).tolist(), strict=True))

    def maps(self, bases, names=None):
        """Region weight maps (R, ...) from base maps (B, ...) (numpy arrays or torch tensors).

        Summed term by term in a fixed order (no BLAS call, whose sums can depend on
        memory alignment), so equal inputs give bitwise-equal maps.
        """
        rows = []
        for weights in self.coefficients(names):
            total = bases[0] * 0.0
            for k in np.flatnonzero(weights):
                total = total + (bases[k] if weights[k] == 1.0 else bases[k] * float(weights[k]))
            rows.append(total)
        if isinstance(bases, np.ndarray):
            return np.stack(rows)
        import torch

        return torch.stack(rows)

    def directions(self, names) -> np.ndarray:
        """(R,) -1 / +1 / 0 of each named region (see :attr:`Region.direction`)."""
        return np.array([self.get(name).direction for name in names], dtype=np.float32)

    def mirrored(self, names) -> list[int]:
        """Index permutation of ``names`` that a left-right flip applies (partners swap)."""
        names = list(names)
        return [
            names.index(self.get(name).mirror) if self.get(name).mirror in names else k
            for k, name in enumerate(names)
        ]

    def mask_definitions(self, kind: str, own: dict | None = None, source: str = "") -> dict:
        """Mask definition of every deep region for a template ``kind`` (or a folder's own)."""
        table, where = (own, source) if own is not None else (self.masks.get(kind), self.source)
        if table is None:
            raise ConfigError(f"{self.source}: no [masks.{kind}] table for the deep regions")
        missing = [name for name in self.deep if name not in table]
        if missing:
            raise ConfigError(f"{where}: no mask for the deep region(s) {', '.join(missing)}")
        return {name: table[name] for name in self.deep}


def _region(name: str, spec, source: str) -> Region:
    where = f"{source} [regions.{name}]"
    if not isinstance(spec, dict):
        raise ConfigError(f"{where}: must be a table")
    check_keys(spec, _KEYS, where)
    for key in ("description", "change", "reference", "prior"):
        if key not in spec:
            raise ConfigError(f"{where} '{key}': missing key")
    if ("tissue" in spec) == ("sum" in spec):
        raise ConfigError(f"{where}: give exactly one of 'tissue' (deep region) or 'sum'")
    if spec["change"] not in CHANGES:
        raise ConfigError(
            f"{where} 'change': must be one of {', '.join(CHANGES)}, got {spec['change']!r}"
        )
    if "tissue" in spec and spec["tissue"] not in TISSUES:
        raise ConfigError(f"{where} 'tissue': must be one of {', '.join(TISSUES)}")
    for key in ("reference", "prior"):
        if not isinstance(spec[key], bool):
            raise ConfigError(f"{where} '{key}': must be true or false, got {spec[key]!r}")
    boundary = spec.get("boundary")
    if boundary is not None:
        boundary = _boundary(boundary, where)
    weights = spec.get("sum", {})
    if not isinstance(weights, dict) or any(
        isinstance(w, bool) or not isinstance(w, int | float) for w in weights.values()
    ):
        raise ConfigError(f"{where} 'sum': must be a table of numbers, e.g. {{ GM = 1.0 }}")
    return Region(
        name=name,
        description=str(spec["description"]),
        change=spec["change"],
        reference=spec["reference"],
        prior=spec["prior"],
        tissue=spec.get("tissue"),
        weights={base: float(w) for base, w in weights.items()},
        mirror=spec.get("mirror"),
        boundary=boundary,
    )


def _boundary(spec, where: str) -> Boundary:
    """A region's ``boundary`` table, checked (one-line ConfigError naming ``where``)."""
    keys = {"outside", "inside", "band_voxels", "trim"}
    if not isinstance(spec, dict) or not {"outside", "inside"} <= set(spec) <= keys:
        raise ConfigError(
            f"{where} 'boundary': must be {{ outside = TISSUE, inside = TISSUE"
            "[, band_voxels = N, trim = F] }"
        )
    if spec["outside"] not in TISSUES or spec["inside"] not in TISSUES:
        raise ConfigError(f"{where} 'boundary': tissues must be {', '.join(TISSUES)}")
    band = spec.get("band_voxels", Boundary.band_voxels)
    if isinstance(band, bool) or not isinstance(band, int) or band < 1:
        raise ConfigError(f"{where} 'boundary': band_voxels must be an integer >= 1, got {band!r}")
    trim = spec.get("trim", Boundary.trim)
    if isinstance(trim, bool) or not isinstance(trim, int | float) or not 0 <= trim < 0.5:
        raise ConfigError(f"{where} 'boundary': trim must be a number in [0, 0.5), got {trim!r}")
    return Boundary(spec["outside"], spec["inside"], band, float(trim))
