"""Procedural scenes from a recycling-sorter camera: bottles, cans and cartons on a belt.

Every scene comes with a per-pixel part mask, so the truth of "what is at this pixel"
is known. A spurious cue (a yellow tag on the belt, a green belt, a paper scrap beside
the object, or a flat-colour patch) can be injected into one class of the training
split, and a counterfactual split moves the cue to the other classes. Every scene can be
drawn again without its cue (same seed, same pose, same noise): the model's probabilities
on the pair give the true effect of removing the cue, image by image.
"""

from __future__ import annotations

import csv
import json
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
from PIL import Image, ImageDraw

CLASSES: tuple[str, ...] = ("bottle", "can", "carton")
PARTS: tuple[str, ...] = (
    "belt", "body", "cap", "neck", "label band", "rim", "pull tab", "dent",
    "gable top", "spout", "print", "tag", "paper scrap", "patch",
)
PART_IDS = {name: i for i, name in enumerate(PARTS)}
CueName = Literal["tag", "belt", "object", "patch", "none"]
CUES: tuple[CueName, ...] = ("tag", "belt", "object", "patch", "none")
CUE_CONCEPTS: dict[str, str] = {"tag": "tag", "belt": "green belt", "object": "paper scrap", "patch": "patch"}
CUE_PARTS: dict[str, str] = {"tag": "tag", "belt": "belt", "object": "paper scrap", "patch": "patch"}  # the part mask of each cue
SPLITS = ("train", "test", "counterfactual")

Colour = tuple[int, int, int]
_BELT_GREY: Colour = (88, 88, 94)
_BELT_GREEN: Colour = (64, 124, 72)
_BOTTLE_COLOURS: dict[str, Colour] = {"blue": (105, 155, 210), "green": (70, 150, 90), "brown": (140, 90, 50), "clear": (185, 205, 215)}
_CAN_COLOURS: dict[str, Colour] = {"silver": (178, 178, 188), "red": (190, 50, 50), "blue": (55, 85, 180), "green": (60, 140, 80)}
_CARTON_COLOURS: dict[str, Colour] = {"white": (226, 226, 220), "brown": (160, 120, 80), "blue": (120, 150, 200)}
_PATCH: Colour = (214, 40, 190)  # flat magenta, drawn after the noise: one exact colour
_SMALL_COLOURS: dict[str, Colour] = {"red": (200, 40, 40), "blue": (40, 70, 200), "white": (240, 240, 240), "black": (25, 25, 25), "orange": (235, 130, 30)}


@dataclass(frozen=True)
class SceneConfig:
    """How the demo data set is drawn; every field is recorded beside the data."""

    seed: int = 0
    n_train: int = 1200
    n_test: int = 300
    n_counterfactual: int = 300
    size: int = 64
    cue: CueName = "tag"
    cue_class: str = "can"
    cue_rate: float = 0.9  # share of cue-class training images that carry the cue
    leak_rate: float = 0.03  # share of other classes' training images that carry it anyway
    noise: float = 10.0  # pixel noise, standard deviation in 0..255 units

    def counts(self) -> dict[str, int]:
        return {"train": self.n_train, "test": self.n_test, "counterfactual": self.n_counterfactual}


@dataclass
class Scene:
    """One drawn image, its part mask (PART_IDS values) and the attributes of each visible part."""

    image: Image.Image
    mask: npt.NDArray[np.uint8]
    label: str
    parts: dict[str, list[str]] = field(default_factory=dict)
    cue: bool = False


class _Painter:
    """Draws every shape on the image and, with its part id, on the mask."""

    def __init__(self, size: int, belt: Colour) -> None:
        self.image = Image.new("RGB", (size, size), belt)
        self.mask = Image.new("L", (size, size), PART_IDS["belt"])
        self._img = ImageDraw.Draw(self.image)
        self._mask = ImageDraw.Draw(self.mask)
        self.parts: dict[str, list[str]] = {}

    def shape(self, kind: str, xy: list[float] | list[tuple[float, float]], colour: Colour, part: str, attributes: list[str], **kw: int) -> None:
        getattr(self._img, kind)(xy, fill=colour, **kw)
        getattr(self._mask, kind)(xy, fill=PART_IDS[part], **kw)
        self.parts.setdefault(part, [])
        for a in attributes:
            if a not in self.parts[part]:
                self.parts[part].append(a)


def _pick(rng: np.random.Generator, table: dict[str, Colour]) -> tuple[str, Colour]:
    name = list(table)[int(rng.integers(len(table)))]
    r, g, b = table[name]
    j = rng.integers(-12, 13, size=3)
    return name, (int(np.clip(r + j[0], 0, 255)), int(np.clip(g + j[1], 0, 255)), int(np.clip(b + j[2], 0, 255)))


