"""Phantoms built from the MNI152 2009a template that nilearn ships (scenario kind "template").

A participant is the template deformed, in template millimetres, by

* ``S(x) = s D exp(u)(x)``: inter-subject variation, a random smooth
  stationary velocity field ``u`` and a head size ``s`` with per-axis
  stretch ``D``;
* ``A = exp(c v) o exp(c0 v0)``: atrophy. ``v`` is the participant's annual
  atrophy velocity and ``c`` the progression time of a visit (years, with
  the scenario's acceleration); ``exp(c0 v0)`` is the decline before
  baseline, along the field of the participant's *visible* rates only (so
  that the unobservable rate noise does not show at baseline).

Atrophy velocity: a prescribed-divergence, curl-free field ``v = grad phi``
with ``laplacian(phi) = a(x)``, ``a = sum_g lambda_g p_g(x)`` over the rate
regions' maps ``p_g``, so that ``div v = a`` and the local volume ratio of
``exp(c v)`` is about ``exp(c a)``. This is the potential-flow form of the
prescribed-atrophy deformation models (Khanal et al. 2016, NeuroImage, "A
biophysical model of brain deformation to simulate and analyze longitudinal
MRIs of patients with Alzheimer's disease", from memory): tissue shrinks at
its region's rate and the sulcal CSF takes up the volume it releases, so the
intracranial volume stays nearly fixed. ``lambda_g = log(1 + 2 r_g) / 2``
gives each region its two-year change ``2 r_g`` away from region borders.

Truth: the tissue maps and region masks are carried with the same
deformation; a region's volume is the integral of its pulled-back map over
the participant's space (``s**3 det D`` times the sum on the template grid,
by the change of variables ``a = s D x``). Regions are those of the
``mni152`` template kind in ``configs/regions.toml`` (boxes for the deep
regions), so the truth and ``predictor prepare --template mni152`` measure
the same things.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import torch
from scipy import fft, ndimage

from predictor.fields import compose, exp_velocity, identity_grid, sample_at
from predictor.phantoms.imaging import Pose, scanner_points
from predictor.phantoms.participants import Draw, expected_multiplier
from predictor.phantoms.scenario import FACTOR_OF, RATE_REGIONS, Scenario, Size

GRID_MM = 2.0  # the template grid every field lives on
MARGIN = 4  # voxels of padding around the template's own field of view
POISSON_PAD = 12  # further voxels of the Poisson domain (its zero boundary kept away)
SQUARINGS = 5  # scaling-and-squaring steps of the inter-subject warp (up to ~8 mm)
PROGRESSION_SQUARINGS = 4  # of the atrophy maps (a few mm: under 0.2 voxel per step)
#: map names of the carried maps, in channel order
MAPS = (
    "GM",
    "WM",
    "CSF",
    "hippocampus_left",
    "hippocampus_right",
    "ventricles",
)
#: atrophy source regions: the rate regions and the sulcal CSF that balances them
SOURCES = ("hippocampus", "ventricles", "cortical_gm", "wm", "sulcal_csf")


@dataclass(frozen=True, eq=False)
class TemplateBase:
    """The template on the padded 2 mm grid: T1, carried maps and atrophy potentials."""

    t1: torch.Tensor  # (1, 1, D, H, W), white matter 1
    maps: torch.Tensor  # (1, len(MAPS), D, H, W), fractions
    affine: np.ndarray  # voxel -> template mm
    centre_mm: np.ndarray  # brain centroid (template mm): the anatomical frame's origin
    gradients: torch.Tensor  # (S, 3, D, H, W): grad phi of each source, voxels per unit a
    divergences: torch.Tensor  # (S, D, H, W): their discrete divergence (per unit a)

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.t1.shape[2:])


def source_maps(maps: torch.Tensor) -> torch.Tensor:
    """Fraction maps (S, D, H, W) of the atrophy sources from carried maps (1, len(MAPS), ...)."""
    channel = {key: maps[0, k] for k, key in enumerate(MAPS)}
    hippocampi = channel["hippocampus_left"] + channel["hippocampus_right"]
    return torch.stack(
        [
            hippocampi,
            channel["ventricles"],
            channel["GM"] - hippocampi,
            channel["WM"],
            channel["CSF"] - channel["ventricles"],
        ]
    )


def mixing_matrix(sources: torch.Tensor, divergences: torch.Tensor) -> np.ndarray:
    """(S, S): mean over source region g of the divergence of source h's unit field.

    A carried map's volume changes at the rate of the divergence integrated over
    it (Reynolds transport), so this gives each region's initial rate of change.
    """
    flat_sources = sources.reshape(len(sources), -1).double()
    flat_divergences = divergences.reshape(len(divergences), -1).double()
    weighted = flat_sources @ flat_divergences.T
    return (weighted / flat_sources.sum(dim=1, keepdim=True)).numpy()


def _block_mean(array: np.ndarray, factor: int, pad: int) -> np.ndarray:
    """Mean over ``factor**3`` blocks (partial volume), zero-padded by ``pad`` coarse voxels."""
    shape = [-(-n // factor) * factor for n in array.shape]
    padded = np.zeros(shape, dtype=np.float32)
    padded[tuple(slice(0, n) for n in array.shape)] = array
    coarse = padded.reshape(
        shape[0] // factor, factor, shape[1] // factor, factor, shape[2] // factor, factor
    ).mean(axis=(1, 3, 5))
    return np.pad(coarse, pad)


def poisson_dirichlet(source: np.ndarray, spacing: float) -> np.ndarray:
    """``phi`` with the 7-point Laplacian of ``phi`` equal to ``source``, zero beyond the grid.

    Solved exactly by the type-I discrete sine transform (the eigenbasis of the
    Dirichlet Laplacian), as in standard fast Poisson solvers.
    """
    transformed = fft.dstn(source, type=1)
    eigen = 0.0
    for axis, n in enumerate(source.shape):
        k = np.arange(1, n + 1)
        shape = [1, 1, 1]
        shape[axis] = n
        eigen = eigen + (2.0 * np.cos(np.pi * k / (n + 1)) - 2.0).reshape(shape) / spacing**2
    return fft.idstn(transformed / eigen, type=1)


@lru_cache(maxsize=1)
def template_base() -> TemplateBase:
    """The MNI152 2009a template and maps from nilearn (offline), on the padded 2 mm grid."""
    from predictor.regions import RegionSet
    from predictor.templates import load_mni152

    template = load_mni152(RegionSet.from_toml())
    factor = int(round(GRID_MM / template.voxel_mm))
    masks = {spec.name: spec.mask.astype(np.float32) for spec in template.regions}
    fine = {
        "GM": template.priors["GM"],
        "WM": template.priors["WM"],
        "CSF": template.priors["CSF"],
        "hippocampus_left": template.priors["GM"] * masks["hippocampus_left"],
        "hippocampus_right": template.priors["GM"] * masks["hippocampus_right"],
        "ventricles": template.priors["CSF"] * masks["ventricles"],
    }
    maps = np.stack([_block_mean(fine[name], factor, MARGIN) for name in MAPS])
    t1 = _block_mean(template.t1 * template.brain_mask, factor, MARGIN)
    affine = template.affine @ np.diag([factor, factor, factor, 1.0])
    affine[:3, 3] -= MARGIN * GRID_MM * np.sign(np.diag(affine)[:3])
    index = np.argwhere(maps[:3].sum(axis=0) > 0.5)
    centre_mm = index.mean(axis=0) @ affine[:3, :3].T + affine[:3, 3]
    sources = source_maps(torch.from_numpy(maps)[None]).numpy()
    gradients = []
    for region in sources:
        phi = poisson_dirichlet(np.pad(region, POISSON_PAD).astype(np.float64), GRID_MM)
        inner = (slice(None),) + (slice(POISSON_PAD, -POISSON_PAD),) * 3
        gradients.append(np.stack(np.gradient(phi, GRID_MM))[inner] / GRID_MM)
    divergences = [sum(np.gradient(field[k], axis=k) for k in range(3)) for field in gradients]
    return TemplateBase(
        t1=torch.from_numpy(t1)[None, None],
        maps=torch.from_numpy(maps)[None],
        affine=affine,
        centre_mm=centre_mm,
        gradients=torch.from_numpy(np.stack(gradients).astype(np.float32)),
        divergences=torch.from_numpy(np.stack(divergences).astype(np.float32)),
    )


def atrophy_rates(sources: torch.Tensor, divergences: torch.Tensor, rates: dict) -> np.ndarray:
    """Source strengths ``lambda`` (S,), per year, for two-year changes ``2 r`` of ``sources``.

    Each rate region's mean divergence (through the mixing matrix of the
    anatomy the field acts on) is ``log(1 + 2 r) / 2``, and the divergence
    integrates to zero over the brain: the sulcal CSF takes up what the
    other regions release.
    """
    mixing = mixing_matrix(sources, divergences)
    volumes = sources.reshape(len(sources), -1).double().sum(dim=1).numpy()
    system = np.zeros_like(mixing)
    target = np.zeros(len(SOURCES))
    for g, region in enumerate(RATE_REGIONS):
        system[g] = mixing[SOURCES.index(region)]
        target[g] = np.log1p(2.0 * rates[region]) / 2.0
    system[-1] = volumes @ mixing
    return np.linalg.solve(system, target)


def velocity(base: TemplateBase, strengths: np.ndarray) -> torch.Tensor:
    """Annual atrophy velocity (1, 3, D, H, W), voxels per year, of source strengths (S,)."""
    weights = torch.from_numpy(strengths.astype(np.float32)).view(-1, 1, 1, 1, 1)
    return (weights * base.gradients).sum(dim=0, keepdim=True)


def visible_rates(scenario: Scenario, draw: Draw) -> dict[str, float]:
    """Each rate region's rate with the hidden noise averaged out (its conditional mean)."""
    return {
        region: scenario.rates[region][draw.diagnosis]
        * draw.age_factor
        * expected_multiplier(scenario, draw.deviations[FACTOR_OF[region]])
        * draw.carrier_factor
        for region in RATE_REGIONS
    }


