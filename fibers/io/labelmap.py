"""NIfTI label maps: read a segmentation volume, write one for the demo and the tests.

Only this module touches label-map files. What comes out is plain data: an integer label array
indexed by voxel ``(i, j, k)`` and the 4x4 voxel-to-world affine in mm, so that the world point
of voxel centre ``(i, j, k)`` is ``affine @ (i, j, k, 1)``.

The affine is nibabel's best affine for the file (the sform when its code is set, else the
qform, else the zooms), so oblique frames, anisotropic voxels and either handedness come through
unchanged. Spatial units other than mm (metres, microns) are converted to mm with a warning; a
header that leaves the unit unknown is read as mm (common practice: NIfTI writers rarely leave it
unset for anything else).

Reading is sized from the header before any voxel is loaded: an image whose frame would hold
more than ``MAX_FRAME_VOXELS`` voxels, or an uncompressed file shorter than its header claims,
is refused at once. The voxels are then read in slabs of at most ``CHUNK_VOXELS``: one pass per
frame counts the cavity voxels (to find end-diastole in a 4-D series) and finds the bounding box
of the labelled voxels, and only that box of the chosen frame is loaded (with a margin of
``CROP_MARGIN`` voxels). Label values that an int64 cannot hold exactly are read as -1 (no
structure), never wrapped onto a valid label.
"""

from __future__ import annotations

import warnings
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fibers.errors import InputError

# NIfTI spatial unit names (as nibabel reports them) -> factor to mm.
_TO_MM = {"mm": 1.0, "unknown": 1.0, "meter": 1000.0, "micron": 1e-3}
#: Largest frame accepted, voxels (a 1024 x 1024 x 1024 volume; clinical stacks are ~1e6-1e7).
MAX_FRAME_VOXELS = 1024 ** 3
#: Voxels read at once while scanning a frame; bounds the memory of the scan (~100 MB as float64).
CHUNK_VOXELS = 1 << 23
#: Background voxels kept around the labelled bounding box.
CROP_MARGIN = 3
# Largest magnitude an int64 label keeps exactly when it comes from a float array.
_EXACT_FLOAT_INT = 2.0 ** 53


@dataclass(frozen=True)
class LabelImage:
    """One frame of a label map, cropped to its labelled voxels.

    Attributes
    ----------
    labels : ndarray (I, J, K) int64
        Labels of the cropped box; -1 where the file's value has no exact integer meaning.
    affine : ndarray (4, 4) float64, mm
        Voxel index of ``labels`` to world mm (the file's affine shifted to the box's corner).
    full_shape : tuple of int
        Spatial shape of the whole image.
    full_affine : ndarray (4, 4) float64, mm
        Voxel index of the whole image to world mm.
    frame : int
        Frame used (0 for a 3-D image).
    frame_cavity_ml : tuple of float
        Cavity volume of every frame, mL (voxel count x voxel volume); one entry for 3-D.
    frame_reason : str
        Why this frame: ``"3-D image"``, ``"given"``, ``"end-diastole (largest cavity)"`` or
        ``"end-systole (smallest cavity)"``.
    """

    labels: np.ndarray
    affine: np.ndarray
    full_shape: tuple
    full_affine: np.ndarray
    frame: int
    frame_cavity_ml: tuple
    frame_reason: str