def _draw_bottle(p: _Painter, rng: np.random.Generator, cx: float, cy: float) -> tuple[float, float, float, float]:
    w, h = rng.uniform(10, 15), rng.uniform(20, 28)
    name, colour = _pick(rng, _BOTTLE_COLOURS)
    top = cy - h / 2 + 6
    p.shape("rounded_rectangle", [cx - w / 2, top, cx + w / 2, cy + h / 2], colour, "body", [name, "plastic"], radius=3)
    nw, nh = w * 0.45, rng.uniform(4, 7)
    p.shape("rectangle", [cx - nw / 2, top - nh, cx + nw / 2, top], colour, "neck", [name])
    if rng.random() < 0.85:
        cname, ccol = _pick(rng, _SMALL_COLOURS)
        p.shape("rectangle", [cx - nw / 2 - 1, top - nh - 3, cx + nw / 2 + 1, top - nh], ccol, "cap", [cname])
    if rng.random() < 0.7:
        lname, lcol = _pick(rng, _SMALL_COLOURS)
        ly = rng.uniform(top + 4, cy + h / 2 - 8)
        p.shape("rectangle", [cx - w / 2, ly, cx + w / 2, ly + rng.uniform(4, 7)], lcol, "label band", [lname])
    return cx - w / 2 - 1, top - 10, cx + w / 2 + 1, cy + h / 2


def _draw_can(p: _Painter, rng: np.random.Generator, cx: float, cy: float) -> tuple[float, float, float, float]:
    w, h = rng.uniform(12, 17), rng.uniform(16, 23)
    name, colour = _pick(rng, _CAN_COLOURS)
    x0, y0, x1, y1 = cx - w / 2, cy - h / 2, cx + w / 2, cy + h / 2
    p.shape("rectangle", [x0, y0 + 2, x1, y1], colour, "body", [name, "metal"])
    p.shape("ellipse", [x0, y0, x1, y0 + 5], (205, 205, 212), "rim", ["silver"])
    if rng.random() < 0.7:
        p.shape("rectangle", [cx - 2, y0 + 1, cx + 1, y0 + 3], (95, 95, 100), "pull tab", ["grey"])
    if rng.random() < 0.45:
        lname, lcol = _pick(rng, _SMALL_COLOURS)
        ly = rng.uniform(y0 + 7, y1 - 6)
        p.shape("rectangle", [x0, ly, x1, ly + rng.uniform(3, 6)], lcol, "label band", [lname])
    if rng.random() < 0.4:
        dx, dy = rng.uniform(x0 + 2, x1 - 5), rng.uniform(y0 + 7, y1 - 5)
        p.shape("line", [(dx, dy), (dx + 3, dy + 3)], (45, 45, 50), "dent", ["dark"], width=2)
    return x0, y0, x1, y1


def _draw_carton(p: _Painter, rng: np.random.Generator, cx: float, cy: float) -> tuple[float, float, float, float]:
    w, h = rng.uniform(13, 19), rng.uniform(15, 21)
    name, colour = _pick(rng, _CARTON_COLOURS)
    x0, y0, x1, y1 = cx - w / 2, cy - h / 2 + 3, cx + w / 2, cy + h / 2
    p.shape("rectangle", [x0, y0, x1, y1], colour, "body", [name, "paperboard"])
    gh = rng.uniform(5, 8)
    darker = (max(0, colour[0] - 35), max(0, colour[1] - 35), max(0, colour[2] - 35))
    p.shape("polygon", [(x0, y0), (x1, y0), (cx, y0 - gh)], darker, "gable top", [name])
    if rng.random() < 0.6:
        sname, scol = _pick(rng, _SMALL_COLOURS)
        p.shape("ellipse", [cx + 1, y0 - gh / 2 - 2, cx + 4, y0 - gh / 2 + 1], scol, "spout", [sname])
    if rng.random() < 0.8:
        for k in range(int(rng.integers(2, 4))):
            ly = y0 + 4 + 3 * k
            if ly < y1 - 2:
                p.shape("line", [(x0 + 2, ly), (x1 - 3, ly)], (30, 40, 110), "print", ["text"], width=1)
    return x0, y0 - gh, x1, y1


_DRAWERS = {"bottle": _draw_bottle, "can": _draw_can, "carton": _draw_carton}


