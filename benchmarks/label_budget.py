"""How few judgments give the same answers? Labelling everything with three people per region against a
random sample, a stratified sample, the stratified sample labelled in groups, and that plus adaptive
redundancy (two people per region, a third only where they disagree), on a demo of 5,000 images.

    nice -n 10 .venv/bin/python -m benchmarks.label_budget                # 5,000 audited images (builds a cached project once)
    nice -n 10 .venv/bin/python -m benchmarks.label_budget --images 600   # a quick look

For each way of labelling and each size of sample, the simulated annotators of the demo label the
sample (they read the part masks, with their own error rates; in groups they also miss some crops
that do not fit, and never see other people's answers). Two questions decide whether a sample is
enough: (i) the injected cue ranks first among its class's rules with q < 0.01 and a covering test
confirms the model relies on it; (ii) every class's top-10 rules match labelling everything with
three people: the same top 3 and a rank correlation of at least 0.9. The table says how many
judgments (labels of one crop by one person) each way needed, and the people-hours they cost at the
seconds per judgment the browser test measures (rough: machine time, no looking).
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

from demo_data.scenes import SceneConfig, generate_dataset
from demo_data.train import train_demo_model

CACHE = Path(__file__).resolve().parent / "out" / "label_budget_cache"


def build(cache: Path, *, images: int, seed: int) -> dict[str, object]:
    """The demo project with ``images`` audited images, trained model, saliency run and region embeddings; made once per size and seed."""
    from analysis.images import find_images
    from analysis.model_io import load_model
    from app.db import make_engine, session_factory
    from app.embeddings import embed_run
    from app.jobs import register_images, run_saliency

    root = cache / f"images{images}-seed{seed}"
    done = root / "built.json"
    if done.is_file():
        return dict(json.loads(done.read_text()))
    root.mkdir(parents=True, exist_ok=True)
    t = time.perf_counter()
    data = root / "data"
    generate_dataset(data, SceneConfig(seed=seed, n_train=1200, n_test=images, n_counterfactual=0, cue="tag"))
    trained = train_demo_model(data, root / "model", epochs=6, seed=seed)
    engine = make_engine(root / "project")
    factory = session_factory(engine)
    register_images(factory, [r for r in find_images(data / "manifest.csv") if r.split == "test"])
    model = load_model(trained.model_path, trained.sidecar_path)
    report = run_saliency(factory, root / "project", model, model_files=(trained.model_path, trained.sidecar_path), progress=None)
    embedded = embed_run(factory, root / "project", report.run_id, model)
    engine.dispose()
    info: dict[str, object] = {"root": str(root), "data": str(data), "project": str(root / "project"), "run_id": report.run_id,
                               "images": report.processed + report.already_done, "regions": report.regions, "embedding_dims": embedded.dimensions,
                               "accuracy": trained.accuracy, "build_s": round(time.perf_counter() - t, 1)}
    done.write_text(json.dumps(info, indent=2))
    return info


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else None)
    p.add_argument("--images", type=int, default=5000)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--cache", type=Path, default=CACHE)
    p.add_argument("--build-only", action="store_true")
    args = p.parse_args(argv)
    info = build(args.cache, images=args.images, seed=args.seed)
    print(json.dumps(info, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
