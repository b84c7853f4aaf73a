"""NIfTI volumes of ``fibers voxelize``: reading a reference grid, writing the volumes.

Each volume is written as ``<name>.nii.gz`` (NIfTI-1) with the grid's affine as both the sform
and the qform (code 1, scanner), and a header description of at most 80 characters saying what
the values are. nibabel owns the format.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fibers.errors import InputError

DESCRIPTIONS = {
    "labels": "fibers labels: 0 background, 1 LV cavity, 2 LV wall",
    "aha_segment": "fibers AHA segment 1-17 (Cerqueira 2002); 0 outside wall/unlabelled",
    "transmural": "fibers transmural depth 0 endo to 1 epi; 0 outside the wall",
    "apicobasal": "fibers apicobasal position 0 apex to 1 base; 0 outside the wall",
    "fiber": "fibers unit fiber vector, components in WORLD x,y,z axes (not voxel); 0 outside",
}


def read_grid(path) -> tuple[tuple[int, ...], np.ndarray]:
    """Shape and affine (4, 4) of a NIfTI image, without reading its voxels."""
    import nibabel as nib

    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: image not found; give a NIfTI image (.nii or .nii.gz) for --like")
    try:
        img = nib.load(str(path))
        shape, affine = tuple(img.shape), np.asarray(img.affine, float)
    except Exception as err:  # nibabel raises several types for a file that is not NIfTI
        raise InputError(f"{path}: not a readable NIfTI image ({type(err).__name__}: {err}); give a "
                         ".nii or .nii.gz file for --like") from None
    if len(shape) < 3:
        raise InputError(f"{path}: image has {len(shape)} dimension(s); give a 3-D or 4-D image for --like")
    return shape, affine


def write_volumes(folder, volumes: dict, affine: np.ndarray) -> list[Path]:
    """Write each volume to ``folder/<name>.nii.gz``.

    Parameters
    ----------
    folder : str or Path
    volumes : dict of str to ndarray (X, Y, Z) or (X, Y, Z, 3)
    affine : ndarray (4, 4)
        Voxel indices to world mm.

    Returns
    -------
    list of Path
    """
    import nibabel as nib

    written = []
    for name, data in volumes.items():
        img = nib.Nifti1Image(np.asarray(data), np.asarray(affine, float))
        img.set_sform(affine, code=1)
        img.set_qform(affine, code=1)
        img.header["descrip"] = DESCRIPTIONS.get(name, f"fibers {name}")[:79].encode()
        img.header.set_xyzt_units("mm")
        path = Path(folder) / f"{name}.nii.gz"
        nib.save(img, str(path))
        written.append(path)
    return written
