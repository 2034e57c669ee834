"""Find a labelled image set (a folder per class, or a CSV manifest) and read images safely."""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt
import torch
from PIL import Image, UnidentifiedImageError

from .errors import ImageInputError, InvalidInputError

IMAGE_SUFFIXES = {".png", ".jpg", ".jpeg", ".bmp", ".webp", ".tif", ".tiff"}
DEFAULT_MAX_PIXELS = 40_000_000


@dataclass(frozen=True)
class ImageRecord:
    """One labelled image: where it is, its true class and the split it belongs to."""

    path: Path
    label: str
    split: str = ""


def find_images(source: Path) -> list[ImageRecord]:
    """List the images of a folder with one subfolder per class, or of a CSV manifest.

    A manifest has the columns ``path,label`` (and optionally ``split``); relative paths
    are taken from the manifest's folder. Files are not opened here.
    """
    source = Path(source)
    if source.is_file() and source.suffix.lower() == ".csv":
        return _read_manifest(source)
    if source.is_dir():
        records = [
            ImageRecord(path=p, label=class_dir.name)
            for class_dir in sorted(d for d in source.iterdir() if d.is_dir())
            for p in sorted(class_dir.rglob("*"))
            if p.suffix.lower() in IMAGE_SUFFIXES
        ]
        if not records:
            raise InvalidInputError(
                f"{source} holds no images in class subfolders; lay it out as {source}/<class>/<image>.png "
                "or give a CSV manifest with the columns path,label."
            )
        return records
    raise InvalidInputError(f"image source {source} is neither a folder nor a .csv manifest.")


def _read_manifest(path: Path) -> list[ImageRecord]:
    with open(path, newline="", encoding="utf-8-sig") as fh:
        reader = csv.DictReader(fh)
        columns = set(reader.fieldnames or [])
        if not {"path", "label"} <= columns:
            raise InvalidInputError(
                f"manifest {path} must have the columns path,label; it has {sorted(columns) or 'none'}."
            )
        records = []
        for line, row in enumerate(reader, start=2):
            if not (row.get("path") or "").strip() or not (row.get("label") or "").strip():
                raise InvalidInputError(f"manifest {path}, line {line}: path and label must both be filled in.")
            p = Path(row["path"].strip())
            records.append(ImageRecord(path=p if p.is_absolute() else path.parent / p, label=row["label"].strip(), split=(row.get("split") or "").strip()))
    if not records:
        raise InvalidInputError(f"manifest {path} lists no images.")
    return records


def check_image(path: Path, *, max_pixels: int = DEFAULT_MAX_PIXELS) -> tuple[int, int]:
    """Return (width, height) after checking the file opens and is within the pixel limit."""
    try:
        with Image.open(path) as im:
            width, height = im.size
            if width * height > max_pixels:
                raise ImageInputError(
                    f"{path} is {width}x{height} = {width * height:,} pixels, over the limit of {max_pixels:,}; "
                    "downscale it or raise --max-pixels."
                )
            im.verify()
    except FileNotFoundError:
        raise ImageInputError(f"{path} does not exist.") from None
    except (UnidentifiedImageError, OSError, SyntaxError) as exc:
        raise ImageInputError(f"{path} is not a readable image ({exc}).") from None
    except Image.DecompressionBombError:
        raise ImageInputError(f"{path} is too large to decode safely; downscale it.") from None
    return width, height


def read_rgb(path: Path, *, max_pixels: int = DEFAULT_MAX_PIXELS) -> Image.Image:
    """Open an image as RGB, refusing missing, corrupt and oversized files with ImageInputError."""
    check_image(path, max_pixels=max_pixels)
    try:
        with Image.open(path) as im:
            return im.convert("RGB")
    except (OSError, SyntaxError) as exc:
        raise ImageInputError(f"{path} could not be decoded ({exc}).") from None


def to_model_input(
    images: list[Image.Image],
    *,
    size: tuple[int, int],
    mean: tuple[float, float, float],
    std: tuple[float, float, float],
) -> torch.Tensor:
    """Resize (bilinear) and normalise RGB images into a batch tensor N x 3 x H x W."""
    h, w = size
    arrays: list[npt.NDArray[np.float32]] = []
    for im in images:
        if im.size != (w, h):
            im = im.resize((w, h), Image.BILINEAR)
        arrays.append(np.asarray(im, dtype=np.float32) / 255.0)
    batch = torch.from_numpy(np.stack(arrays)).permute(0, 3, 1, 2).contiguous()
    m = torch.tensor(mean, dtype=torch.float32).view(1, 3, 1, 1)
    s = torch.tensor(std, dtype=torch.float32).view(1, 3, 1, 1)
    return (batch - m) / s


def thumbnail_png(path: Path, *, side: int = 160) -> bytes:
    """PNG bytes of the image scaled so its longer side is ``side`` (nearest neighbour when enlarging small images)."""
    import io

    image = read_rgb(path)
    scale = side / max(image.size)
    resample = Image.NEAREST if scale >= 1 else Image.BILINEAR
    small = image.resize((max(1, round(image.width * scale)), max(1, round(image.height * scale))), resample)
    buf = io.BytesIO()
    small.save(buf, format="PNG")
    return buf.getvalue()