def read_labelmap(path, *, frame: int | str | None = None,
                  cavity: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """Labels and affine of one frame of a label map (see ``load_labelmap``), cropped."""
    image = load_labelmap(path, frame=frame, cavity=cavity)
    return image.labels, image.affine


def load_labelmap(path, *, frame: int | str | None = None, cavity: int = 1) -> LabelImage:
    """Read one frame of a NIfTI-1 or NIfTI-2 label map (``.nii`` or ``.nii.gz``).

    Parameters
    ----------
    path : str or Path
    frame : int, "ed", "es" or None
        Frame (0-based) of a 4-D image; ``"ed"`` or None take end-diastole, the frame with the
        largest cavity, ``"es"`` end-systole, the smallest. Ignored (with a warning) for 3-D.
    cavity : int
        Label value of the cavity, counted per frame to find end-diastole.

    Returns
    -------
    LabelImage

    Raises
    ------
    InputError
        Missing, unreadable, truncated or empty file; not NIfTI; a 2-D image or more than 4-D;
        a frame out of range; a frame larger than ``MAX_FRAME_VOXELS``; no label at all;
        non-integer labels; a spatial unit we cannot convert; a singular affine.
    """
    import nibabel as nib

    path = Path(path)
    name = path.name
    if not path.is_file():
        raise InputError(f"label map {path} not found; check [input] labelmap in the case file")
    if path.stat().st_size == 0:
        raise InputError(f"label map {name} is an empty file; export the segmentation again")
    try:
        # keep_file_open: the slab reads below continue one stream instead of re-opening
        # (and, for .nii.gz, decompressing from the start) for every slab
        img = nib.load(str(path), keep_file_open=True)
        if not isinstance(img, nib.Nifti1Image):   # Nifti2Image derives from Nifti1Image
            raise InputError(f"label map {name} is a {type(img).__name__}, not a NIfTI-1/NIfTI-2 "
                             "image; save it as .nii or .nii.gz")
        shape = tuple(int(n) for n in img.shape)
        affine = np.array(img.affine, dtype=float)
        unit = img.header.get_xyzt_units()[0]
        offset = int(img.dataobj.offset)
        dtype = np.dtype(img.get_data_dtype())
        itemsize = dtype.itemsize
    except InputError:
        raise
    except (nib.filebasedimages.ImageFileError, OSError, EOFError, ValueError, zlib.error,
            TypeError, OverflowError) as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        if len(reason) > 120:
            reason = reason[:117] + "..."
        raise InputError(f"cannot read label map {name} ({reason}); "
                         "check that it is a complete NIfTI-1/NIfTI-2 file") from None

    if dtype.kind not in "biuf":
        raise InputError(f"label map {name} stores {dtype} voxels (not integer labels); save the "
                         "segmentation with an integer data type")
    spatial, n_frames = _check_shape(shape, name)
    n_voxels = int(np.prod(spatial, dtype=object))
    if n_voxels > MAX_FRAME_VOXELS:
        raise InputError(f"label map {name}: its header claims a {' x '.join(map(str, spatial))} "
                         f"image ({n_voxels:.3g} voxels per frame, at most {MAX_FRAME_VOXELS:.3g}); "
                         "crop or resample the segmentation, or fix the header")
    if not name.endswith(".gz"):
        need = offset + n_voxels * n_frames * itemsize
        have = path.stat().st_size
        if have < need:
            raise InputError(f"label map {name} is truncated: its header claims "
                             f"{need:,} bytes, the file has {have:,}; export the segmentation again")
    affine = _checked_affine(affine, unit, name)

    index = _frame_index(shape)
    try:
        scans = [_scan_frame(img.dataobj, index(t), spatial, cavity) for t in range(n_frames)]
    except (OSError, EOFError, ValueError, TypeError, zlib.error) as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"cannot read the voxels of label map {name} ({reason[:120]}); "
                         "check that the file is complete") from None
    voxel_ml = abs(float(np.linalg.det(affine[:3, :3]))) / 1000.0
    cavity_ml = tuple(round(s[0] * voxel_ml, 3) for s in scans)
    chosen, reason = _choose_frame(frame, cavity_ml, name)
    count, lo, hi = scans[chosen]
    if lo is None:
        where = f" in frame {chosen}" if n_frames > 1 else ""
        raise InputError(f"label map {name} holds no labels{where} (every voxel is 0); "
                         "export the segmentation again")
    lo = np.maximum(lo - CROP_MARGIN, 0)
    hi = np.minimum(hi + CROP_MARGIN + 1, spatial)
    box = tuple(slice(int(a), int(b)) for a, b in zip(lo, hi))
    data = np.asarray(img.dataobj[box + index(chosen)[3:]])
    crop = affine.copy()
    crop[:3, 3] = affine[:3, :3] @ lo + affine[:3, 3]
    return LabelImage(labels=_as_labels(data, name), affine=crop, full_shape=spatial,
                      full_affine=affine, frame=chosen, frame_cavity_ml=cavity_ml,
                      frame_reason=reason)


