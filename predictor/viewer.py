"""Progression viewer: a self-contained HTML page that opens offline, and a GIF for slides.

The page (``predictor/web/viewer.html``) shows three orthogonal planes that move
by click or slider, a slider over horizons (the baseline and each forecast
horizon, precomputed frames), a choice of scan, difference (forecast - baseline),
log-Jacobian or, for an ensemble, the members' log-Jacobian SD, each with a
colour bar in its units, and the regional trajectory figure with its bands. All
data are inside the page (zlib-compressed bytes in base64, inflated by the
browser's DecompressionStream): no external address, no server.

Volumes are shrunk for the page by averaging blocks of voxels, along each axis
the smallest whole number of voxels that brings that side to at most
:data:`MAX_SIDE` (so thick slices are kept; the forecast NIfTIs keep the scan's
resolution), and quantised to bytes: the
scans share one intensity window (0 to the 99.5th percentile of the baseline
brain), the log-Jacobian a symmetric range, the SD a range from 0.
"""

from __future__ import annotations

import base64
import io
import json
import zlib
from dataclasses import dataclass
from importlib import resources
from pathlib import Path

import numpy as np

from predictor.cautions import CAUTION
from predictor.figures import PLANE_AXES, planes

#: largest side (voxels) of a volume in the page
MAX_SIDE = 128
#: the difference view's colour range, as a share of the intensity window (+-)
DIFFERENCE_RANGE = 0.25
VIEWER = "desc-forecast_viewer.html"
ANIMATION = "desc-forecast_progression.gif"


@dataclass(frozen=True)
class Frame:
    """One horizon: years (0 for the baseline) and its (X, Y, Z) arrays in RAS order."""

    years: float
    image: np.ndarray
    log_jacobian: np.ndarray | None = None
    log_jacobian_sd: np.ndarray | None = None


def block_size(shape) -> tuple[int, int, int]:
    """The block of :func:`shrink` for a volume of ``shape``: voxels along each axis."""
    return tuple(max(1, int(np.ceil(n / MAX_SIDE))) for n in shape)


