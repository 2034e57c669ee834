from __future__ import annotations

from pathlib import Path

import pytest
from PIL import Image
from sqlalchemy import func, select

from analysis.images import ImageRecord, find_images
from analysis.model_io import LoadedModel
from app.db import make_engine, session_factory
from app.errors import InvalidRequestError
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


def _stored(factory, layout):  # type: ignore[no-untyped-def]
    """Every stored prediction (by image path) with its map, region-label map and regions."""
    import numpy as np

    from app.maps import read_region_labels, read_saliency

    out = {}
    with factory() as s:
        for pred, path in s.execute(select(Prediction, ImageRow.path).join(ImageRow, ImageRow.id == Prediction.image_id)):
            regions = [(r.rank, r.x0, r.y0, r.x1, r.y1, r.area, r.mass_share)
                       for r in s.scalars(select(RegionRow).where(RegionRow.prediction_id == pred.id).order_by(RegionRow.rank))]
            out[path] = (pred.predicted, pred.confidence, pred.empty_map, np.asarray(read_saliency(layout, pred.map_path)),
                         read_region_labels(layout, pred.map_path), regions)
    return out


@pytest.mark.parametrize("streams", [2, 3])
def test_batches_computed_at_once_store_what_one_at_a_time_stores(tmp_path: Path, small_scenes: Path, varied_model: LoadedModel, streams: int) -> None:
    """Several batches in flight in threads of their own (a forward hook on the shared model sees
    every thread's forward) store the same predictions, maps and regions as one batch at a time, and
    those maps are Grad-CAM computed directly on each image's batch."""
    import numpy as np

    from analysis.images import read_rgb, to_model_input
    from analysis.saliency import compute_saliency
    from app.layout import ProjectLayout

    records = find_images(small_scenes / "manifest.csv")
    got = {}
    for n in (1, streams):
        factory = session_factory(make_engine(tmp_path / f"s{n}"))
        register_images(factory, records)
        report = run_saliency(factory, tmp_path / f"s{n}", varied_model, batch_size=4, progress=None, streams=n)
        assert report.processed == len(records)
        got[n] = _stored(factory, ProjectLayout(tmp_path / f"s{n}"))
    assert got[1].keys() == got[streams].keys() and len(got[1]) == len(records)
    assert len({v[0] for v in got[1].values()}) > 1  # the model predicts more than one class here
    for path, one in got[1].items():
        other = got[streams][path]
        assert one[:3] == other[:3] and one[5] == other[5], path
        assert np.array_equal(one[3], other[3]) and np.array_equal(one[4], other[4]), path
    with session_factory(make_engine(tmp_path / "s1"))() as s:
        paths = [p for p, in s.execute(select(ImageRow.path).order_by(ImageRow.id))]
    for start in range(0, len(paths), 4):
        chunk = paths[start : start + 4]
        direct = compute_saliency(varied_model, to_model_input([read_rgb(Path(p)) for p in chunk], **varied_model.sidecar.input_options()))
        for k, p in enumerate(chunk):
            assert np.array_equal(got[streams][p][3], direct.maps[k].astype(np.float16).astype(np.float32)), p
            assert varied_model.classes[int(direct.predicted[k])] == got[streams][p][0]


def test_the_job_leaves_torchs_thread_setting_as_it_found_it(tmp_path: Path, small_scenes: Path, tiny_model: LoadedModel) -> None:
    import threading

    import torch

    before = torch.get_num_threads()
    factory = session_factory(make_engine(tmp_path / "p"))
    register_images(factory, find_images(small_scenes / "manifest.csv"))
    run_saliency(factory, tmp_path / "p", tiny_model, batch_size=4, progress=None, streams=2)
    assert torch.get_num_threads() == before
    seen: list[int] = []
    t = threading.Thread(target=lambda: seen.append(torch.get_num_threads()))  # a new thread starts from torch's default again
    t.start()
    t.join()
    assert seen == [before]


def test_resolved_paths_are_pathlibs_resolve(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """The run key and registration resolve image paths folder by folder; the strings must be exactly
    pathlib's ``str(Path(p).resolve())``, links and '..' included, or a resumed run would get a new key."""
    import os

    from app.jobs import resolved_paths

    real = tmp_path / "real" / "class_a"
    real.mkdir(parents=True)
    (real / "x.png").write_bytes(b"")
    (real / "y.png").write_bytes(b"")
    (tmp_path / "linked_dir").symlink_to(tmp_path / "real")
    (real / "link.png").symlink_to(real / "y.png")
    (tmp_path / "real" / "up").symlink_to(real)  # real/up/.. is real/class_a/.. = real, not real/up's folder by spelling
    monkeypatch.chdir(tmp_path)
    paths: list[str | os.PathLike[str]] = [
        real / "x.png", tmp_path / "linked_dir" / "class_a" / "x.png", real / "link.png", "real/class_a/y.png",
        "linked_dir/class_a/link.png", tmp_path / "real" / "up" / ".." / "class_a" / "x.png", "real/up/../class_a/missing.png",
        "missing_dir/z.png", "real/class_a/.", "real/class_a/..", "x.png", Path("linked_dir") / "class_a" / "y.png",
    ]
    assert resolved_paths(paths) == [str(Path(p).resolve()) for p in paths]


def test_a_job_with_no_streams_is_refused_with_a_message(tmp_path: Path, small_scenes: Path, tiny_model: LoadedModel) -> None:
    factory = session_factory(make_engine(tmp_path / "p"))
    register_images(factory, find_images(small_scenes / "manifest.csv"))
    with pytest.raises(InvalidRequestError, match="streams must be 1 or more"):
        run_saliency(factory, tmp_path / "p", tiny_model, batch_size=4, progress=None, streams=0)
    with factory() as s:
        assert s.scalars(select(SaliencyRun)).all() == []  # refused before a run was made
