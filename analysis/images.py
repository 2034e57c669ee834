"""Find a labelled image set (a folder per class, or a CSV manifest) and read images safely."""

from __future__ import annotations

import csv
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt
import torch
from PIL import Image, ImageOps, UnidentifiedImageError

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


_SIXTEEN_BIT = ("I;16", "I;16B", "I;16L", "I;16N", "I")
_WITH_ALPHA = ("RGBA", "LA", "PA", "RGBa", "La")
BACKGROUND = (255, 255, 255)  # transparent pixels are laid over white


def _unreadable_mode(im: Image.Image, path: Path) -> str | None:
    """Why the image's pixel format would be misread, or None. Decodes only 32-bit formats."""
    if im.mode == "F":
        return f"{path} holds 32-bit floating-point pixels, which have no agreed 0-255 meaning; save it as an 8- or 16-bit image."
    if im.mode == "I":
        arr = np.asarray(im)
        if arr.size and (int(arr.min()) < 0 or int(arr.max()) > 65535):
            return f"{path} holds 32-bit integer pixels outside 0..65535; save it as an 8- or 16-bit image."
    return None


def _check_size(im: Image.Image, path: Path, max_pixels: int) -> tuple[int, int]:
    width, height = im.size
    if width * height > max_pixels:
        raise ImageInputError(
            f"{path} is {width}x{height} = {width * height:,} pixels, over the limit of {max_pixels:,}; "
            "downscale it or raise --max-pixels."
        )
    return width, height


def check_image(path: Path, *, max_pixels: int = DEFAULT_MAX_PIXELS) -> tuple[int, int]:
    """Return (width, height), upright after its EXIF orientation, after checking the file opens,
    is within the pixel limit and has a pixel format heedmap reads correctly."""
    with _image_errors(path):
        with Image.open(path) as im:
            width, height = _check_size(im, Path(path), max_pixels)
            im.verify()
        with Image.open(path) as im:  # verify() leaves the image unusable; open again for orientation and mode
            orientation = im.getexif().get(0x0112, 1)
            if im.mode in ("F", "I"):
                im.load()
                problem = _unreadable_mode(im, Path(path))
                if problem:
                    raise ImageInputError(problem)
    if orientation in (5, 6, 7, 8):  # rotated by 90 or 270 degrees
        width, height = height, width
    return width, height


@contextmanager
def _image_errors(path: Path) -> Iterator[None]:
    """Turn what opening, verifying and decoding ``path`` can raise into one ImageInputError naming the file.

    Our own ImageInputError (over the pixel limit, a misread format) passes through unchanged: it is a
    ValueError, and wrapping it again would bury its advice inside "not a readable image (...)".
    """
    try:
        yield
    except ImageInputError:
        raise
    except FileNotFoundError:
        raise ImageInputError(f"{path} does not exist.") from None
    except Image.DecompressionBombError:
        raise ImageInputError(f"{path} is too large to decode safely; downscale it.") from None
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError) as exc:
        raise ImageInputError(f"{path} is not a readable image ({exc}).") from None


def as_rgb(im: Image.Image, path: Path) -> Image.Image:
    """8-bit RGB as the pixels mean: EXIF rotation applied, 16-bit scaled (not clipped to white),
    transparency laid over white. Raises ImageInputError for formats without a 0-255 meaning."""
    problem = _unreadable_mode(im, path)
    if problem:
        raise ImageInputError(problem)
    im = ImageOps.exif_transpose(im)
    if im.mode in _SIXTEEN_BIT:
        arr = np.asarray(im).astype(np.float32)
        eight = np.clip(np.rint(arr / 257.0), 0, 255).astype(np.uint8)  # 65535 -> 255
        return Image.fromarray(eight, "L").convert("RGB")
    has_alpha = im.mode in _WITH_ALPHA or (im.mode in ("P", "L", "RGB") and "transparency" in im.info)
    if has_alpha:
        rgba = im.convert("RGBA")
        background = Image.new("RGBA", rgba.size, (*BACKGROUND, 255))
        return Image.alpha_composite(background, rgba).convert("RGB")
    return im.convert("RGB")