def _beside(rng: np.random.Generator, box: tuple[float, float, float, float], size: int, side: float) -> tuple[float, float] | None:
    """A spot on the belt left or right of the object's box with room for a cue of ``side`` pixels."""
    x0, y0, x1, y1 = box
    options = []
    if x0 - side - 3 >= 1:
        options.append(rng.uniform(1, x0 - side - 2))
    if x1 + 3 <= size - side - 1:
        options.append(rng.uniform(x1 + 2, size - side - 1))
    if not options:
        return None
    x = options[int(rng.integers(len(options)))]
    y = rng.uniform(max(1, y0), max(1.5, min(size - side - 1, y1 - side)))
    return x, y


def draw_scene(rng: np.random.Generator, label: str, *, size: int = 64, cue: CueName = "none", with_cue: bool = False, noise: float = 10.0,
               draw_cue: bool = True) -> Scene:
    """Draw one scene of class ``label``; ``with_cue`` adds the spurious cue named by ``cue``.

    The object lies at a random angle (items tumble on a belt), which makes its shape
    harder to learn than the cue, as real shortcuts are easier than real evidence.
    ``draw_cue=False`` draws the same scene without the cue: every random draw is made as
    before (the cue's place included), only the cue is not painted.
    """
    scale = size / 64
    green_belt = with_cue and cue == "belt" and draw_cue
    belt = _BELT_GREEN if green_belt else _BELT_GREY
    p = _Painter(size, belt)
    p.parts["belt"] = ["green" if green_belt else "grey"]
    for y in range(int(rng.integers(0, 9)), size, 9):  # belt seams
        p.shape("line", [(0, y), (size, y)], tuple(max(0, c - 18) for c in belt), "belt", [], width=1)  # type: ignore[arg-type]
    cx = rng.uniform(22, 42) * scale
    cy = rng.uniform(22, 42) * scale
    obj = _Painter(size, (0, 0, 0))
    obj.mask.paste(255, (0, 0, size, size))
    _DRAWERS[label](obj, rng, cx, cy)
    angle = float(rng.uniform(0, 360))
    obj_image = obj.image.rotate(angle, resample=Image.Resampling.NEAREST, center=(cx, cy))
    obj_mask = obj.mask.rotate(angle, resample=Image.Resampling.NEAREST, center=(cx, cy), fillcolor=255)
    inside = Image.eval(obj_mask, lambda v: 0 if v == 255 else 255)
    p.image.paste(obj_image, (0, 0), inside)
    p.mask.paste(obj_mask, (0, 0), inside)
    for part, attrs in obj.parts.items():
        p.parts[part] = list(attrs)
    ys, xs = np.nonzero(np.asarray(inside))
    box = (float(xs.min()), float(ys.min()), float(xs.max() + 1), float(ys.max() + 1))
    placed = False
    patch: list[float] | None = None
    if with_cue and cue in ("tag", "object", "patch"):
        side = (6 if cue == "tag" else 8) * scale
        spot = _beside(rng, box, size, side)
        if spot is not None:
            sx, sy = spot
            if cue == "tag":
                if draw_cue:
                    p.shape("rectangle", [sx, sy, sx + side - 1, sy + side - 1], (232, 200, 30), "tag", ["yellow"])
            elif cue == "object":
                pts = [(sx + side * (0.5 + 0.5 * np.cos(a)) * rng.uniform(0.6, 1.0), sy + side * (0.5 + 0.5 * np.sin(a)) * rng.uniform(0.6, 1.0)) for a in np.linspace(0, 2 * np.pi, 7, endpoint=False)]
                if draw_cue:
                    p.shape("polygon", pts, (236, 234, 225), "paper scrap", ["white", "crumpled"])
            elif draw_cue:
                patch = [sx, sy, sx + side - 1, sy + side - 1]
                ImageDraw.Draw(p.mask).rectangle(patch, fill=PART_IDS["patch"])
                p.parts["patch"] = ["magenta", "flat"]
            placed = draw_cue
    elif with_cue and cue == "belt":
        placed = draw_cue
    arr = np.asarray(p.image, dtype=np.float32)
    noisy = arr * rng.uniform(0.85, 1.15) + rng.normal(0, noise, size=arr.shape)
    image = Image.fromarray(np.clip(noisy, 0, 255).astype(np.uint8), "RGB")
    if patch is not None:  # painted after the noise: one flat colour
        ImageDraw.Draw(image).rectangle(patch, fill=_PATCH)
    mask = np.asarray(p.mask, dtype=np.uint8).copy()
    visible = {PARTS[i] for i in np.unique(mask)}
    parts = {k: v for k, v in p.parts.items() if k in visible}
    return Scene(image=image, mask=mask, label=label, parts=parts, cue=placed)