def progression_time(draw: Draw, years: float) -> float:
    """Progression time ``c`` of a visit: ``t (1 + k (t - 2) / 2)`` (years)."""
    return years * (1.0 + draw.acceleration * (years - 2.0) / 2.0)


@dataclass(frozen=True, eq=False)
class Subject:
    """One participant built from the template: its warps on the template grid."""

    base: TemplateBase
    linear: np.ndarray  # s D (3,): head size times per-axis stretch
    inverse_subject: torch.Tensor  # displacement of exp(-u), voxels
    before_baseline: torch.Tensor  # displacement of exp(-c0 v0), voxels
    velocity: torch.Tensor  # v, voxels per year
    expected_velocity: torch.Tensor  # v with the hidden noise averaged out
    draw: Draw

    @classmethod
    def build(cls, scenario: Scenario, draw: Draw, rng: np.random.Generator) -> Subject:
        spec, own = scenario.anatomy, scenario.template_anatomy
        base = template_base()
        scale = rng.normal(1.0, spec["head_size_sd"])
        if draw.sex == "M":
            scale *= spec["male_linear_scale"]
        linear = scale * rng.normal(1.0, spec["axis_sd"], 3)
        noise = rng.normal(size=(3,) + base.shape)
        sigma = own["subject_warp_smoothness_mm"] / GRID_MM
        smooth = np.stack([ndimage.gaussian_filter(c, sigma) for c in noise])
        rms = np.sqrt((smooth**2).sum(axis=0).mean())
        field = smooth * (own["subject_warp_mm"] / GRID_MM / max(rms, 1e-12))
        subject_velocity = torch.from_numpy(field.astype(np.float32))[None]
        visible = visible_rates(scenario, draw)
        template_sources = source_maps(base.maps)
        exposure = own["baseline_exposure_years"][draw.diagnosis]
        before = velocity(base, atrophy_rates(template_sources, base.divergences, visible))
        before_baseline = exp_velocity(before, -exposure, PROGRESSION_SQUARINGS)
        # the progression acts on the baseline anatomy: calibrate on its own maps
        baseline = source_maps(sample_at(base.maps, identity_grid(base.shape) + before_baseline))
        return cls(
            base=base,
            linear=linear,
            inverse_subject=exp_velocity(subject_velocity, -1.0, SQUARINGS),
            before_baseline=before_baseline,
            velocity=velocity(base, atrophy_rates(baseline, base.divergences, draw.rates)),
            expected_velocity=velocity(base, atrophy_rates(baseline, base.divergences, visible)),
            draw=draw,
        )

    def pullback(self, years: float, expected: bool = False) -> torch.Tensor:
        """Displacement on the template grid from the participant at ``years`` to the template.

        ``expected=True`` uses the velocity without the hidden noise (the floor).
        """
        field = self.expected_velocity if expected else self.velocity
        progression = exp_velocity(
            field, -progression_time(self.draw, years), PROGRESSION_SQUARINGS
        )
        return compose(compose(self.before_baseline, progression), self.inverse_subject)

    def volumes_ml(self, displacement: torch.Tensor) -> dict[str, float]:
        """Region volumes (mL) of the participant under a pullback displacement."""
        return carried_volumes_ml(self.base, displacement, self.linear)

    def visit(self, years: float, size: Size, pose: Pose) -> tuple:
        """Clean T1 (white matter 1) and labels on a scan's grid, true and floor volumes (mL).

        Labels follow the geometric phantoms' numbering: the tissue with the
        largest fraction, split into the template's deep regions.
        """
        displacement = self.pullback(years)
        anatomical = pose.to_anatomy(scanner_points(size))
        image, labels = self._render(displacement, anatomical)
        truth = self.volumes_ml(displacement)
        best = self.volumes_ml(self.pullback(years, expected=True))
        return image.reshape(size.shape), labels.reshape(size.shape), truth, best

    def _render(self, displacement: torch.Tensor, anatomical: np.ndarray) -> tuple:
        base = self.base
        template_mm = anatomical / self.linear + base.centre_mm
        voxel = (template_mm - base.affine[:3, 3]) @ np.linalg.inv(base.affine[:3, :3]).T
        location = torch.from_numpy(voxel.T.astype(np.float32)).view(1, 3, -1, 1, 1)
        moved = location + sample_at(displacement, location)
        image = sample_at(base.t1, moved, padding="zeros")[0, 0, :, 0, 0].numpy()
        carried = sample_at(base.maps, moved, padding="zeros")[0, :, :, 0, 0].numpy()
        return image, labels_from_maps(carried, template_mm[:, 0] < base.centre_mm[0])