def shrink(volume: np.ndarray, block) -> np.ndarray:
    """The mean of each ``block`` (voxels per axis; the last partial block dropped)."""
    kx, ky, kz = block
    x, y, z = (n // k for n, k in zip(volume.shape, block, strict=True))
    blocks = np.asarray(volume[: x * kx, : y * ky, : z * kz], dtype=np.float32)
    return blocks.reshape(x, kx, y, ky, z, kz).mean(axis=(1, 3, 5))


def quantise(volume: np.ndarray, low: float, high: float) -> np.ndarray:
    """Bytes 0-255 spanning ``low``-``high`` (values outside are clipped)."""
    scaled = (np.asarray(volume, dtype=np.float64) - low) / max(high - low, 1e-12)
    return np.round(255 * np.clip(scaled, 0.0, 1.0)).astype(np.uint8)


def packed(volume: np.ndarray) -> str:
    """(X, Y, Z) bytes, C order, zlib-compressed and base64-encoded for the page."""
    return base64.b64encode(zlib.compress(np.ascontiguousarray(volume).tobytes(), 6)).decode()


def window(baseline: np.ndarray, brain: np.ndarray) -> float:
    """Top of the shared intensity window: the baseline brain's 99.5th percentile."""
    values = baseline[brain] if brain.any() else baseline.ravel()
    return max(float(np.percentile(values, 99.5)), 1e-6)


def page_data(
    baseline: np.ndarray,
    voxel_mm,
    frames: list[Frame],
    brain: np.ndarray,
    title: str,
    trajectory_png: bytes | None = None,
) -> dict:
    """Everything the page shows, as JSON-ready values (see the module docstring)."""
    k = block_size(baseline.shape)
    top = window(baseline, brain)
    mask = shrink(brain, k) > 0.5
    sample = brain & (np.arange(brain.size).reshape(brain.shape) % 7 == 0)  # for the ranges
    jacobians = [np.abs(f.log_jacobian[sample]) for f in frames if f.log_jacobian is not None]
    jacobian_limit = max(float(np.percentile(np.concatenate(jacobians), 99.5)), 1e-3) if (
        jacobians and jacobians[0].size
    ) else 0.05
    sds = [f.log_jacobian_sd[sample] for f in frames if f.log_jacobian_sd is not None]
    sd_limit = max(float(np.percentile(np.concatenate(sds), 99.5)), 1e-4) if sds else 0.0
    blocks = []
    for frame in [Frame(0.0, baseline), *frames]:
        block = {"years": round(frame.years, 2),
                 "scan": packed(quantise(shrink(frame.image, k), 0.0, top))}  # fmt: skip
        if frame.log_jacobian is not None:
            jacobian = shrink(frame.log_jacobian, k)
            block["jacobian"] = packed(quantise(jacobian, -jacobian_limit, jacobian_limit))
        if frame.log_jacobian_sd is not None:
            sd = shrink(frame.log_jacobian_sd, k)
            block["sd"] = packed(quantise(sd, 0.0, sd_limit))
        blocks.append(block)
    spacing = np.asarray(voxel_mm, dtype=float) * np.asarray(k)
    centre = np.argwhere(mask).mean(axis=0) if mask.any() else np.array(mask.shape) / 2
    return {
        "title": title,
        "caution": CAUTION,
        "shape": list(mask.shape),
        "spacing_mm": [round(float(s), 4) for s in spacing],
        "zoom": round(320.0 / float(max(np.asarray(mask.shape) * spacing)), 4),
        "centre": [int(round(c)) for c in centre],
        "mask": packed(mask.astype(np.uint8)),
        "frames": blocks,
        "difference_range": DIFFERENCE_RANGE,
        "jacobian_range": [-jacobian_limit, jacobian_limit],
        "sd_range": [0.0, sd_limit],
        "has_uncertainty": bool(sds),
        "trajectory_png": base64.b64encode(trajectory_png).decode() if trajectory_png else None,
    }


def viewer_html(data: dict) -> str:
    """The page with ``data`` (from :func:`page_data`) inside it."""
    template = resources.files("predictor.web").joinpath("viewer.html").read_text()
    # "</" cannot close the script element from inside the JSON
    return template.replace("/*DATA*/", json.dumps(data).replace("</", "<\\/"))


def progression_gif(
    baseline: np.ndarray, frames: list[Frame], brain: np.ndarray, voxel_mm=(1.0, 1.0, 1.0),
    seconds: float = 0.8,
) -> bytes:
    """An animated GIF of the mid-planes (axial, coronal, sagittal side by side) over the
    baseline and every horizon, each frame captioned with its horizon; planes drawn at
    their shape in mm (the finest voxel side a pixel)."""
    from PIL import Image, ImageDraw

    top = window(baseline, brain)
    centre = np.argwhere(brain).mean(axis=0) if brain.any() else np.array(brain.shape) / 2
    scale = np.asarray(voxel_mm, dtype=float) / float(min(voxel_mm))

    def sized(plane, across, up):  # (rows, columns) image -> pixels of its size in mm
        width, height = round(plane.shape[1] * across), round(plane.shape[0] * up)
        if (height, width) == plane.shape:
            return plane
        return np.asarray(Image.fromarray(plane).resize((width, height), Image.BILINEAR))

    pictures = []
    for frame in [Frame(0.0, baseline), *frames]:
        volume = quantise(frame.image, 0.0, top)
        shown = [sized(np.flipud(plane), scale[column], scale[row])
                 for plane, (column, row) in zip(planes(volume, centre), PLANE_AXES,
                                                 strict=True)]  # fmt: skip
        height = max(p.shape[0] for p in shown)
        strip = np.zeros((height + 14, sum(p.shape[1] for p in shown) + 8), dtype=np.uint8)
        left = 0
        for plane in shown:
            strip[14 : 14 + plane.shape[0], left : left + plane.shape[1]] = plane
            left += plane.shape[1] + 4
        picture = Image.fromarray(strip)
        label = "baseline" if frame.years == 0 else f"+{frame.years:g} years forecast"
        label += " - research use only"
        ImageDraw.Draw(picture).text((2, 1), label, fill=255)
        pictures.append(picture)
    buffer = io.BytesIO()
    pictures[0].save(buffer, "GIF", save_all=True, append_images=pictures[1:],
                     duration=int(seconds * 1000), loop=0)  # fmt: skip
    return buffer.getvalue()


def head_mask(baseline: np.ndarray) -> np.ndarray:
    """Where overlays are shown: the baseline above a fifth of its 99.5th percentile."""
    return baseline > 0.2 * max(float(np.percentile(baseline, 99.5)), 1e-6)


def write_viewer(
    folder: Path, stem: str, baseline, frames: list[Frame], title: str
) -> list[str]:
    """Write ``<stem>_`` :data:`VIEWER` and :data:`ANIMATION` into ``folder`` for the
    baseline :class:`~predictor.nifti.Scan` and its forecast ``frames``; returns the names.
    The trajectory figure is taken from the folder when it is there."""
    from predictor.files import write_bytes, write_text
    from predictor.forecast_io import TRAJECTORIES

    trajectory = folder / f"{stem}_{TRAJECTORIES}"
    brain = head_mask(baseline.data)
    png = trajectory.read_bytes() if trajectory.is_file() else None
    data = page_data(baseline.data, baseline.voxel_size_mm, frames, brain, title, png)
    names = [f"{stem}_{VIEWER}", f"{stem}_{ANIMATION}"]
    write_text(folder / names[0], viewer_html(data))
    gif = progression_gif(baseline.data, frames, brain, baseline.voxel_size_mm)
    write_bytes(folder / names[1], gif)
    return names
