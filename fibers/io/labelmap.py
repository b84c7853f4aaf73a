"""NIfTI label maps: read a segmentation volume, write one for the demo and the tests.

Only this module touches label-map files. What comes out is plain data: an integer label array
indexed by voxel ``(i, j, k)`` and the 4x4 voxel-to-world affine in mm, so that the world point
of voxel centre ``(i, j, k)`` is ``affine @ (i, j, k, 1)``.

The affine is nibabel's best affine for the file (the sform when its code is set, else the
qform, else the zooms), so oblique frames, anisotropic voxels and either handedness come through
unchanged. Spatial units other than mm (metres, microns) are converted to mm with a warning; a
header that leaves the unit unknown is read as mm (common practice: NIfTI writers rarely leave it
unset for anything else).
"""

from __future__ import annotations

import warnings
import zlib
from pathlib import Path

import numpy as np

from fibers.errors import InputError

# NIfTI spatial unit names (as nibabel reports them) -> factor to mm.
_TO_MM = {"mm": 1.0, "unknown": 1.0, "meter": 1000.0, "micron": 1e-3}


def read_labelmap(path, *, frame: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Read a NIfTI-1 or NIfTI-2 label map (``.nii`` or ``.nii.gz``).

    Parameters
    ----------
    path : str or Path
    frame : int, optional
        Frame index (0-based) to take from a 4-D image, normally the end-diastolic frame.
        Required for a 4-D image with more than one frame; ignored (with a warning) for 3-D.

    Returns
    -------
    labels : ndarray (I, J, K) int32
        Label value per voxel.
    affine : ndarray (4, 4) float64, mm
        Voxel index to world mm.

    Raises
    ------
    InputError
        Missing, unreadable or empty file; not NIfTI; 2-D image; 4-D image without ``frame``
        or with ``frame`` out of range; non-integer labels; a spatial unit we cannot convert;
        a singular affine.
    """
    import nibabel as nib

    path = Path(path)
    name = path.name
    if not path.is_file():
        raise InputError(f"label map {path} not found; check [input] labelmap in the case file")
    if path.stat().st_size == 0:
        raise InputError(f"label map {name} is an empty file; export the segmentation again")
    try:
        img = nib.load(str(path))
        if not isinstance(img, nib.Nifti1Image):   # Nifti2Image derives from Nifti1Image
            raise InputError(f"label map {name} is a {type(img).__name__}, not a NIfTI-1/NIfTI-2 "
                             "image; save it as .nii or .nii.gz")
        data = np.asanyarray(img.dataobj)
        affine = np.array(img.affine, dtype=float)
        unit = img.header.get_xyzt_units()[0]
    except InputError:
        raise
    except (nib.filebasedimages.ImageFileError, OSError, EOFError, ValueError, zlib.error) as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise InputError(f"cannot read label map {name} ({reason}); "
                         "check that it is a complete NIfTI-1/NIfTI-2 file") from None

    if data.size == 0:
        raise InputError(f"label map {name} holds no voxels (shape {data.shape}); "
                         "export the segmentation again")
    data = _pick_frame(data, frame, name)

    if not np.all(np.isfinite(affine)) or abs(np.linalg.det(affine[:3, :3])) < 1e-12:
        raise InputError(f"label map {name} has a singular or non-finite voxel-to-world affine; "
                         "fix the header's sform/qform")
    factor = _TO_MM.get(unit)
    if factor is None:
        raise InputError(f"label map {name} gives its spatial unit as '{unit}'; "
                         "save it with mm, metres or microns")
    if factor != 1.0:
        warnings.warn(f"label map {name}: spatial unit is {unit}; converted to mm", stacklevel=2)
        affine[:3, :] *= factor

    return _as_labels(data, name), affine


def _pick_frame(data: np.ndarray, frame: int | None, name: str) -> np.ndarray:
    """The 3-D volume of one frame; refuses 2-D images and 4-D images without a frame."""
    # Trailing singleton dimensions (a 4-D file with one frame, a 5-D one with one component)
    # carry no information.
    while data.ndim > 3 and data.shape[-1] == 1:
        data = data[..., 0]
    if data.ndim < 3 or min(data.shape[:3]) == 1:
        raise InputError(f"label map {name} is a 2-D image (shape {data.shape}); a short-axis "
                         "stack needs a 3-D label volume with several slices")
    if data.ndim == 3:
        if frame not in (None, 0):
            warnings.warn(f"label map {name} is 3-D; [input] frame = {frame} ignored",
                          stacklevel=3)
        return data
    if data.ndim > 4:
        raise InputError(f"label map {name} has {data.ndim} dimensions (shape {data.shape}); "
                         "save one 3-D volume or a 4-D time series")
    n_frames = data.shape[3]
    if frame is None:
        raise InputError(f"label map {name} is a 4-D image with {n_frames} frames; "
                         f"set [input] frame = N (the end-diastolic frame, 0 to {n_frames - 1})")
    if not 0 <= int(frame) < n_frames:
        raise InputError(f"label map {name}: frame {frame} is out of range; "
                         f"set [input] frame to 0 .. {n_frames - 1}")
    return data[..., int(frame)]


def _as_labels(data: np.ndarray, name: str) -> np.ndarray:
    """Integer labels; refuses probability maps and NaNs."""
    if np.issubdtype(data.dtype, np.integer) or data.dtype == bool:
        return np.asarray(data, dtype=np.int32)
    if not np.all(np.isfinite(data)):
        raise InputError(f"label map {name} contains NaN or infinite values; "
                         "save integer labels")
    rounded = np.rint(data)
    if np.any(np.abs(data - rounded) > 1e-3):
        raise InputError(f"label map {name} holds non-integer values (a probability map?); "
                         "save integer labels")
    return rounded.astype(np.int32)


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
