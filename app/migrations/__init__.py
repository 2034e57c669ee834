"""The project database's schema history as Alembic revisions (``versions/``), run by ``app.db`` on open.

A change to ``app/models.py`` needs a revision here; DEVELOPERS.md says how to make one.
"""
