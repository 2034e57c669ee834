"""``./dev migration "what changes"``: write a new revision from the difference between the models and the newest revision.

It makes a throwaway SQLite project at the head revision, compares it with ``app/models.py``
(Alembic's autogenerate) and writes ``versions/NNNN_slug.py`` for you to read and finish.
"""

from __future__ import annotations

import re
import sys
import tempfile
from pathlib import Path


def next_revision_id(message: str, versions: Path) -> str:
    numbers = [int(m.group(1)) for p in versions.glob("*.py") if (m := re.match(r"(\d{4})_", p.name))]
    slug = re.sub(r"[^a-z0-9]+", "_", message.lower()).strip("_")[:40] or "change"
    return f"{max(numbers, default=0) + 1:04d}_{slug}"


def main(argv: list[str]) -> int:
    from alembic import command

    from app.db import MIGRATIONS, _alembic_config, make_engine

    if len(argv) != 1 or not argv[0].strip():
        print('usage: ./dev migration "what the revision changes"', file=sys.stderr)
        return 2
    with tempfile.TemporaryDirectory() as tmp:
        engine = make_engine(Path(tmp) / "project")
        try:
            with engine.begin() as c:
                rev_id = next_revision_id(argv[0], MIGRATIONS / "versions")
                command.revision(_alembic_config(c), message=argv[0], autogenerate=True, rev_id=rev_id)
        finally:
            engine.dispose()
    print(f"wrote app/migrations/versions/{rev_id}.py: read it, finish upgrade() and downgrade(), and test it (DEVELOPERS.md, schema changes)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
