from __future__ import annotations

from pathlib import Path

import pytest
from PIL import Image
from sqlalchemy import func, select

from analysis.images import ImageRecord, find_images
from analysis.model_io import LoadedModel
from app.db import make_engine, session_factory
from app.jobs import register_images, run_saliency
from app.models import ImageRow, Prediction, RegionRow, SaliencyRun


class Killed(Exception):
    pass


def _counts(factory) -> tuple[int, int, int]:  # type: ignore[no-untyped-def]
    with factory() as s:
        return (s.scalar(select(func.count(Prediction.id))), s.scalar(select(func.count(RegionRow.id))), s.scalar(select(func.count(SaliencyRun.id))))


def test_interrupted_job_resumes_without_duplicates(tmp_path: Path, small_scenes: Path, tiny_model: LoadedModel) -> None:
    records = find_images(small_scenes / "manifest.csv")
    full = session_factory(make_engine(tmp_path / "full"))
    register_images(full, records)
    run_saliency(full, tmp_path / "full", tiny_model, batch_size=4, progress=None)

    proj = tmp_path / "resumed"
    factory = session_factory(make_engine(proj))
    register_images(factory, records)

    def kill(batch: int) -> None:
        if batch == 1:
            raise Killed

    with pytest.raises(Killed):
        run_saliency(factory, proj, tiny_model, batch_size=4, progress=None, after_batch=kill)
    assert _counts(factory)[0] == 8  # two batches committed
    report = run_saliency(factory, proj, tiny_model, batch_size=4, progress=None)
    assert report.already_done == 8 and report.processed == len(records) - 8
    assert _counts(factory) == _counts(full)
    again = run_saliency(factory, proj, tiny_model, batch_size=4, progress=None)
    assert again.processed == 0 and _counts(factory) == _counts(full)


def test_bad_images_are_skipped_and_listed(tmp_path: Path, small_scenes: Path, tiny_model: LoadedModel) -> None:
    corrupt = tmp_path / "corrupt.png"
    corrupt.write_bytes(b"not a png")
    big = tmp_path / "big.png"
    Image.new("RGB", (300, 300)).save(big)
    good = find_images(small_scenes / "manifest.csv")[:2]
    records = good + [ImageRecord(tmp_path / "missing.png", "can"), ImageRecord(corrupt, "can"), ImageRecord(big, "can")]
    factory = session_factory(make_engine(tmp_path / "p"))
    problems = register_images(factory, records, max_pixels=200 * 200)
    reasons = " ".join(r for _, r in problems)
    assert len(problems) == 3 and "does not exist" in reasons and "not a readable image" in reasons and "over the limit" in reasons
    report = run_saliency(factory, tmp_path / "p", tiny_model, progress=None)
    assert report.processed == 2
    with factory() as s:
        assert s.scalar(select(func.count(ImageRow.id)).where(ImageRow.problem.is_not(None))) == 3


def test_extreme_shapes_are_refused_with_a_message(tmp_path: Path, small_scenes: Path) -> None:
    Image.new("RGB", (8000, 1), "white").save(tmp_path / "strip.png")
    Image.new("RGB", (64, 48), "white").save(tmp_path / "fine.png")
    factory = session_factory(make_engine(tmp_path / "p"))
    problems = register_images(factory, [ImageRecord(path=tmp_path / "strip.png", label="can"), ImageRecord(path=tmp_path / "fine.png", label="can")])
    assert len(problems) == 1 and "8000x1" in problems[0][1] and "less extreme shape" in problems[0][1]


def test_a_model_that_gives_nan_stores_nothing_for_those_images(tmp_path: Path, small_scenes: Path, tiny_model: LoadedModel) -> None:
    import torch

    last = [m for m in tiny_model.module.modules() if isinstance(m, torch.nn.Linear)][-1]
    with torch.no_grad():
        last.bias[0] = float("nan")
    factory = session_factory(make_engine(tmp_path / "p"))
    register_images(factory, find_images(small_scenes / "manifest.csv"))
    rep = run_saliency(factory, tmp_path / "p", tiny_model, batch_size=4, progress=None)
    assert rep.processed >= 0 and len(rep.skipped) == 18 and all("NaN or infinite" in why for _, why in rep.skipped)
    assert _counts(factory)[:2] == (0, 0)


def test_a_second_saliency_job_is_refused_naming_the_first(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import os

    from app.cli import main
    from app.job_lock import saliency_job_lock

    project = tmp_path / "p"
    project.mkdir()
    with saliency_job_lock(project):
        assert main(["saliency", str(project), "--model", str(tmp_path / "m.pt"), "--sidecar", str(tmp_path / "s.json"), "--images", str(tmp_path)]) == 1
    err = capsys.readouterr().err
    assert "another saliency job is running" in err and f"process {os.getpid()}" in err and "Traceback" not in err
    with saliency_job_lock(project):  # released when the first ended
        pass
