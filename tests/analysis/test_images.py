"""Images whose bit depth, palette or orientation would be misread are read as their pixels mean;
resize policies and channel order."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image

from analysis.errors import ImageInputError
from analysis.images import check_image, fit_to_aspect, read_rgb, to_model_input


def test_sixteen_bit_grey_is_scaled_not_read_as_white(tmp_path: Path) -> None:
    values = np.linspace(0, 65535, 64 * 32).reshape(32, 64).astype(np.uint16)
    Image.fromarray(values).save(tmp_path / "g16.png")
    with Image.open(tmp_path / "g16.png") as raw:
        assert raw.mode.startswith("I")  # Pillow opens it as 16-bit...
        assert (np.asarray(raw.convert("RGB")) == 255).mean() > 0.99  # ...and its own conversion clips it to white
    rgb = np.asarray(read_rgb(tmp_path / "g16.png"))
    expected = np.rint(values / 257.0).astype(np.uint8)  # 16-bit full scale to 8-bit: v * 255 / 65535
    assert rgb.shape == (32, 64, 3) and (rgb[..., 0] == expected).all() and (rgb[..., 1] == expected).all()


def test_palette_with_transparency_is_laid_over_white(tmp_path: Path) -> None:
    im = Image.new("P", (8, 8), 0)
    im.putpalette([0, 0, 0, 200, 30, 30] + [0, 0, 0] * 254)
    im.paste(1, (0, 0, 4, 8))
    im.info["transparency"] = 0  # index 0 (black in the palette) is transparent
    im.save(tmp_path / "p.png", transparency=0)
    rgb = np.asarray(read_rgb(tmp_path / "p.png"))
    assert tuple(rgb[0, 0]) == (200, 30, 30) and tuple(rgb[0, 7]) == (255, 255, 255)


def test_exif_rotation_is_applied(tmp_path: Path) -> None:
    arr = np.zeros((10, 20, 3), dtype=np.uint8)
    arr[:, :10] = (250, 0, 0)  # left half red, as stored
    exif = Image.Exif()
    exif[0x0112] = 6  # "rotate 90 degrees clockwise to display"
    Image.fromarray(arr).save(tmp_path / "r.jpg", exif=exif.tobytes(), quality=95)
    assert check_image(tmp_path / "r.jpg") == (10, 20)  # width, height as displayed
    rgb = np.asarray(read_rgb(tmp_path / "r.jpg"))
    assert rgb.shape == (20, 10, 3)
    assert rgb[2, 5, 0] > 200 and rgb[17, 5, 0] < 50  # the stored left half is now on top


def test_float_images_are_refused_with_what_to_do(tmp_path: Path) -> None:
    Image.fromarray(np.full((8, 8), 0.5, dtype=np.float32), mode="F").save(tmp_path / "f.tif")
    with pytest.raises(ImageInputError, match="floating-point.*8- or 16-bit"):
        check_image(tmp_path / "f.tif")
    with pytest.raises(ImageInputError, match="floating-point"):
        read_rgb(tmp_path / "f.tif")


def test_resize_policies_and_channel_order() -> None:
    wide = Image.new("RGB", (40, 20), (0, 0, 255))
    wide.paste((255, 0, 0), (10, 0, 30, 20))  # a red centre square, blue sides
    crop = fit_to_aspect(wide, (16, 16), resize="center_crop")
    assert crop.size == (20, 20) and np.asarray(crop)[..., 0].min() == 255
    box = fit_to_aspect(wide, (16, 16), resize="letterbox", fill=(1, 2, 3))
    assert box.size == (40, 40) and tuple(np.asarray(box)[0, 0]) == (1, 2, 3) and tuple(np.asarray(box)[20, 0]) == (0, 0, 255)
    assert fit_to_aspect(wide, (16, 16)).size == (40, 20)
    mean, std = (0.1, 0.2, 0.3), (0.5, 0.5, 0.5)
    rgb = to_model_input([crop], size=(16, 16), mean=mean, std=std)
    bgr = to_model_input([crop], size=(16, 16), mean=mean[::-1], std=std, channel_order="BGR")
    torch.testing.assert_close(bgr, rgb.flip(1))
    assert float(rgb[0, 0].mean()) == pytest.approx((1.0 - 0.1) / 0.5)
    # Letterbox pads with the mean colour, so the padding is zero after normalisation.
    padded = to_model_input([wide], size=(16, 16), mean=(0.4, 0.4, 0.4), std=std, resize="letterbox")
    assert float(padded[0, :, 0, :].abs().max()) < 0.01


def test_model_input_is_bit_for_bit_the_normalisation_formula() -> None:
    rng = np.random.default_rng(3)
    pictures = [Image.fromarray(rng.integers(0, 256, (12, 10, 3), dtype=np.uint8)) for _ in range(5)]
    mean, std = (0.485, 0.456, 0.406), (0.229, 0.224, 0.225)
    for order in ("RGB", "BGR"):
        got = to_model_input(pictures, size=(12, 10), mean=mean, std=std, channel_order=order)
        # The formula in torch, one image at a time: x / 255 in float32, channels reordered, then (x - mean) / std.
        x = torch.stack([torch.from_numpy(np.asarray(p, dtype=np.float32) / 255.0).permute(2, 0, 1) for p in pictures])
        if order == "BGR":
            x = x.flip(1)
        want = (x - torch.tensor(mean).view(1, 3, 1, 1)) / torch.tensor(std).view(1, 3, 1, 1)
        assert got.dtype == torch.float32 and got.is_contiguous() and torch.equal(got, want)


def test_read_rgb_refuses_a_truncated_or_damaged_file_with_a_message(tmp_path: Path) -> None:
    arr = np.random.default_rng(0).integers(0, 256, (40, 40, 3), dtype=np.uint8)
    Image.fromarray(arr).save(tmp_path / "ok.png")
    data = (tmp_path / "ok.png").read_bytes()
    assert (np.asarray(read_rgb(tmp_path / "ok.png")) == arr).all()
    (tmp_path / "cut.png").write_bytes(data[: len(data) // 2])
    flipped = bytearray(data)
    flipped[len(data) // 2] ^= 0xFF  # one damaged byte inside the pixel data: its checksum no longer matches
    (tmp_path / "flip.png").write_bytes(bytes(flipped))
    for name in ("cut.png", "flip.png"):
        with pytest.raises(ImageInputError, match="not a readable image"):
            read_rgb(tmp_path / name)
    with pytest.raises(ImageInputError, match="over the limit"):
        read_rgb(tmp_path / "ok.png", max_pixels=100)


def test_check_image_and_read_rgb_give_their_own_messages_unwrapped(tmp_path: Path) -> None:
    """An over-the-limit or misread-format image gets the one message that says what to do, from both
    readers alike, not that message again inside "X is not a readable image (...)"."""
    Image.fromarray(np.zeros((20, 10, 3), dtype=np.uint8)).save(tmp_path / "big.png")
    Image.fromarray(np.full((8, 8), 0.5, dtype=np.float32), mode="F").save(tmp_path / "f.tif")
    Image.fromarray(np.full((8, 8), -5, dtype=np.int32), mode="I").save(tmp_path / "i.tif")
    for name, want in (("big.png", f"{tmp_path / 'big.png'} is 10x20 = 200 pixels, over the limit of 100; downscale it or raise --max-pixels."),
                       ("f.tif", f"{tmp_path / 'f.tif'} holds 32-bit floating-point pixels, which have no agreed 0-255 meaning; save it as an 8- or 16-bit image."),
                       ("i.tif", f"{tmp_path / 'i.tif'} holds 32-bit integer pixels outside 0..65535; save it as an 8- or 16-bit image.")):
        for read in (check_image, read_rgb):
            with pytest.raises(ImageInputError) as caught:
                read(tmp_path / name, max_pixels=100)
            assert str(caught.value) == want, (read.__name__, name)
    with pytest.raises(ImageInputError) as caught:
        check_image(tmp_path / "missing.png")
    assert str(caught.value) == f"{tmp_path / 'missing.png'} does not exist."