def carried_volumes_ml(
    base: TemplateBase, displacement: torch.Tensor, linear: np.ndarray
) -> dict[str, float]:
    """Region volumes (mL): the template maps pulled back through ``displacement`` (voxels),
    integrated, times the Jacobian ``prod(linear)`` of the linear part."""
    carried = sample_at(base.maps, identity_grid(base.shape) + displacement)[0]
    totals = carried.double().sum(dim=(1, 2, 3)).numpy()
    scale = float(np.prod(linear)) * GRID_MM**3 / 1000.0
    ml = {name: float(total) * scale for name, total in zip(MAPS, totals, strict=True)}
    hippocampi = ml["hippocampus_left"] + ml["hippocampus_right"]
    return {
        "hippocampus_left": ml["hippocampus_left"],
        "hippocampus_right": ml["hippocampus_right"],
        "ventricles": ml["ventricles"],
        "cortical_gm": ml["GM"] - hippocampi,
        "total_gm": ml["GM"],
        "wm": ml["WM"],
        "brain": ml["GM"] + ml["WM"],
        "csf": ml["CSF"],
        "icv": ml["GM"] + ml["WM"] + ml["CSF"],
    }


def labels_from_maps(carried: np.ndarray, left: np.ndarray) -> np.ndarray:
    """Label (geometric phantoms' numbering) of each point from carried maps (len(MAPS), N)."""
    gm, wm, csf, hippocampus_left, hippocampus_right, ventricles = carried
    tissue = np.argmax(np.stack([csf, gm, wm]), axis=0) + 1  # 1 csf, 2 gm, 3 wm
    labels = np.where(gm + wm + csf > 0.5, tissue, 0).astype(np.uint8)
    labels[(labels == 2) & (hippocampus_left > gm / 2)] = 4
    labels[(labels == 2) & (hippocampus_right > gm / 2)] = 5
    in_ventricle = (labels == 1) & (ventricles > csf / 2)
    labels[in_ventricle & left] = 6
    labels[in_ventricle & ~left] = 7
    return labels
