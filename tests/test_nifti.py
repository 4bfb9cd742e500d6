"""NIfTI reading and writing (predictor.nifti)."""

from __future__ import annotations

import gzip

import nibabel as nib
import numpy as np
import pytest
from conftest import NIBABEL_ANATOMICAL

from predictor.errors import ScanError
from predictor.nifti import load_scan, save_array, save_like


def _write(tmp_path, data, affine=None, name="scan.nii.gz", kind=nib.Nifti1Image):
    path = tmp_path / name
    nib.save(kind(np.asarray(data), np.eye(4) if affine is None else affine), path)
    return path


def test_anatomical_roundtrip_keeps_affine_and_orientation(tmp_path):
    # nibabel's shipped test scan is stored in LAS orientation.
    original = nib.load(NIBABEL_ANATOMICAL)
    assert nib.aff2axcodes(original.affine) == ("L", "A", "S")
    scan = load_scan(NIBABEL_ANATOMICAL)
    assert nib.aff2axcodes(scan.affine) == ("R", "A", "S")
    # The same voxel is at the same world position in both orders.
    voxel = np.array([10, 20, 5, 1.0])
    world = original.affine @ voxel
    ras_index = np.linalg.solve(scan.affine, world).round().astype(int)
    assert scan.data[tuple(ras_index[:3])] == original.get_fdata()[10, 20, 5]
    out = save_like(scan.data * 2, scan, tmp_path / "result.nii.gz")
    written = nib.load(out)
    np.testing.assert_array_equal(written.affine, original.affine)
    assert nib.aff2axcodes(written.affine) == ("L", "A", "S")
    assert written.shape == original.shape
    np.testing.assert_allclose(written.get_fdata(), original.get_fdata() * 2, rtol=1e-6)


def test_vector_image_written_in_native_order(tmp_path):
    scan = load_scan(NIBABEL_ANATOMICAL)
    field = np.stack([scan.data, -scan.data, scan.data * 0 + 1], axis=-1)
    written = nib.load(save_like(field, scan, tmp_path / "field.nii.gz"))
    assert written.shape == nib.load(NIBABEL_ANATOMICAL).shape + (1, 3)
    assert written.header.get_intent()[0] == "vector"


def test_nifti2_plain_nii_and_single_volume_4d(tmp_path, rng):
    data = rng.normal(size=(7, 8, 9)).astype(np.float32)
    for name, kind, array in [
        ("two.nii", nib.Nifti2Image, data),
        ("four.nii.gz", nib.Nifti1Image, data[..., None]),
    ]:
        scan = load_scan(_write(tmp_path, array, name=name, kind=kind))
        np.testing.assert_allclose(scan.data, data)
        assert scan.data.dtype == np.float32


def test_free_text_header_fields_are_not_written(tmp_path, rng):
    image = nib.Nifti1Image(rng.normal(size=(7, 8, 9)).astype(np.float32), np.eye(4))
    image.header["descrip"] = b"Jane Doe 1950-01-01"
    path = tmp_path / "named.nii.gz"
    nib.save(image, path)
    scan = load_scan(path)
    out = nib.load(save_like(scan.data, scan, tmp_path / "out.nii.gz"))
    assert b"Jane" not in out.header["descrip"].tobytes()


def test_write_is_atomic_on_failure(tmp_path, monkeypatch):
    target = tmp_path / "keep.nii.gz"
    save_array(np.ones((4, 5, 6)), np.eye(4), target)
    before = target.read_bytes()

    def crash_midway(image, path):
        open(path, "wb").write(b"half a file")
        raise OSError("simulated crash while writing")

    monkeypatch.setattr(nib, "save", crash_midway)
    with pytest.raises(OSError, match="simulated"):
        save_array(np.zeros((4, 5, 6)), np.eye(4), target)
    assert target.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["keep.nii.gz"]


@pytest.mark.parametrize(
    ("make", "message"),
    [
        (lambda t, r: t / "missing.nii.gz", "not found"),
        (lambda t, r: _truncated(t, r), "truncated|unreadable|not a readable"),
        (lambda t, r: _garbage(t), "not a readable"),
        (lambda t, r: _write(t, r.normal(size=(7, 8, 9, 2))), "2 volumes"),
        (lambda t, r: _write(t, r.normal(size=(7, 8))), "2D"),
        (lambda t, r: _write(t, _with_nan(r)), "NaN or infinite"),
        (lambda t, r: _singular(t, r), "singular"),
        (lambda t, r: _write(t, np.zeros((7, 8, 9))), "empty or constant"),
        (
            lambda t, r: _write(t, r.normal(size=(7, 8, 9)), np.diag([50, 50, 50, 1.0])),
            "voxel size",
        ),
    ],
    ids=[
        "missing",
        "truncated",
        "garbage",
        "two-volumes",
        "2d",
        "nan",
        "singular",
        "empty",
        "50mm",
    ],
)
def test_bad_scans_are_refused_with_reason(tmp_path, rng, make, message):
    path = make(tmp_path, rng)
    with pytest.raises(ScanError, match=message) as caught:
        load_scan(path)
    assert path.name in str(caught.value)


def _singular(tmp_path, rng):
    image = nib.Nifti1Image(rng.normal(size=(7, 8, 9)), None)
    image.header.set_sform(np.diag([1.0, 1.0, 0.0, 1.0]), code=1)
    path = tmp_path / "flat.nii.gz"
    nib.save(image, path)
    return path


def _with_nan(rng):
    data = rng.normal(size=(7, 8, 9))
    data[3, 3, 3] = np.nan
    return data


def _truncated(tmp_path, rng):
    path = _write(tmp_path, rng.normal(size=(20, 20, 20)), name="full.nii.gz")
    raw = gzip.decompress(path.read_bytes())
    cut = tmp_path / "cut.nii.gz"
    cut.write_bytes(gzip.compress(raw[: len(raw) // 2]))
    return cut


def _garbage(tmp_path):
    path = tmp_path / "garbage.nii"
    path.write_bytes(b"this is not an image" * 30)
    return path
