"""Templates: a T1 image with tissue priors, a brain mask and region definitions.

``mni152`` is the MNI152 2009a T1 with nilearn's shipped GM and WM maps (read
offline from nilearn's package data). A folder template (for example a
phantom cohort's ``derivatives/phantom-template``) holds::

    template_T1w.nii.gz, template_probseg-GM.nii.gz, template_probseg-WM.nii.gz,
    template_probseg-CSF.nii.gz, template_mask.nii.gz, template_dseg.nii.gz,
    labels.tsv [, regions.toml]

Its deep regions' masks come from its own ``regions.toml`` (one table per
region) when present, otherwise from ``[masks.phantom]`` of the regions file.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

import nibabel as nib
import numpy as np
from scipy import ndimage

from predictor.config import check_keys, read_toml
from predictor.errors import ConfigError
from predictor.regions import TISSUES, RegionSet


@dataclass(frozen=True)
class RegionSpec:
    """A deep region: tissue summed inside a template-space mask."""

    name: str
    tissue: str
    mask: np.ndarray  # bool, template grid
    description: str
    unmix_with: str | None = None  # partial volume against this neighbouring tissue
    grow_mm: float = 0.0  # grow the region through its tissue up to this far from the mask


@dataclass(frozen=True, eq=False)
class Template:
    """Template arrays on one RAS grid (affine: voxel -> mm)."""

    name: str
    t1: np.ndarray  # float32, white matter about 1 after normalisation by its WM mode
    priors: dict[str, np.ndarray]  # tissue -> probability (float32, same grid)
    brain_mask: np.ndarray  # bool
    affine: np.ndarray
    regions: tuple[RegionSpec, ...]  # the deep regions' masks, in region_set.deep order
    region_set: RegionSet

    @cached_property
    def checksum(self) -> str:
        """Content hash of the arrays and region masks (part of every cache key)."""
        digest = hashlib.sha256(self.name.encode())
        for array in (
            self.t1,
            *self.priors.values(),
            self.brain_mask,
            self.affine,
            *(region.mask for region in self.regions),
        ):
            digest.update(np.ascontiguousarray(array).tobytes())
        return digest.hexdigest()[:16]

    @property
    def voxel_mm(self) -> float:
        return float(np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0)).mean())


MASK_KEYS = ("box_mm", "labels", "dilate_mm", "grow_mm", "unmix_with", "description")


def _region_specs(
    regions: RegionSet, definitions: dict, affine: np.ndarray, shape, labels, source: str
) -> tuple[RegionSpec, ...]:
    """The deep regions' masks on the template grid, from their mask definitions."""
    index = np.indices(shape).reshape(3, -1).T
    world = index @ affine[:3, :3].T + affine[:3, 3]
    voxel = float(np.sqrt((affine[:3, :3] ** 2).sum(axis=0)).mean())
    specs = []
    for name, spec in definitions.items():
        where = f"{source} [{name}]"
        check_keys(spec, MASK_KEYS, where)
        if "box_mm" in spec:
            (x0, x1), (y0, y1), (z0, z1) = spec["box_mm"]
            inside = (
                (world[:, 0] >= x0)
                & (world[:, 0] <= x1)
                & (world[:, 1] >= y0)
                & (world[:, 1] <= y1)
                & (world[:, 2] >= z0)
                & (world[:, 2] <= z1)
            )
            mask = inside.reshape(shape)
        elif "labels" in spec:
            if labels is None:
                raise ConfigError(f"{where}: 'labels' given but the template has no label map")
            mask = np.isin(labels, spec["labels"])
        else:
            raise ConfigError(f"{where}: needs 'box_mm' or 'labels'")
        dilate = float(spec.get("dilate_mm", 0.0))
        if dilate > 0:
            mask = ndimage.binary_dilation(mask, iterations=max(1, int(round(dilate / voxel))))
        unmix = spec.get("unmix_with")
        if unmix is not None and unmix not in TISSUES:
            raise ConfigError(f"{where} 'unmix_with': must be GM, WM or CSF")
        specs.append(
            RegionSpec(
                name,
                regions.get(name).tissue,
                mask,
                spec.get("description", name),
                unmix,
                float(spec.get("grow_mm", 0.0)),
            )
        )
    return tuple(specs)


def load_mni152(regions: RegionSet) -> Template:
    """The MNI152 2009a template and tissue maps from nilearn's package data (offline)."""
    from nilearn import datasets

    t1_image = datasets.load_mni152_template(resolution=1)
    gm = datasets.load_mni152_gm_template(resolution=1).get_fdata(dtype=np.float32)
    wm = datasets.load_mni152_wm_template(resolution=1).get_fdata(dtype=np.float32)
    brain = datasets.load_mni152_brain_mask(resolution=1).get_fdata() > 0
    gm, wm = gm / max(gm.max(), 1e-6), wm / max(wm.max(), 1e-6)
    tissue = np.clip(gm + wm, 0, 1)
    csf = np.where(brain, np.clip(1 - tissue, 0, 1), 0).astype(np.float32)
    t1 = t1_image.get_fdata(dtype=np.float32)
    t1 = t1 / np.percentile(t1[wm > 0.9], 50)
    affine = t1_image.affine
    definitions = regions.mask_definitions("mni152")
    specs = _region_specs(regions, definitions, affine, t1.shape, None, regions.source)
    return Template(
        "mni152",
        t1,
        {"GM": gm, "WM": wm, "CSF": csf},
        brain | (tissue > 0.1),
        affine,
        specs,
        regions,
    )


def load_folder_template(folder: str | Path, regions: RegionSet) -> Template:
    """A template folder (see the module docstring), e.g. a phantom population template."""
    folder = Path(folder)
    if not (folder / "template_T1w.nii.gz").is_file():
        raise ConfigError(f"{folder}: not a template folder (template_T1w.nii.gz missing)")

    def read(name):
        path = folder / name
        if not path.is_file():
            raise ConfigError(f"{folder}: {name} missing")
        return nib.load(path)

    t1_image = read("template_T1w.nii.gz")
    t1 = t1_image.get_fdata(dtype=np.float32)
    priors = {
        tissue: read(f"template_probseg-{tissue}.nii.gz").get_fdata(dtype=np.float32)
        for tissue in TISSUES
    }
    t1 = t1 / np.percentile(t1[priors["WM"] > 0.9], 50)
    labels = np.asarray(read("template_dseg.nii.gz").dataobj)
    brain = np.asarray(read("template_mask.nii.gz").dataobj) > 0
    own = folder / "regions.toml"
    if own.is_file():
        definitions = regions.mask_definitions("phantom", read_toml(own), str(own))
        source = str(own)
    else:
        definitions, source = regions.mask_definitions("phantom"), regions.source
    specs = _region_specs(regions, definitions, t1_image.affine, t1.shape, labels, source)
    return Template(f"folder:{folder.name}", t1, priors, brain, t1_image.affine, specs, regions)


def load_template(spec: str | Path, regions: RegionSet) -> Template:
    """``'mni152'`` or the path of a template folder, with the masks of ``regions``."""
    if str(spec) == "mni152":
        return load_mni152(regions)
    return load_folder_template(spec, regions)