def _check_shape(shape: tuple, name: str) -> tuple[tuple, int]:
    """Spatial shape and frame count; refuses 2-D images and more than one non-spatial axis."""
    if len(shape) == 0 or 0 in shape:
        raise InputError(f"label map {name} holds no voxels (shape {shape}); "
                         "export the segmentation again")
    # Trailing singleton dimensions (a 4-D file with one frame, a 5-D one with one component)
    # carry no information.
    dims = list(shape)
    while len(dims) > 3 and dims[-1] == 1:
        dims.pop()
    if len(dims) < 3 or min(dims[:3]) == 1:
        raise InputError(f"label map {name} is a 2-D image (shape {shape}); a short-axis "
                         "stack needs a 3-D label volume with several slices")
    if len(dims) > 4:
        raise InputError(f"label map {name} has {len(dims)} dimensions (shape {shape}); "
                         "save one 3-D volume or a 4-D time series")
    return tuple(dims[:3]), (dims[3] if len(dims) == 4 else 1)


def _frame_index(shape: tuple):
    """Index tuple (spatial slices + frame index + zeros) of frame t of an image of ``shape``."""
    extra = len(shape) - 3

    def index(t: int) -> tuple:
        tail = (t,) + (0,) * (extra - 1) if extra else ()
        return (slice(None),) * 3 + tail
    return index


