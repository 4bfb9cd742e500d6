"""NIfTI input and output.

Conventions (used by every stage):

* After :func:`load_scan` a scan's array is float32 with shape ``(X, Y, Z)``
  in RAS+ voxel order: the file's axes are permuted and flipped (never
  resampled) so that increasing indices ``i, j, k`` move towards Right,
  Anterior and Superior. ``Scan.affine`` maps these indices to world mm.
* ``Scan`` remembers the file's own orientation, shape and header, so a
  result computed in RAS can be written back in the scan's own voxel order
  with the input's affine (:func:`save_like`).
* Every write is atomic (:mod:`predictor.files`).
"""

from __future__ import annotations

import gzip
import os
import zlib
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np
from nibabel import orientations

from predictor.errors import ScanError
from predictor.files import atomic_write

#: voxel sides outside this range (mm) are refused as implausible for a brain MRI
VOXEL_SIZE_RANGE_MM = (0.1, 12.0)
#: free-text header fields cleared on every write (they may identify a participant)
FREE_TEXT_FIELDS = ("descrip", "aux_file", "intent_name", "db_name")


@dataclass(frozen=True)
class Scan:
    """A 3D scan in RAS voxel order with what is needed to write back natively.

    Attributes
    ----------
    data : float32 array, shape (X, Y, Z), RAS voxel order
    affine : (4, 4) voxel-to-world (mm) matrix of ``data``
    native_affine : (4, 4) the file's own affine
    native_shape : the file's own 3D shape
    to_native : nibabel orientation transform from RAS order back to the file's
    header : the file's header (copied, free text removed)
    name : the file name only (never the full path, which may identify)
    """

    data: np.ndarray
    affine: np.ndarray
    native_affine: np.ndarray
    native_shape: tuple[int, int, int]
    to_native: np.ndarray
    header: nib.Nifti1Header
    name: str

    @property
    def voxel_size_mm(self) -> np.ndarray:
        """Voxel sides (mm) along the RAS array axes, shape (3,)."""
        return np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0))

    @property
    def voxel_volume_ml(self) -> float:
        """Volume of one voxel in mL (1 mL = 1000 mm^3)."""
        return float(abs(np.linalg.det(self.affine[:3, :3]))) / 1000.0


def _read_image(path: Path) -> nib.Nifti1Image:
    try:
        image = nib.load(path)
    except FileNotFoundError as error:
        raise ScanError(f"{path}: file not found") from error
    except (nib.filebasedimages.ImageFileError, OSError, EOFError, zlib.error, ValueError) as error:
        raise ScanError(f"{path}: not a readable NIfTI file ({_short(error)})") from error
    if not isinstance(image, nib.Nifti1Image | nib.Nifti2Image):
        raise ScanError(f"{path}: not a NIfTI-1 or NIfTI-2 image")
    return image


def _short(error: BaseException) -> str:
    text = str(error).splitlines()[0] if str(error) else type(error).__name__
    return text[:160]


def check_affine(affine: np.ndarray, source: str) -> None:
    """Raise ScanError unless ``affine`` is finite, invertible and has plausible voxel sizes."""
    if affine.shape != (4, 4) or not np.all(np.isfinite(affine)):
        raise ScanError(f"{source}: the affine has non-finite entries")
    linear = affine[:3, :3]
    sides = np.sqrt((linear**2).sum(axis=0))
    if abs(np.linalg.det(linear)) < 1e-9 or np.any(sides == 0):
        raise ScanError(f"{source}: the affine is singular (voxel axes are degenerate)")
    low, high = VOXEL_SIZE_RANGE_MM
    if np.any(sides < low) or np.any(sides > high):
        raise ScanError(
            f"{source}: voxel size {np.round(sides, 3).tolist()} mm is outside "
            f"the plausible range {low}-{high} mm"
        )


