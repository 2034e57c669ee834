"""Where a project keeps its files: every on-disk path of a project is spelled here and nowhere else.

The database stores paths relative to the project folder (``runs/3/maps/b00000017-1f2e3d4c.npy#5``), so a
project can move; ``path`` turns one back into a file under the folder.

A saliency run writes one shard per batch: ``maps/<shard>.npy`` (N x H x W float16 maps) and
``maps/<shard>_regions.npy`` (N x H x W uint8, pixel value r + 1 marks region rank r). A prediction's
``map_path`` names its row as ``<file>#<row>``. Region crops are not stored: they are cut from the original
image when asked. Projects made before keep one ``maps/<image>.npy`` (and ``_regions.npy``) per image and
one crop PNG per region; both are still read.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from .errors import NotFoundError

DB_NAME = "heedmap.db"
RUN_SUBFOLDERS = ("maps",)


@dataclass(frozen=True)
class ProjectLayout:
    """The files of the project in folder ``root``."""

    root: Path

    @property
    def database(self) -> Path:
        return self.root / DB_NAME

    @property
    def interventions(self) -> Path:
        """Folder of stored intervention results, one JSON file per rule, data and model version."""
        return self.root / "interventions"

    @property
    def label_cache(self) -> Path:
        """Folder of each campaign's labels as the server last held them (app.services.label_snapshot): a cache the
        database is checked against, safe to delete."""
        return self.root / "cache"

    def intervention_file(self, key: str) -> Path:
        return self.interventions / f"{key}.json"

    def run_dir(self, run_id: int) -> Path:
        return self.root / "runs" / str(run_id)

    def make_run_dirs(self, run_id: int) -> None:
        for sub in RUN_SUBFOLDERS:
            (self.run_dir(run_id) / sub).mkdir(parents=True, exist_ok=True)

    # Relative paths, as the database stores them.
    @staticmethod
    def map_shard(run_id: int, shard: str) -> str:
        """One batch's saliency maps (.npy, N x H x W float16, model-input pixels)."""
        return f"runs/{run_id}/maps/{shard}.npy"

    @staticmethod
    def map_ref(shard_rel: str, row: int) -> str:
        """What a prediction stores: its shard and its row in it."""
        return f"{shard_rel}#{row}"

    @staticmethod
    def split_map_ref(ref: str) -> tuple[str, int | None]:
        """(file, row) of a stored map reference; row None for a one-image file (projects made before shards)."""
        rel, sep, row = ref.rpartition("#")
        if not sep:
            return ref, None
        if not row.isdigit() or len(row) > 9:
            raise NotFoundError(f"the stored map reference {ref[:200]!r} is damaged (its row is not a number).")
        return rel, int(row)

    @staticmethod
    def region_labels_of(map_file: str) -> str:
        """The region-label file beside a map file: per pixel, the rank + 1 of the region it belongs to (0: none)."""
        stem = map_file[: -len(".npy")] if map_file.endswith(".npy") else map_file
        return f"{stem}_regions.npy"

    @staticmethod
    def legacy_map(run_id: int, image_id: int) -> str:
        """One image's map as projects made before shards stored it."""
        return f"runs/{run_id}/maps/{image_id}.npy"

    @staticmethod
    def region_embeddings(run_id: int) -> str:
        """Every region's embedding of the run in one array file (.npz: region ids, vectors; `heedmap embed`)."""
        return f"runs/{run_id}/region_embeddings.npz"

    def path(self, rel: str) -> Path:
        """The file a stored relative path names, resolved; a path that leads outside the folder (absolute,
        '..', a link) is refused, so a tampered row cannot make the app serve /etc/passwd."""
        root = self.root.resolve()
        found = (root / rel).resolve()
        if not found.is_relative_to(root):
            raise NotFoundError(f"the stored path {rel[:200]!r} leads outside the project folder; heedmap only serves files inside it.")
        return found

    def existing(self, rel: str, *, what: str) -> Path:
        """The file a stored relative path names; NotFoundError naming ``what`` when it is missing."""
        path = self.path(rel)
        if not path.is_file():
            raise NotFoundError(f"{what} is missing from the project folder ({rel}).")
        return path