def _scan_frame(proxy, index: tuple, spatial: tuple, cavity: int):
    """Cavity voxel count and labelled bounding box (lo, hi inclusive) of one frame, by slabs."""
    per_slab = max(1, CHUNK_VOXELS // max(1, spatial[0] * spatial[1]))
    count, lo, hi = 0, None, None
    for k0 in range(0, spatial[2], per_slab):
        k1 = min(spatial[2], k0 + per_slab)
        slab = np.asarray(proxy[index[:2] + (slice(k0, k1),) + index[3:]])
        count += int(np.count_nonzero(slab == cavity))
        nz = slab != 0
        if not nz.any():
            continue
        ii = np.flatnonzero(nz.any(axis=(1, 2)))
        jj = np.flatnonzero(nz.any(axis=(0, 2)))
        kk = np.flatnonzero(nz.any(axis=(0, 1))) + k0
        here_lo = np.array([ii[0], jj[0], kk[0]])
        here_hi = np.array([ii[-1], jj[-1], kk[-1]])
        lo = here_lo if lo is None else np.minimum(lo, here_lo)
        hi = here_hi if hi is None else np.maximum(hi, here_hi)
    return count, lo, hi


def _choose_frame(frame, cavity_ml: tuple, name: str) -> tuple[int, str]:
    """The frame to build and why: given, end-diastole (largest cavity) or end-systole."""
    n = len(cavity_ml)
    if n == 1:
        if frame not in (None, 0, "ed", "es"):
            warnings.warn(f"label map {name} is 3-D; [input] frame = {frame} ignored",
                          stacklevel=4)
        return 0, "3-D image"
    if frame is None or frame == "ed":
        return int(np.argmax(cavity_ml)), "end-diastole (largest cavity)"
    if frame == "es":
        return int(np.argmin(cavity_ml)), "end-systole (smallest cavity)"
    if not 0 <= int(frame) < n:
        raise InputError(f"label map {name}: frame {frame} is out of range; "
                         f"set [input] frame to 0 .. {n - 1}, \"ed\" or \"es\"")
    return int(frame), "given in [input] frame"


def _checked_affine(affine: np.ndarray, unit: str, name: str) -> np.ndarray:
    """The affine in mm; refuses a singular one and units we cannot convert."""
    if not np.all(np.isfinite(affine)) or abs(np.linalg.det(affine[:3, :3])) < 1e-12:
        raise InputError(f"label map {name} has a singular or non-finite voxel-to-world affine; "
                         "fix the header's sform/qform")
    factor = _TO_MM.get(unit)
    if factor is None:
        raise InputError(f"label map {name} gives its spatial unit as '{unit}'; "
                         "save it with mm, metres or microns")
    if factor != 1.0:
        warnings.warn(f"label map {name}: spatial unit is {unit}; converted to mm", stacklevel=4)
        affine = affine.copy()
        affine[:3, :] *= factor
    return affine


def _as_labels(data: np.ndarray, name: str) -> np.ndarray:
    """Integer labels (int64); refuses probability maps and NaNs.

    Values an int64 cannot hold exactly (an unsigned 64-bit label above 2**63, a float beyond
    2**53) become -1, no structure, instead of wrapping onto a valid label.
    """
    if data.dtype == bool:
        return data.astype(np.int64)
    if np.issubdtype(data.dtype, np.integer):
        if data.dtype == np.uint64:
            return np.where(data > np.iinfo(np.int64).max, 0, data).astype(np.int64) \
                - (data > np.iinfo(np.int64).max)
        return data.astype(np.int64)
    if not np.all(np.isfinite(data)):
        raise InputError(f"label map {name} contains NaN or infinite values; "
                         "save integer labels")
    rounded = np.rint(data)
    if np.any(np.abs(data - rounded) > 1e-3):
        raise InputError(f"label map {name} holds non-integer values (a probability map?); "
                         "save integer labels")
    exact = np.abs(rounded) < _EXACT_FLOAT_INT
    return np.where(exact, rounded, -1).astype(np.int64)


def write_labelmap(path, labels: np.ndarray, affine: np.ndarray, *, nifti: int = 1) -> Path:
    """Write an integer label volume as NIfTI (``.nii`` or ``.nii.gz``, by the file name).

    Parameters
    ----------
    path : str or Path
    labels : ndarray (I, J, K) or (I, J, K, T) int
    affine : ndarray (4, 4), mm
        Voxel index to world mm; stored as both sform and qform (scanner code), spatial unit mm.
        The qform cannot hold a shear; readers use the sform, which can.
    nifti : {1, 2}
        NIfTI-1 or NIfTI-2 header.

    Returns
    -------
    Path
        The file written.
    """
    import nibabel as nib

    path = Path(path)
    if not (path.name.endswith(".nii") or path.name.endswith(".nii.gz")):
        raise ValueError(f"label map file name must end in .nii or .nii.gz, got {path.name}")
    if nifti not in (1, 2):
        raise ValueError(f"nifti must be 1 or 2, got {nifti}")
    labels = np.asarray(labels)
    if labels.ndim not in (3, 4):
        raise ValueError(f"labels must be 3-D or 4-D, got shape {labels.shape}")
    affine = np.asarray(affine, float)
    lo, hi = int(labels.min()), int(labels.max())
    dtype = next(t for t in (np.uint8, np.int16, np.int32)
                 if np.iinfo(t).min <= lo and hi <= np.iinfo(t).max)
    cls = nib.Nifti1Image if nifti == 1 else nib.Nifti2Image
    img = cls(labels.astype(dtype), affine)
    img.set_sform(affine, code=1)
    img.set_qform(affine, code=1)
    img.header.set_xyzt_units(xyz="mm", t="sec")
    img.header.set_data_dtype(dtype)
    nib.save(img, str(path))
    return path
