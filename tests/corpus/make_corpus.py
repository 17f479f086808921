"""Generate the bad-input corpus: every way a nightly folder can hold something unusable.

Run ``python tests/corpus/make_corpus.py DIR`` to write it into DIR (nothing is committed;
the reliability tests generate it into a temporary folder once per session).

Every case lives in its own sub-folder ``DIR/<case>/`` so the records of a check run can
be matched to the case that produced them by their ``source``. Two good series
(``good_water_a``, ``good_water_b``) sit beside the bad ones. All series belong to the
invented demo scenario (an invented imaging centre, invented phantoms); the only real
files are pydicom's own test files (open data shipped with pydicom, read through
:func:`pydicom.data.get_testdata_file`).

Each :class:`Case` says what a correct checker does with it:

* ``kinds`` — the input must be recorded as an error of one of these kinds, with a
  message naming the file or folder;
* no ``kinds`` — the input must load and be checked completely; when ``note`` is given,
  the record's notes must contain it (the checker says what it did).

Two cases need the test to act at run time (they cannot exist as files on disk):
``vanished`` (a file removed between discovery and loading) and ``no_permission``
(``open`` refused with EACCES; chmod 000 does not stop root, so the test makes ``open``
refuse, and also chmods the file for non-root runs).
"""
from __future__ import annotations

import gzip
import os
import shutil
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pydicom
from pydicom.data import get_testdata_file
from pydicom.uid import ExplicitVRBigEndian

from reconaudit.checker.dicom_write import write_ct_series
from reconaudit.checker.volume import Volume

#: Invented scenario names (no real centre, phantom or person).
CENTRE = "Fernhollow Imaging Lab (invented)"
PATIENT_NAME = "QUILLFEATHER^ZEPHYRINE"
PATIENT_ID = "FH-ZQ-770315"


@dataclass(frozen=True)
class Case:
    """One corpus entry and what a correct checker does with it."""

    name: str
    what: str
    kinds: frozenset[str] = field(default_factory=frozenset)
    note: str = ""
    runtime: bool = False  # needs an action by the test at run time

    @property
    def loads(self) -> bool:
        return not self.kinds

    @property
    def good(self) -> bool:
        return self.name.startswith("good_")


