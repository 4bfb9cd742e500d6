"""Phantom anatomy as layered implicit shapes, and its progression deformation.

Frame: anatomical millimetres, RAS, origin at the brain centre. With the
intracranial semi-axes ``A`` (mm), a point ``x`` has normalised coordinates
``p = x / A``, normalised radius ``rho = |p|``, direction ``u = p / rho`` and
volume coordinate ``q = rho**3``. Inside one cone of directions the volume
between ``q1`` and ``q2`` is ``det(A) / 3 * (q2 - q1) * dOmega``, so a map that
is affine in ``q`` inside a layer changes that layer's volume by exactly its
slope, whatever the (folded) shape of the layer. The phantom uses this twice:

* radially, per direction: ventricles ``q < q_v(u)``, white matter up to
  ``q_w(u)``, cortical grey matter up to the folded pial surface ``q_p(u)``,
  sulcal CSF up to the inner skull ``q = 1``;
* locally, around each hippocampus (an ellipsoid inside the white-matter
  layer), in the hippocampus' own volume coordinate.

The progression at horizon ``t`` years is a piecewise-affine map in these
volume coordinates (continuous, strictly increasing, hence invertible), so
each region's true volume follows its configured rate exactly; the label at a
follow-up point ``y`` is the baseline label at ``pullback(y)``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

#: label values of the phantom label maps
LABELS = {
    0: "background",
    1: "csf",
    2: "cortical_gm",
    3: "wm",
    4: "hippocampus_left",
    5: "hippocampus_right",
    6: "ventricle_left",
    7: "ventricle_right",
    8: "skull",
    9: "scalp",
}
LABEL_CSF = 1
GM_LABELS = (2, 4, 5)
WM_LABELS = (3,)
CSF_LABELS = (1, 6, 7)
QUADRATURE_POINTS = 60_000  # relative volume error about 1e-6 (checked against 800,000)


def row_norm(points: np.ndarray) -> np.ndarray:
    """Euclidean norm of each row of an (N, 3) array."""
    return np.sqrt(np.einsum("ij,ij->i", points, points))


def fibonacci_sphere(count: int) -> np.ndarray:
    """``count`` nearly uniform unit vectors, shape (count, 3) (golden-angle spiral)."""
    index = np.arange(count) + 0.5
    z = 1.0 - 2.0 * index / count
    radius = np.sqrt(1.0 - z**2)
    angle = np.pi * (3.0 - np.sqrt(5.0)) * index
    return np.stack([radius * np.cos(angle), radius * np.sin(angle), z], axis=1)


def piecewise_linear(values: np.ndarray, source: np.ndarray, target: np.ndarray) -> np.ndarray:
    """Map ``values`` (N,) through per-point knots ``source`` -> ``target`` (N, K).

    Knots increase along axis 1; beyond the last knot the map is the identity
    (callers make ``source[:, -1] == target[:, -1]``).
    """
    out = values.copy()
    for j in range(source.shape[1] - 1, 0, -1):
        low, high = source[:, j - 1], source[:, j]
        inside = values <= high
        slope = (target[:, j] - target[:, j - 1]) / np.maximum(high - low, 1e-12)
        out = np.where(inside, target[:, j - 1] + (values - low) * slope, out)
    return out


def ray_exit(directions: np.ndarray, centre: np.ndarray, semi_axes: np.ndarray) -> np.ndarray:
    """Distance along each unit direction (N, 3) from the origin to where it leaves an ellipsoid.

    The ellipsoid must contain the origin, so every ray leaves it exactly once.
    """
    d = directions / semi_axes
    m = centre / semi_axes
    a = (d**2).sum(axis=1)
    b = d @ m
    c = float(m @ m) - 1.0
    return (b + np.sqrt(b**2 - a * c)) / a


@dataclass(frozen=True, eq=False)
class Hippocampus:
    """An ellipsoid in the anatomical frame (mm); ``rotation`` columns are its axes."""

    centre: np.ndarray
    semi_axes: np.ndarray
    rotation: np.ndarray
    reach: float
    label: int

    def local(self, points: np.ndarray) -> np.ndarray:
        """Coordinates (N, 3) in units of the semi-axes; inside where the norm <= 1."""
        return (points - self.centre) @ self.rotation / self.semi_axes

    def near(self, points: np.ndarray, reach: float) -> np.ndarray:
        """Indices of the points within a bounding sphere of the ellipsoid scaled by ``reach``."""
        offset = points - self.centre
        bound = (reach * float(self.semi_axes.max())) ** 2
        return np.flatnonzero(np.einsum("ij,ij->i", offset, offset) <= bound)

    def from_local(self, local: np.ndarray) -> np.ndarray:
        return self.centre + (local * self.semi_axes) @ self.rotation.T

    @property
    def volume_mm3(self) -> float:
        return 4.0 / 3.0 * np.pi * float(np.prod(self.semi_axes))


@dataclass(frozen=True, eq=False)
class Anatomy:
    """One participant's baseline anatomy (all lengths in mm unless 'normalised')."""

    semi_axes: np.ndarray  # intracranial ellipsoid (3,)
    skull_mm: float
    scalp_mm: float
    pial_radius: float  # normalised
    sulcal_depth: float  # normalised
    sulcal_width: float  # in units of the folding field
    cortex_thickness: float  # normalised
    wave_directions: np.ndarray  # (J, 3) unit vectors
    wave_phases: np.ndarray  # (J,) radians
    frequency: float
    ventricle_centres: np.ndarray  # (2, 3) mm, both ellipsoids contain the origin
    ventricle_semi_axes: np.ndarray  # (2, 3) mm
    hippocampi: tuple[Hippocampus, Hippocampus]
    quadrature: np.ndarray = field(default_factory=lambda: fibonacci_sphere(QUADRATURE_POINTS))

    # --- radial layers (functions of the direction u, shape (N, 3)) ------------
    def sulcus(self, directions: np.ndarray) -> np.ndarray:
        """Sulcal indicator in [0, 1]: 1 at the fundus of a sulcus, shape (N,)."""
        waves = np.cos(self.frequency * directions @ self.wave_directions.T + self.wave_phases)
        field_value = waves.sum(axis=1) * np.sqrt(2.0 / len(self.wave_phases))
        return np.exp(-((field_value / self.sulcal_width) ** 2))

    def layer_knots(self, directions: np.ndarray) -> np.ndarray:
        """Volume coordinates (N, 4) of the ventricle, white/grey, pial and skull surfaces."""
        pial = self.pial_radius - self.sulcal_depth * self.sulcus(directions)
        white = pial - self.cortex_thickness
        ventricle = np.max(
            [
                ray_exit(directions, c / self.semi_axes, s / self.semi_axes)
                for c, s in zip(self.ventricle_centres, self.ventricle_semi_axes, strict=True)
            ],
            axis=0,
        )
        ones = np.ones(len(directions))
        return np.stack([ventricle**3, white**3, pial**3, ones], axis=1)

    def polar(self, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Volume coordinate q (N,) and direction u (N, 3) of anatomical points (N, 3) mm."""
        normalised = points / self.semi_axes
        radius = row_norm(normalised)
        directions = normalised / np.maximum(radius, 1e-12)[:, None]
        directions[radius < 1e-12] = (1.0, 0.0, 0.0)
        return radius**3, directions

    def from_polar(self, q: np.ndarray, directions: np.ndarray) -> np.ndarray:
        return np.cbrt(q)[:, None] * directions * self.semi_axes

    # --- labels -----------------------------------------------------------------
    def labels(self, points: np.ndarray, knots: np.ndarray | None = None) -> np.ndarray:
        """Baseline label (see :data:`LABELS`) at anatomical points (N, 3) mm, uint8 (N,).

        ``knots`` (N, 4), when given, are the layer knots of the points' directions
        (rows of points outside the skull are ignored); they are computed otherwise.
        """
        label = np.zeros(len(points), dtype=np.uint8)
        skull = row_norm(points / (self.semi_axes + self.skull_mm)) <= 1
        head = row_norm(points / (self.semi_axes + self.skull_mm + self.scalp_mm))
        label[head <= 1] = 9
        label[skull] = 8
        q, directions = self.polar(points)
        inside = np.flatnonzero(q <= 1)
        knots = self.layer_knots(directions[inside]) if knots is None else knots[inside]
        qi = q[inside]
        inner = np.full(len(inside), 1, dtype=np.uint8)
        inner[qi <= knots[:, 2]] = 2
        inner[qi <= knots[:, 1]] = 3
        ventricle = qi <= knots[:, 0]
        inner[ventricle] = np.where(points[inside, 0][ventricle] < 0, 6, 7)
        for hippocampus in self.hippocampi:
            near = hippocampus.near(points[inside], 1.0)
            local = hippocampus.local(points[inside][near])
            inner[near[row_norm(local) <= 1]] = hippocampus.label
        label[inside] = inner
        return label

    # --- volumes (mL) by quadrature over the sphere ---------------------------------
    @cached_property
    def _quadrature_knots(self) -> np.ndarray:
        return self.layer_knots(self.quadrature)

    def _cone_volume_ml(self, inner: np.ndarray, outer: np.ndarray, where=None) -> float:
        thickness = outer - inner if where is None else np.where(where, outer - inner, 0.0)
        return float(np.prod(self.semi_axes)) / 3.0 * 4.0 * np.pi * thickness.mean() / 1000.0

    @cached_property
    def baseline_volumes_ml(self) -> dict[str, float]:
        """True baseline volumes (mL) of every region, from the shapes themselves."""
        k = self._quadrature_knots
        zero = np.zeros(len(k))
        left = self.quadrature[:, 0] < 0
        hippocampus = {h.label: h.volume_mm3 / 1000.0 for h in self.hippocampi}
        layer = self._cone_volume_ml(k[:, 0], k[:, 1])
        return {
            "hippocampus_left": hippocampus[4],
            "hippocampus_right": hippocampus[5],
            "ventricle_left": self._cone_volume_ml(zero, k[:, 0], left),
            "ventricle_right": self._cone_volume_ml(zero, k[:, 0], ~left),
            "wm_layer": layer,
            "wm": layer - sum(hippocampus.values()),
            "cortical_gm": self._cone_volume_ml(k[:, 1], k[:, 2]),
            "sulcal_csf": self._cone_volume_ml(k[:, 2], k[:, 3]),
            "icv": 4.0 / 3.0 * np.pi * float(np.prod(self.semi_axes)) / 1000.0,
        }

    def check_layout(self, samples: int = 4000) -> None:
        """Raise ValueError unless each hippocampus' reach lies inside the white matter."""
        sphere = fibonacci_sphere(samples)
        for hippocampus in self.hippocampi:
            surface = hippocampus.from_local(sphere * hippocampus.reach)
            q, directions = self.polar(surface)
            knots = self.layer_knots(directions)
            margin = 0.02
            if np.any(q <= knots[:, 0] * (1 + margin)) or np.any(q >= knots[:, 1] * (1 - margin)):
                raise ValueError(
                    f"hippocampus label {hippocampus.label}: its deformation reach "
                    "leaves the white matter; shrink 'hippocampus_reach' or move it"
                )


@dataclass(frozen=True, eq=False)
class Progression:
    """Slopes of the progression map at one horizon (all volume ratios, follow-up/baseline).

    The white-matter layer (white matter and the hippocampi in it) scales
    radially by ``wm_layer``. Inside it, each hippocampus scales in its own
    volume coordinate by ``hippocampi``: when that local ratio is below 1 the
    hippocampus shrinks in place and cerebrospinal fluid fills the shell it
    leaves (the surrounding white matter does not grow); when above 1 (a
    hippocampus declining more slowly than the white matter around it) it
    grows into a shell reaching ``reach`` that is compressed to make room.
    """

    anatomy: Anatomy
    ventricles: float
    wm_layer: float
    cortical_gm: float
    hippocampi: tuple[float, float]  # local ratio inside each hippocampus (before wm_layer)
    ratios: dict[str, float]  # follow-up/baseline volume of each rate region

    @classmethod
    def at(cls, anatomy: Anatomy, ratios: dict[str, float]) -> Progression:
        """Slopes that give each rate region its follow-up/baseline volume ratio exactly.

        ``ratios`` maps 'hippocampus', 'ventricles', 'cortical_gm' and 'wm' to
        positive volume ratios.
        """
        if min(ratios.values()) <= 0:
            raise ValueError("a region vanishes")
        volumes = anatomy.baseline_volumes_ml
        hippocampus_total = volumes["hippocampus_left"] + volumes["hippocampus_right"]
        hippocampus, wm = ratios["hippocampus"], ratios["wm"]
        # the layer keeps its white matter's ratio unless a hippocampus outgrows it
        wm_layer = (volumes["wm"] * wm + hippocampus_total * max(hippocampus, wm)) / volumes[
            "wm_layer"
        ]
        progression = cls(
            anatomy=anatomy,
            ventricles=ratios["ventricles"],
            wm_layer=wm_layer,
            cortical_gm=ratios["cortical_gm"],
            hippocampi=(hippocampus / wm_layer,) * 2,
            ratios=dict(ratios),
        )
        moved = progression.moved_knots(anatomy._quadrature_knots)
        if np.any(np.diff(moved, axis=1) <= 0):
            raise ValueError("the progression leaves no room for sulcal CSF")
        return progression

    def moved_knots(self, knots: np.ndarray) -> np.ndarray:
        """Where the baseline layer knots (N, 4) lie at this horizon."""
        ventricle = knots[:, 0] * self.ventricles
        white = ventricle + (knots[:, 1] - knots[:, 0]) * self.wm_layer
        pial = white + (knots[:, 2] - knots[:, 1]) * self.cortical_gm
        return np.stack([ventricle, white, pial, knots[:, 3]], axis=1)

    def _radial(self, points: np.ndarray, forward: bool) -> tuple[np.ndarray, np.ndarray]:
        """Points moved along their rays, and the layer knots of their directions (N, 4).

        The map keeps every direction, so the knots hold for the moved points too
        (rows outside the skull are zero).
        """
        anatomy = self.anatomy
        q, directions = anatomy.polar(points)
        out = points.copy()
        inside = np.flatnonzero(q < 1)
        base = anatomy.layer_knots(directions[inside])
        zeros = np.zeros((len(inside), 1))
        source = np.hstack([zeros, base])
        target = np.hstack([zeros, self.moved_knots(base)])
        if not forward:
            source, target = target, source
        mapped = piecewise_linear(q[inside], source, target)
        out[inside] = anatomy.from_polar(mapped, directions[inside])
        knots = np.zeros((len(points), 4))
        knots[inside] = base
        return out, knots

    def _local(self, points: np.ndarray, forward: bool) -> tuple[np.ndarray, np.ndarray]:
        """Points moved by the hippocampal maps; and which follow-up points were vacated."""
        out = points.copy()
        vacated = np.zeros(len(points), dtype=bool)
        for hippocampus, ratio in zip(self.anatomy.hippocampi, self.hippocampi, strict=True):
            reach = hippocampus.reach if ratio > 1 else 1.0
            candidates = hippocampus.near(out, reach)
            local = hippocampus.local(out[candidates])
            radius = row_norm(local)
            keep = radius < reach
            near, local = candidates[keep], local[keep]
            if len(near) == 0:
                continue
            q = radius[keep] ** 3
            if ratio > 1:
                source = np.tile([0.0, 1.0, reach**3], (len(near), 1))
                target = np.tile([0.0, ratio, reach**3], (len(near), 1))
                if not forward:
                    source, target = target, source
                mapped = piecewise_linear(q, source, target)
            elif forward:
                mapped = q * ratio
            else:
                vacated[near[q >= ratio]] = True
                mapped = np.minimum(q / ratio, 1.0)
            scale = np.cbrt(mapped / np.maximum(q, 1e-30))
            out[near] = hippocampus.from_local(local * scale[:, None])
        return out, vacated

    def forward(self, points: np.ndarray) -> np.ndarray:
        """Baseline anatomical points (N, 3) mm -> where they are at this horizon."""
        return self._radial(self._local(points, forward=True)[0], forward=True)[0]

    def pullback(self, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Follow-up points (N, 3) mm -> the baseline points they came from.

        Also returns which follow-up points lie where a hippocampus has shrunk
        away (bool, N): those came from no baseline point and hold CSF.
        """
        return self._local(self._radial(points, forward=False)[0], forward=False)

    def labels(self, points: np.ndarray) -> np.ndarray:
        """Follow-up label (see :data:`LABELS`) at anatomical points (N, 3) mm, uint8 (N,)."""
        along_rays, knots = self._radial(points, forward=False)
        origin, vacated = self._local(along_rays, forward=False)
        moved = np.flatnonzero(np.any(origin != along_rays, axis=1))
        knots[moved] = self.anatomy.layer_knots(self.anatomy.polar(origin[moved])[1])
        label = self.anatomy.labels(origin, knots)
        label[vacated] = LABEL_CSF
        return label

    def volumes_ml(self) -> dict[str, float]:
        """True raw compartment volumes (mL) at this horizon, exact by construction."""
        return raw_volumes_at(self.anatomy.baseline_volumes_ml, self.ratios)


def raw_volumes_at(base: dict[str, float], ratios: dict[str, float]) -> dict[str, float]:
    """Raw compartment volumes (mL) when each rate region has changed by ``ratios``.

    ``base`` is :attr:`Anatomy.baseline_volumes_ml`; ``ratios`` maps
    'hippocampus', 'ventricles', 'cortical_gm' and 'wm' to follow-up/baseline.
    Sulcal CSF (with the CSF where hippocampi shrank) fills what the others
    leave inside the fixed skull.
    """
    left = base["hippocampus_left"] * ratios["hippocampus"]
    right = base["hippocampus_right"] * ratios["hippocampus"]
    wm = base["wm"] * ratios["wm"]
    cortical = base["cortical_gm"] * ratios["cortical_gm"]
    ventricle_left = base["ventricle_left"] * ratios["ventricles"]
    ventricle_right = base["ventricle_right"] * ratios["ventricles"]
    return {
        "hippocampus_left": left,
        "hippocampus_right": right,
        "ventricle_left": ventricle_left,
        "ventricle_right": ventricle_right,
        "wm": wm,
        "cortical_gm": cortical,
        "sulcal_csf": base["icv"] - ventricle_left - ventricle_right - wm - left - right - cortical,
        "icv": base["icv"],
    }


def region_volumes(raw: dict[str, float]) -> dict[str, float]:
    """Reported regions (mL) from the phantom's raw compartments (mL)."""
    total_gm = raw["cortical_gm"] + raw["hippocampus_left"] + raw["hippocampus_right"]
    ventricles = raw["ventricle_left"] + raw["ventricle_right"]
    return {
        "hippocampus_left": raw["hippocampus_left"],
        "hippocampus_right": raw["hippocampus_right"],
        "ventricles": ventricles,
        "cortical_gm": raw["cortical_gm"],
        "total_gm": total_gm,
        "wm": raw["wm"],
        "brain": total_gm + raw["wm"],
        "csf": raw["sulcal_csf"] + ventricles,
        "icv": raw["icv"],
    }