def load_scan(path: str | os.PathLike[str]) -> Scan:
    """Load a 3D NIfTI scan (``.nii`` or ``.nii.gz``, NIfTI-1 or -2) in RAS order.

    A 4D file with a single volume is accepted. Raises :class:`ScanError`
    naming the file for: an unreadable or truncated file, wrong dimensions,
    more than one volume, non-finite voxels, a singular or non-finite affine,
    implausible voxel sizes, and an empty or constant image.
    """
    path = Path(path)
    image = _read_image(path)
    shape = image.shape
    if len(shape) == 4 and shape[3] == 1:
        shape = shape[:3]
    elif len(shape) == 4:
        raise ScanError(f"{path}: has {shape[3]} volumes; give a single 3D volume")
    if len(shape) != 3:
        raise ScanError(f"{path}: is {len(image.shape)}D; a 3D volume is needed")
    if min(shape) < 2:
        raise ScanError(f"{path}: has shape {tuple(shape)}; at least 2 voxels per axis needed")
    check_affine(np.asarray(image.affine, dtype=float), str(path))
    try:
        data = np.asarray(image.dataobj, dtype=np.float32).reshape(shape)
    except (OSError, EOFError, zlib.error, ValueError, gzip.BadGzipFile) as error:
        raise ScanError(f"{path}: voxel data unreadable or truncated ({_short(error)})") from error
    if not np.all(np.isfinite(data)):
        count = int((~np.isfinite(data)).sum())
        raise ScanError(f"{path}: {count} voxels are NaN or infinite")
    if data.size == 0 or float(data.max()) == float(data.min()):
        raise ScanError(f"{path}: the image is empty or constant")

    native_ornt = orientations.io_orientation(image.affine)
    to_ras = orientations.ornt_transform(native_ornt, orientations.axcodes2ornt("RAS"))
    ras = orientations.apply_orientation(data, to_ras)
    ras_affine = image.affine @ orientations.inv_ornt_aff(to_ras, shape)
    header = image.header.copy()
    _clear_free_text(header)
    return Scan(
        data=np.ascontiguousarray(ras, dtype=np.float32),
        affine=ras_affine,
        native_affine=np.asarray(image.affine, dtype=float),
        native_shape=tuple(int(n) for n in shape),
        to_native=orientations.ornt_transform(orientations.axcodes2ornt("RAS"), native_ornt),
        header=header,
        name=path.name,
    )


def _clear_free_text(header) -> None:
    for field in FREE_TEXT_FIELDS:
        if field in header:
            header[field] = b""


def to_native_order(array: np.ndarray, scan: Scan) -> np.ndarray:
    """Reorder a RAS-order array (3D, or 4D with trailing components) into the scan's own order."""
    return orientations.apply_orientation(array, scan.to_native)


def save_like(
    array: np.ndarray, scan: Scan, path: str | os.PathLike[str], dtype=np.float32
) -> Path:
    """Write a RAS-order array in ``scan``'s own voxel order, shape and affine.

    ``array`` has shape ``scan.data.shape`` or that plus trailing vector
    components (written as a NIfTI vector image, intent ``vector``).
    """
    if array.shape[:3] != scan.data.shape:
        raise ValueError(f"array shape {array.shape[:3]} != scan shape {scan.data.shape}")
    native = np.asarray(to_native_order(array, scan), dtype=dtype)
    if native.ndim == 4:  # NIfTI stores vector components on the 5th axis
        native = native[:, :, :, np.newaxis, :]
    header = scan.header.copy()
    header.set_data_dtype(dtype)
    image = nib.Nifti1Image(native, scan.native_affine, header=header)
    image.header.set_qform(scan.native_affine, code=int(scan.header["qform_code"]) or 1)
    image.header.set_sform(scan.native_affine, code=int(scan.header["sform_code"]) or 1)
    if native.ndim == 5:
        image.header.set_intent("vector")
    image.header.set_slope_inter(1.0, 0.0)
    _clear_free_text(image.header)
    return atomic_write(path, lambda temporary: nib.save(image, temporary))


def save_array(
    array: np.ndarray, affine: np.ndarray, path: str | os.PathLike[str], dtype=np.float32
) -> Path:
    """Write a 3D array with a voxel-to-world affine (mm) as NIfTI-1, atomically."""
    image = nib.Nifti1Image(np.asarray(array, dtype=dtype), affine)
    image.header.set_qform(affine, code=1)
    image.header.set_sform(affine, code=1)
    if np.issubdtype(np.dtype(dtype), np.integer):
        image.header.set_slope_inter(1.0, 0.0)
    return atomic_write(path, lambda temporary: nib.save(image, temporary))