# --------------------------------------------------------------------------- volumes
def water_volume(nz: int = 5, n: int = 40, seed: int = 0) -> Volume:
    """A noisy water cylinder in air: a small, valid CT volume (values in HU)."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[:n, :n]
    disc = np.hypot(y - n / 2 + 0.5, x - n / 2 + 0.5) < 0.38 * n
    base = np.where(disc, 0.0, -1000.0)
    hu = np.stack([base + rng.normal(0.0, 8.0, (n, n)) for _ in range(nz)]).astype(np.float32)
    return Volume.from_array(hu, spacing_mm=(2.5, 0.9, 0.9), origin_mm=(-18.0, -18.0, 40.0))


def write_series(folder: Path, seed: str, *, nz: int = 5, n: int = 40, description: str | None = None, **kw) -> list[Path]:
    kw.setdefault("patient_name", PATIENT_NAME)
    kw.setdefault("patient_id", PATIENT_ID)
    kw.setdefault("institution_name", CENTRE)
    return write_ct_series(water_volume(nz, n, seed=len(seed)), folder, series_description=description or f"corpus {seed}",
                           uid_seed=f"corpus-{seed}", **kw)


def _edit(path: Path, **attrs) -> None:
    ds = pydicom.dcmread(path)
    for name, value in attrs.items():
        if value is None:
            if name in ds:
                delattr(ds, name)
        else:
            setattr(ds, name, value)
    ds.save_as(path)


def _testdata(name: str, folder: Path) -> Path:
    src = get_testdata_file(name, download=False)
    if src is None:  # pragma: no cover - pydicom always ships these
        raise FileNotFoundError(f"pydicom test file {name} not installed")
    folder.mkdir(parents=True, exist_ok=True)
    return Path(shutil.copy(src, folder / name))


def _nifti(path: Path, hu: np.ndarray) -> None:
    import SimpleITK as sitk

    path.parent.mkdir(parents=True, exist_ok=True)
    img = sitk.GetImageFromArray(hu.astype(np.float32))
    img.SetSpacing((0.9, 0.9, 2.5))
    sitk.WriteImage(img, str(path))


# --------------------------------------------------------------------------- cases
def _good(root: Path) -> list[Case]:
    write_series(root / "good_water_a", "good-a", description="Fernhollow water A")
    write_series(root / "good_water_b", "good-b", description="Fernhollow water B", convolution_kernel="SOFT")
    return [Case("good_water_a", "a valid 5-slice CT series"), Case("good_water_b", "a second valid CT series")]


def _broken_files(root: Path) -> list[Case]:
    out = []
    f = write_series(root / "truncated_pixels", "trunc-px", nz=1)[0]
    data = f.read_bytes()
    f.write_bytes(data[: len(data) - 1500])
    out.append(Case("truncated_pixels", "a CT file cut inside its pixel data", frozenset({"unreadable_file"})))
    f = write_series(root / "truncated_header", "trunc-hd", nz=1)[0]
    f.write_bytes(f.read_bytes()[:300])
    out.append(Case("truncated_header", "a CT file cut inside its header", frozenset({"unreadable_file"})))
    (root / "not_dicom").mkdir()
    (root / "not_dicom" / "scan_0001.dcm").write_text("this is a text file with a .dcm name\n" * 20)
    out.append(Case("not_dicom", "a text file named .dcm", frozenset({"unreadable_file"})))
    (root / "empty_file").mkdir()
    (root / "empty_file" / "slice.dcm").write_bytes(b"")
    out.append(Case("empty_file", "a zero-byte .dcm file", frozenset({"unreadable_file"})))
    (root / "random_bytes").mkdir()
    (root / "random_bytes" / "IM0001").write_bytes(b"DICM" + np.random.default_rng(5).bytes(4000))
    out.append(Case("random_bytes", "random bytes with a DICM tag near the start", frozenset({"unreadable_file"})))
    f = write_series(root / "no_pixel_data", "no-px", nz=1)[0]
    _edit(f, PixelData=None)
    out.append(Case("no_pixel_data", "a CT header without PixelData", frozenset({"no_pixel_data"})))
    return out


def _other_objects(root: Path) -> list[Case]:
    objects = [
        ("mr_image", "MR_small.dcm", "an MR image (pydicom test file)", {"not_ct"}),
        ("seg_object", "liver_1frame.dcm", "a segmentation object (pydicom test file)", {"not_ct"}),
        ("rt_dose", "rtdose.dcm", "an RT dose object (pydicom test file)", {"not_ct"}),
        ("rt_plan", "rtplan.dcm", "an RT plan without pixels (pydicom test file)", {"not_ct", "no_pixel_data"}),
        ("rt_struct_no_meta", "rtstruct.dcm", "an RT structure set without file meta (pydicom test file)",
         {"not_ct", "no_pixel_data"}),
        ("sc_rgb", "SC_rgb_small_odd.dcm", "an RGB secondary capture (pydicom test file)", {"not_ct", "not_monochrome"}),
        ("sr_document", "test-SR.dcm", "a structured report (pydicom test file)", {"not_ct", "no_pixel_data"}),
        ("us_big_endian_rgb", "ExplVR_BigEnd.dcm", "a big-endian RGB ultrasound image (pydicom test file)",
         {"not_ct", "not_monochrome"}),
    ]
    out = []
    for case, fname, what, kinds in objects:
        _testdata(fname, root / case)
        out.append(Case(case, what, frozenset(kinds)))
    # a CT-labelled RGB object: passes the modality check, must fail the colour check
    f = _testdata("SC_rgb_small_odd.dcm", root / "ct_labelled_rgb")
    _edit(f, Modality="CT", SOPClassUID="1.2.840.10008.5.1.4.1.1.2", SeriesInstanceUID="2.25.4242424242",
          ImagePositionPatient=[0, 0, 0], ImageOrientationPatient=[1, 0, 0, 0, 1, 0], PixelSpacing=[1, 1])
    out.append(Case("ct_labelled_rgb", "RGB pixels in an object that says it is CT", frozenset({"not_monochrome"})))
    return out


def _encodings(root: Path) -> list[Case]:
    out = []
    files = write_series(root / "eight_bit", "8bit", nz=3, rescale_intercept=-1000.0, rescale_slope=8.0)
    for f in files:
        ds = pydicom.dcmread(f)
        arr = np.clip(ds.pixel_array.astype(np.int32), 0, 255).astype(np.uint8)
        ds.BitsAllocated, ds.BitsStored, ds.HighBit, ds.PixelRepresentation = 8, 8, 7, 0
        ds.PixelData = arr.tobytes()
        ds.save_as(f)
    out.append(Case("eight_bit", "a CT series stored with 8 bits per pixel"))
    files = write_series(root / "big_endian", "bigend", nz=3)
    for f in files:
        ds = pydicom.dcmread(f)
        arr = ds.pixel_array
        ds.PixelData = arr.astype(arr.dtype.newbyteorder(">")).tobytes()
        ds.file_meta.TransferSyntaxUID = ExplicitVRBigEndian
        pydicom.dcmwrite(f, ds, implicit_vr=False, little_endian=False, force_encoding=True)
    out.append(Case("big_endian", "a CT series in Explicit VR Big Endian"))
    files = write_series(root / "missing_rescale", "norescale", nz=3, rescale_intercept=0.0)
    for f in files:
        _edit(f, RescaleSlope=None, RescaleIntercept=None, RescaleType=None)
    out.append(Case("missing_rescale", "CT without RescaleSlope/RescaleIntercept", note="RescaleSlope/RescaleIntercept missing"))
    return out


def _geometry(root: Path) -> list[Case]:
    out = []
    f = write_series(root / "absurd_dimensions", "absurd", nz=1)[0]
    _edit(f, Rows=65535, Columns=65535, NumberOfFrames=1000)
    out.append(Case("absurd_dimensions", "Rows 65535 x Columns 65535 x 1000 frames declared", frozenset({"too_large"})))
    f = write_series(root / "zero_rows", "zerorows", nz=1)[0]
    _edit(f, Rows=0)
    out.append(Case("zero_rows", "Rows 0 declared", frozenset({"inconsistent_geometry", "unreadable_file", "invalid_volume"})))
    files = write_series(root / "mixed_sizes", "mixed", nz=4)
    write_series(root / "mixed_tmp", "mixed", nz=4, n=32)
    shutil.copy(sorted((root / "mixed_tmp").iterdir())[1], files[1])
    shutil.rmtree(root / "mixed_tmp")
    out.append(Case("mixed_sizes", "one slice of a series has other Rows/Columns", frozenset({"inconsistent_geometry"})))
    files = write_series(root / "duplicate_sop", "dup", nz=4)
    shutil.copy(files[2], files[2].with_name("copy_of_" + files[2].name))
    out.append(Case("duplicate_sop", "the same SOP instance twice in one series", frozenset({"inconsistent_geometry"})))
    first = write_series(root / "shared_uid", "shared", nz=3, description="shared uid stack")
    second = write_series(root / "shared_uid" / "second", "shared-2", nz=3, description="shared uid stack")
    uid = pydicom.dcmread(first[0]).SeriesInstanceUID
    for f in second:
        _edit(f, SeriesInstanceUID=uid, AcquisitionNumber=2)
    for f in first:
        _edit(f, AcquisitionNumber=1)
    out.append(Case("shared_uid", "two stacks sharing one SeriesInstanceUID", note="holds 2 stacks"))
    files = write_series(root / "missing_slices", "gap", nz=6)
    files[2].unlink()
    files[3].unlink()
    out.append(Case("missing_slices", "two slices missing in the middle of a series", frozenset({"missing_slices"})))
    files = write_series(root / "no_position", "nopos", nz=3)
    _edit(files[1], ImagePositionPatient=None)
    out.append(Case("no_position", "ImagePositionPatient missing on one slice", frozenset({"inconsistent_geometry"})))
    files = write_series(root / "zero_spacing", "zerospacing", nz=2)
    for f in files:
        _edit(f, PixelSpacing=[0, 0])
    out.append(Case("zero_spacing", "PixelSpacing 0", frozenset({"inconsistent_geometry"})))
    write_series(root / "one_voxel_dicom", "onevox", nz=1, n=1)
    out.append(Case("one_voxel_dicom", "a 1 x 1 x 1 DICOM CT series"))
    return out


def _images(root: Path) -> list[Case]:
    out = []
    hu = water_volume(4, 24).hu.copy()
    hu[1, 3:9, 3:9] = np.nan
    hu[2, 10:12, 10:12] = np.inf
    hu[3, 0, 0] = -np.inf
    _nifti(root / "nifti_some_nan" / "some_nan.nii.gz", hu)
    out.append(Case("nifti_some_nan", "NIfTI with NaN and +-Inf voxels", note="NaN or Inf"))
    _nifti(root / "nifti_all_nan" / "all_nan.nii.gz", np.full((3, 8, 8), np.nan))
    out.append(Case("nifti_all_nan", "NIfTI holding only NaN", frozenset({"invalid_volume"})))
    _nifti(root / "nifti_one_voxel" / "one_voxel.nii.gz", np.zeros((1, 1, 1)))
    out.append(Case("nifti_one_voxel", "a 1 x 1 x 1 NIfTI volume"))
    (root / "nifti_broken").mkdir()
    with gzip.open(root / "nifti_broken" / "broken.nii.gz", "wb") as fh:
        fh.write(b"\x5c\x01\x00\x00" + b"\x00" * 60)
    out.append(Case("nifti_broken", "a gzip file named .nii.gz holding no valid header", frozenset({"unreadable_file"})))
    (root / "npy_no_sidecar").mkdir()
    np.save(root / "npy_no_sidecar" / "vol.npy", np.zeros((2, 4, 4), np.float32))
    out.append(Case("npy_no_sidecar", "a .npy volume without its spacing sidecar", frozenset({"inconsistent_geometry"})))
    (root / "npy_pickle").mkdir()
    np.save(root / "npy_pickle" / "obj.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    (root / "npy_pickle" / "obj.json").write_text('{"spacing_mm_zyx": [1, 1, 1]}')
    out.append(Case("npy_pickle", "a .npy holding pickled objects (never unpickled)",
                    frozenset({"unreadable_file", "invalid_volume"})))
    return out


def _file_system(root: Path) -> list[Case]:
    out = []
    loop = root / "symlink_loop"
    (loop / "deeper").mkdir(parents=True)
    os.symlink("..", loop / "deeper" / "up")  # a directory loop (os.walk must not follow it)
    os.symlink("b.dcm", loop / "a.dcm")
    os.symlink("a.dcm", loop / "b.dcm")  # a file-symlink loop: ELOOP on open
    out.append(Case("symlink_loop", "a directory symlink loop and two file symlinks pointing at each other",
                    frozenset({"unreadable_file"})))
    (root / "fifo").mkdir()
    os.mkfifo(root / "fifo" / "pipe.dcm")
    out.append(Case("fifo", "a named pipe called .dcm (opening it would block)", frozenset({"unreadable_file"})))
    bad_name = os.fsencode(root / "non_utf8_name") + b"/slice_\xff\xfe_caf\xe9"
    (root / "non_utf8_name").mkdir()
    tmp = write_series(root / "non_utf8_tmp", "nonutf8", nz=1, description="odd file name")[0]
    os.rename(os.fsencode(tmp), bad_name)
    shutil.rmtree(root / "non_utf8_tmp")
    out.append(Case("non_utf8_name", "a valid one-slice CT file whose name is not UTF-8"))
    write_series(root / "vanished", "vanish", nz=1)
    out.append(Case("vanished", "a file removed between discovery and loading", frozenset({"unreadable_file"}), runtime=True))
    f = write_series(root / "no_permission", "noperm", nz=1)[0]
    os.chmod(f, 0)
    out.append(Case("no_permission", "a file that open() refuses (EACCES)", frozenset({"unreadable_file"}), runtime=True))
    return out


def make_corpus(root: str | Path) -> list[Case]:
    """Write every case under ``root`` (created; must be empty) and return the cases.

    Returns
    -------
    list of Case
        The two good series first, then the bad inputs.
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    if any(root.iterdir()):
        raise FileExistsError(f"{root} is not empty")
    cases = _good(root)
    for part in (_broken_files, _other_objects, _encodings, _geometry, _images, _file_system):
        cases += part(root)
    return cases


def bad_cases(cases: list[Case]) -> list[Case]:
    return [c for c in cases if not c.good]


if __name__ == "__main__":  # pragma: no cover
    made = make_corpus(sys.argv[1] if len(sys.argv) > 1 else "corpus_out")
    for c in made:
        print(f"{c.name:<22} {c.what}")
    print(f"{len(bad_cases(made))} bad inputs, {len(made) - len(bad_cases(made))} good series")
