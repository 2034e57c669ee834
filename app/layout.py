"""Where a project keeps its files: every on-disk path of a project is spelled here and nowhere else.

The database stores paths relative to the project folder (``runs/3/crops/17_0.png``), so a
project can move; ``path`` turns one back into a file under the folder.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from .errors import NotFoundError

DB_NAME = "heedmap.db"
RUN_SUBFOLDERS = ("crops", "outlines", "maps")


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

    def intervention_file(self, key: str) -> Path:
        return self.interventions / f"{key}.json"

    def run_dir(self, run_id: int) -> Path:
        return self.root / "runs" / str(run_id)

    def make_run_dirs(self, run_id: int) -> None:
        for sub in RUN_SUBFOLDERS:
            (self.run_dir(run_id) / sub).mkdir(parents=True, exist_ok=True)

    # Relative paths, as the database stores them.
    @staticmethod
    def saliency_map(run_id: int, image_id: int) -> str:
        """The image's saliency map (.npy, model-input pixels)."""
        return f"runs/{run_id}/maps/{image_id}.npy"

    @staticmethod
    def region_labels(run_id: int, image_id: int) -> str:
        """Per pixel of the map, the rank of the region it belongs to (0: none)."""
        return f"runs/{run_id}/maps/{image_id}_regions.npy"

    @staticmethod
    def crop(run_id: int, image_id: int, rank: int) -> str:
        return f"runs/{run_id}/crops/{image_id}_{rank}.png"

    @staticmethod
    def outline(run_id: int, image_id: int, rank: int) -> str:
        return f"runs/{run_id}/outlines/{image_id}_{rank}.png"

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