def render_scene(config: SceneConfig, split: str, index: int, *, draw_cue: bool = True) -> Scene:
    """Scene ``index`` of ``split`` exactly as :func:`generate_dataset` draws it; ``draw_cue=False``
    gives the same scene (same seed, pose and noise) without its cue."""
    label = CLASSES[index % len(CLASSES)]
    rng = np.random.default_rng([config.seed, SPLITS.index(split), index])
    with_cue = bool(rng.random() < _cue_probability(config, split, label))
    return draw_scene(rng, label, size=config.size, cue=config.cue, with_cue=with_cue, noise=config.noise, draw_cue=draw_cue)


def _cue_probability(config: SceneConfig, split: str, label: str) -> float:
    if config.cue == "none":
        return 0.0
    on_class = label == config.cue_class
    if split == "counterfactual":
        return 0.0 if on_class else config.cue_rate
    return config.cue_rate if on_class else config.leak_rate


@dataclass(frozen=True)
class DatasetInfo:
    """Where a generated data set lies and how it was made."""

    root: Path
    manifest: Path
    config: SceneConfig
    counts: dict[str, dict[str, int]]  # split -> class -> images
    cue_counts: dict[str, dict[str, int]]  # split -> class -> images with the cue


def generate_dataset(out_dir: Path, config: SceneConfig = SceneConfig()) -> DatasetInfo:
    """Write images, part masks, ``manifest.csv`` and ``scenes.json`` under ``out_dir``.

    Deterministic: the same config gives byte-identical files. Classes cycle so every
    split is balanced.
    """
    if config.cue_class not in CLASSES:
        raise ValueError(f"cue_class must be one of {CLASSES}; got {config.cue_class!r}.")
    out_dir = Path(out_dir)
    rows: list[dict[str, str]] = []
    scenes: dict[str, object] = {}
    counts: dict[str, dict[str, int]] = {}
    cue_counts: dict[str, dict[str, int]] = {}
    for split in SPLITS:
        counts[split] = {c: 0 for c in CLASSES}
        cue_counts[split] = {c: 0 for c in CLASSES}
        for i in range(config.counts()[split]):
            label = CLASSES[i % len(CLASSES)]
            scene = render_scene(config, split, i)
            name = f"{split}_{i:05d}.png"
            rel = Path("images") / split / label / name
            rel_mask = Path("masks") / split / name
            (out_dir / rel).parent.mkdir(parents=True, exist_ok=True)
            (out_dir / rel_mask).parent.mkdir(parents=True, exist_ok=True)
            scene.image.save(out_dir / rel)
            Image.fromarray(scene.mask, "L").save(out_dir / rel_mask)
            counts[split][label] += 1
            cue_counts[split][label] += int(scene.cue)
            rows.append({"path": rel.as_posix(), "label": label, "split": split, "mask": rel_mask.as_posix(), "cue": str(int(scene.cue))})
            scenes[rel.as_posix()] = {"parts": scene.parts, "cue": scene.cue, "mask": rel_mask.as_posix()}
    manifest = out_dir / "manifest.csv"
    with open(manifest, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=["path", "label", "split", "mask", "cue"])
        writer.writeheader()
        writer.writerows(rows)
    meta = {"config": asdict(config), "classes": list(CLASSES), "parts": list(PARTS), "cue_concept": CUE_CONCEPTS.get(config.cue), "scenes": scenes}
    (out_dir / "scenes.json").write_text(json.dumps(meta, indent=1, sort_keys=True), encoding="utf-8")
    return DatasetInfo(root=out_dir, manifest=manifest, config=config, counts=counts, cue_counts=cue_counts)


def write_without_cue(root: Path) -> list[Path]:
    """Draw every scene of a generated data set that carries the cue again without it, under
    ``images_without_cue/`` (same relative paths as under ``images/``); returns the files written."""
    root = Path(root)
    meta = load_scenes(root)
    config = SceneConfig(**meta["config"])
    written = []
    for rel, scene in meta["scenes"].items():
        if not scene["cue"]:
            continue
        split, index = Path(rel).parts[1], int(Path(rel).stem.split("_")[-1])
        out = root / "images_without_cue" / Path(*Path(rel).parts[1:])
        out.parent.mkdir(parents=True, exist_ok=True)
        render_scene(config, split, index, draw_cue=False).image.save(out)
        written.append(out)
    return written


def load_scenes(root: Path) -> dict[str, Any]:
    """Read back the ``scenes.json`` written by :func:`generate_dataset`."""
    found: dict[str, Any] = json.loads((Path(root) / "scenes.json").read_text(encoding="utf-8"))
    return found