def read_rgb(path: Path, *, max_pixels: int = DEFAULT_MAX_PIXELS) -> Image.Image:
    """Open an image as 8-bit RGB (see :func:`as_rgb`), refusing missing, corrupt, oversized and
    misreadable files with ImageInputError (the same checks and messages as :func:`check_image`).

    The pixels are decoded once: the size is checked from the header, the file's checksums by
    ``verify()``, and the orientation is read after decoding (a PNG keeps it after its pixels, so
    asking for it first would decode the image twice).
    """
    with _image_errors(path):
        with Image.open(path) as im:
            _check_size(im, Path(path), max_pixels)
            im.verify()
        with Image.open(path) as im:
            im.load()
            return as_rgb(im, Path(path))


def mean_fill(mean: tuple[float, float, float], *, channel_order: str = "RGB") -> tuple[int, int, int]:
    """The model's mean colour as 0-255 RGB (``mean`` is on the 0-1 scale, in ``channel_order``): what padding is filled with."""
    r, g, b = tuple(reversed(mean)) if channel_order == "BGR" else mean
    return (int(round(255 * min(1.0, max(0.0, r)))), int(round(255 * min(1.0, max(0.0, g)))), int(round(255 * min(1.0, max(0.0, b)))))


def fit_to_aspect(
    image: Image.Image, size: tuple[int, int], *, resize: str = "resize", fill: tuple[int, int, int] = (0, 0, 0)
) -> Image.Image:
    """The part of ``image`` the model sees, at the image's own resolution, with the aspect of ``size`` (h, w).

    ``resize``: the whole image (stretched later); ``center_crop``: the largest centred box of the
    model's aspect; ``letterbox``: the whole image centred on a ``fill`` background of that aspect.
    """
    h, w = size
    iw, ih = image.size
    if resize == "resize" or iw * h == ih * w:
        return image
    if resize == "center_crop":
        if iw * h > ih * w:  # wider than the model's aspect
            cw = max(1, round(ih * w / h))
            x0 = (iw - cw) // 2
            return image.crop((x0, 0, x0 + cw, ih))
        chh = max(1, round(iw * h / w))
        y0 = (ih - chh) // 2
        return image.crop((0, y0, iw, y0 + chh))
    if resize == "letterbox":
        if iw * h > ih * w:
            bw, bh = iw, max(1, round(iw * h / w))
        else:
            bw, bh = max(1, round(ih * w / h)), ih
        canvas = Image.new("RGB", (bw, bh), fill)
        canvas.paste(image.convert("RGB"), ((bw - iw) // 2, (bh - ih) // 2))
        return canvas
    raise InvalidInputError(f"resize must be 'resize', 'center_crop' or 'letterbox'; got {resize!r}.")


def to_model_input(
    images: list[Image.Image],
    *,
    size: tuple[int, int],
    mean: tuple[float, float, float],
    std: tuple[float, float, float],
    resize: str = "resize",
    channel_order: str = "RGB",
) -> torch.Tensor:
    """Fit (resize policy), resize (bilinear) and normalise RGB images into a batch N x 3 x H x W.

    ``mean``/``std`` are on the 0-1 scale, in the model's ``channel_order`` (``RGB`` or ``BGR``).
    """
    h, w = size
    bgr = channel_order == "BGR"
    fill = mean_fill(mean, channel_order=channel_order)
    arrays: list[npt.NDArray[np.float32]] = []
    for im in images:
        im = fit_to_aspect(im, size, resize=resize, fill=fill)
        if im.size != (w, h):
            im = im.resize((w, h), Image.Resampling.BILINEAR)
        arrays.append(np.asarray(im.convert("RGB"), dtype=np.float32) / 255.0)
    batch = torch.from_numpy(np.stack(arrays)).permute(0, 3, 1, 2)
    if bgr:
        batch = batch.flip(1)
    batch = batch.contiguous()
    m = torch.tensor(mean, dtype=torch.float32).view(1, 3, 1, 1)
    s = torch.tensor(std, dtype=torch.float32).view(1, 3, 1, 1)
    return (batch - m) / s


def thumbnail_png(path: Path, *, side: int = 160) -> bytes:
    """PNG bytes of the image scaled so its longer side is ``side`` (nearest neighbour when enlarging small images)."""
    import io

    image = read_rgb(path)
    scale = side / max(image.size)
    resample = Image.Resampling.NEAREST if scale >= 1 else Image.Resampling.BILINEAR
    small = image.resize((max(1, round(image.width * scale)), max(1, round(image.height * scale))), resample)
    buf = io.BytesIO()
    small.save(buf, format="PNG")
    return buf.getvalue()
