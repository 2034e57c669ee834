"""The saliency job on a local Dask cluster: the same rows and maps as the single-process job, resumable,
one writer, and clear messages for a missing or unreachable cluster."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import torch
from sqlalchemy import select

from analysis.architectures import SorterCNN
from analysis.images import find_images
from analysis.model_io import load_model
from app.cli import main
from app.cluster import ClusterOptions, ModelSpec, connect, run_saliency_on_cluster
from app.db import make_engine, session_factory
from app.errors import AppError
from app.jobs import register_images, run_saliency
from app.layout import ProjectLayout
from app.maps import read_region_labels, read_saliency
from app.models import ImageRow, Prediction, RegionRow

pytest.importorskip("distributed", reason="the cluster extra (Dask distributed) is not installed")


def _model_files(tmp: Path) -> tuple[Path, Path]:
    torch.manual_seed(0)
    model = SorterCNN(num_classes=3, width=8).eval()
    program = torch.export.export(model, (torch.randn(2, 3, 64, 64),), dynamic_shapes=({0: torch.export.Dim("batch")},))
    torch.export.save(program, tmp / "model.pt2")
    (tmp / "sidecar.json").write_text(json.dumps({"classes": ["bottle", "can", "carton"], "input_size": [64, 64], "mean": [0.4] * 3, "std": [0.2] * 3}))
    return tmp / "model.pt2", tmp / "sidecar.json"


def _stored(project: Path) -> list[tuple[object, ...]]:
    """Every prediction with its regions and its maps (as stored), in image order, keyed by image path."""
    engine = make_engine(project)
    layout = ProjectLayout(project)
    out = []
    with session_factory(engine)() as s:
        for pred, path in s.execute(select(Prediction, ImageRow.path).join(ImageRow, ImageRow.id == Prediction.image_id).order_by(ImageRow.path)).all():
            regions = s.execute(select(RegionRow.rank, RegionRow.x0, RegionRow.y0, RegionRow.x1, RegionRow.y1, RegionRow.area, RegionRow.mass_share)
                                .where(RegionRow.prediction_id == pred.id).order_by(RegionRow.rank)).all()
            out.append((path, pred.predicted, pred.confidence, pred.empty_map, [tuple(r) for r in regions],
                        read_saliency(layout, pred.map_path), read_region_labels(layout, pred.map_path)))
    engine.dispose()
    return out


def _same(a: list[tuple[object, ...]], b: list[tuple[object, ...]]) -> None:
    assert len(a) == len(b) > 0
    for x, y in zip(a, b):
        assert x[:5] == y[:5], x[0]
        assert np.array_equal(x[5], y[5]) and np.array_equal(x[6], y[6]), x[0]  # type: ignore[arg-type]


class Killed(Exception):
    pass


@pytest.mark.slow
def test_two_local_workers_store_what_the_single_process_job_stores_and_resume(tmp_path: Path, small_scenes: Path) -> None:
    model_path, sidecar = _model_files(tmp_path)
    model = load_model(model_path, sidecar)
    records = find_images(small_scenes / "manifest.csv")
    single = tmp_path / "single"
    factory = session_factory(make_engine(single))
    register_images(factory, records)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # the workers run one thread each; the same thread count gives the same floating-point sums
    try:
        run_saliency(factory, single, model, batch_size=4, progress=None)
    finally:
        torch.set_num_threads(threads)

    spread = tmp_path / "spread"
    factory = session_factory(make_engine(spread))
    register_images(factory, records)
    spec = ModelSpec(model=str(model_path), sidecar=str(sidecar), factory=None, sha256=model.sha256)

    def kill(stored: int) -> None:
        if stored == 2:
            raise Killed

    options = ClusterOptions(workers=2, threads_per_worker=1)
    with connect(options) as client:
        with pytest.raises(Killed):  # the job stops after two batches are stored (as a crash would)
            run_saliency_on_cluster(factory, spread, model, spec, options, batch_size=4, after_batch=kill, client=client)
        with factory() as s:
            assert len(list(s.scalars(select(Prediction.id)))) == 8
        report = run_saliency_on_cluster(factory, spread, model, spec, options, batch_size=4, client=client)
        assert len(client.scheduler_info()["workers"]) == 2
    assert report.run_id == 1 and report.already_done == 8 and report.processed == len(records) - 8
    _same(_stored(single), _stored(spread))


def test_cluster_options_and_an_unreachable_scheduler_give_clear_messages(tmp_path: Path, small_scenes: Path, capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(AppError, match="not both"):
        ClusterOptions(workers=2, address="tcp://127.0.0.1:1")
    with pytest.raises(AppError, match="between 1 and 256"):
        ClusterOptions(workers=0)
    model_path, sidecar = _model_files(tmp_path)
    base = ["saliency", str(tmp_path / "p"), "--model", str(model_path), "--sidecar", str(sidecar), "--images", str(small_scenes / "manifest.csv")]
    assert main([*base, "--cluster", "tcp://127.0.0.1:9"]) == 1
    err = capsys.readouterr().err
    assert "could not reach the Dask scheduler" in err and "Traceback" not in err
