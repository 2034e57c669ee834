"""Reading and writing a run's saliency maps and region-label maps, one shard file per batch.

A batch's maps are one ``.npy`` array (N x H x W float16) and its region labels another (N x H x W
uint8); a prediction stores ``<file>#<row>`` (see :mod:`app.layout`). Reading memory-maps the file
and copies one row, so a shard of any size costs one row's bytes per image. Projects made before
shards (one file per image, no ``#row``) are read the same way.
"""

from __future__ import annotations

import os
from collections.abc import Iterable
from pathlib import Path

import numpy as np
import numpy.typing as npt
from sqlalchemy import select
from sqlalchemy.orm import Session

from .errors import NotFoundError
from .layout import ProjectLayout
from .models import Prediction

MAX_MAP_SIDE = 4096  # a stored map larger than this per side is treated as damaged, not read


def _row(layout: ProjectLayout, rel: str, row: int | None, *, what: str) -> npt.NDArray[np.generic]:
    path = layout.existing(rel, what=what)
    try:
        arr = np.load(path, mmap_mode="r", allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise NotFoundError(f"{what} ({rel}) cannot be read: {exc}. Run the saliency job again for this run.") from None
    if row is None:
        if arr.ndim != 2:
            raise NotFoundError(f"{what} ({rel}) is not one H x W map; run the saliency job again for this run.")
        one = arr
    else:
        if arr.ndim != 3 or not 0 <= row < arr.shape[0]:
            raise NotFoundError(f"{what} ({rel}) has no row {row}; the file is damaged or was replaced. Run the saliency job again for this run.")
        one = arr[row]
    if max(one.shape) > MAX_MAP_SIDE:
        raise NotFoundError(f"{what} ({rel}) is {one.shape[0]}x{one.shape[1]}, larger than any map heedmap writes; the file is damaged.")
    return np.array(one)  # a copy: the memory map is closed when ``arr`` goes


def read_saliency(layout: ProjectLayout, ref: str) -> npt.NDArray[np.float32]:
    """One image's saliency map (H x W, model-input pixels) from its stored reference."""
    rel, row = layout.split_map_ref(ref)
    return _row(layout, rel, row, what="the saliency map").astype(np.float32)


def read_region_labels(layout: ProjectLayout, ref: str) -> npt.NDArray[np.uint8]:
    """One image's region-label map (H x W; r + 1 where region rank r is, 0 elsewhere) from its map reference."""
    rel, row = layout.split_map_ref(ref)
    return _row(layout, layout.region_labels_of(rel), row, what="the region-label map").astype(np.uint8)


def map_refs(s: Session, run_id: int, image_ids: Iterable[int]) -> dict[int, str]:
    """The stored map reference of each image of the run that has one."""
    ids = list(dict.fromkeys(int(i) for i in image_ids))
    out: dict[int, str] = {}
    for start in range(0, len(ids), 500):
        chunk = ids[start : start + 500]
        out.update((int(i), str(ref)) for i, ref in s.execute(
            select(Prediction.image_id, Prediction.map_path).where(Prediction.run_id == run_id, Prediction.image_id.in_(chunk))))
    return out


def region_labels_for(s: Session, layout: ProjectLayout, run_id: int, image_ids: Iterable[int]) -> dict[int, npt.NDArray[np.uint8]]:
    """Region-label maps of several images of a run, keyed by image id (images without a prediction are left out)."""
    return {i: read_region_labels(layout, ref) for i, ref in map_refs(s, run_id, image_ids).items()}


def as_float16(maps: npt.NDArray[np.float32]) -> npt.NDArray[np.float16]:
    """``maps.astype(np.float16)``, bit for bit, at the speed of the hardware conversion.

    numpy converts values below float16's smallest normal (6.1e-5) one at a time in software, and a
    Grad-CAM map is mostly such values when the logits' gradients are small: 0.23 ms per 64 x 64 map,
    more than the rest of the map's writing. torch converts with the CPU's instructions (same
    round-to-nearest-even); a test checks the two agree on every class of value.
    """
    import torch

    return torch.from_numpy(np.ascontiguousarray(maps, dtype=np.float32)).to(torch.float16).numpy()


def write_array(path: Path, array: npt.NDArray[np.generic]) -> None:
    """Write ``array`` as .npy to ``path`` durably: a temporary file, fsync, then an atomic rename."""
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "wb") as f:
        np.save(f, array, allow_pickle=False)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def sync_folder(folder: Path) -> None:
    """fsync a folder so the names of files just renamed into it survive a crash (no-op where unsupported)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
