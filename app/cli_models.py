"""Command-line commands about models and saliency runs: saliency, layers, sidecar, runs."""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path
from typing import TYPE_CHECKING

from .errors import AppError

if TYPE_CHECKING:
    from PIL import Image

    from analysis.model_io import LoadedModel


def _model_options(p: argparse.ArgumentParser, *, model_flag: bool = True, sidecar_required: bool = True) -> None:
    if model_flag:
        p.add_argument("--model", type=Path, default=None, help="exported program (.pt2), TorchScript, or a checkpoint for --model-factory/'architecture'")
    p.add_argument("--sidecar", type=Path, required=sidecar_required, help="JSON describing the model (write one with 'heedmap sidecar')")
    p.add_argument("--model-factory", default=None, metavar="PACKAGE.MODULE:FUNCTION", help="a function of your own code that builds the nn.Module")
    p.add_argument("--device", default="cpu", help="cpu (default) or cuda")


def add_model_parsers(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    s = sub.add_parser("saliency", help="predict, Grad-CAM and regions for an image set (resumable)")
    s.add_argument("project", type=Path)
    _model_options(s)
    s.add_argument("--images", type=Path, required=True, help="folder with a subfolder per class, or a CSV with path,label")
    s.add_argument("--name", default=None, help="name of the run, e.g. test or counterfactual (default: the image folder's name)")
    s.add_argument("--batch-size", type=int, default=32)
    s.add_argument("--workers", type=int, default=None, metavar="N", help="compute on a local Dask cluster of N worker processes (needs the cluster extra)")
    s.add_argument("--cluster", default=None, metavar="ADDRESS", help="compute on the running Dask scheduler at ADDRESS, e.g. tcp://10.0.0.5:8786; "
                   "every worker must reach the model and image paths")
    r = sub.add_parser("runs", help="list a project's saliency runs")
    r.add_argument("project", type=Path)
    y = sub.add_parser("layers", help="list a model's candidate Grad-CAM layers with their map sizes; preview one image's map per layer")
    y.add_argument("model", type=Path, nargs="?", default=None, help="the model file (or the checkpoint, with --model-factory)")
    _model_options(y, model_flag=False, sidecar_required=False)
    y.add_argument("--project", type=Path, default=None, help="use the model a saliency run of this project recorded (no model flags needed)")
    y.add_argument("--run", default=None, help="with --project: the run's id or name (default: the latest run)")
    y.add_argument("--image", type=Path, default=None, help="an image for the preview (default: none, no preview)")
    y.add_argument("--preview", type=Path, default=None, help="PNG to write the per-layer maps to (default: layers.png beside --image)")
    y.add_argument("--all", action="store_true", help="list and preview nested layers too, not only blocks and stages")
    c = sub.add_parser("sidecar", help="write a checked sidecar JSON from a few flags")
    c.add_argument("out", type=Path, help="where to write the sidecar")
    c.add_argument("--classes", required=True, help="class names in the model's output order, comma-separated")
    c.add_argument("--input-size", required=True, help="H,W or one number for a square input")
    c.add_argument("--mean", default="0,0,0", help="three numbers, in the model's channel order")
    c.add_argument("--std", default="1,1,1")
    c.add_argument("--mean-std-scale", choices=["0-1", "0-255"], default="0-1", help="the pixel scale mean and std are given on")
    c.add_argument("--resize", choices=["resize", "center_crop", "letterbox"], default="resize")
    c.add_argument("--channel-order", choices=["RGB", "BGR"], default="RGB")
    c.add_argument("--layer", default=None, help="the Grad-CAM layer's module path (default: chosen from the model)")
    c.add_argument("--output", default=None, help="key (dict output) or index (tuple output) of the logits")
    c.add_argument("--model", type=Path, default=None, help="check the sidecar against this model and record the layer chosen")
    c.add_argument("--model-factory", default=None, metavar="PACKAGE.MODULE:FUNCTION")
    c.add_argument("--force", action="store_true", help="overwrite an existing file")


def _print_model(model: LoadedModel) -> None:
    size = f"{model.map_size[0]}x{model.map_size[1]}"
    print(f"model: {model.kind}, Grad-CAM layer {model.target_layer} ({size} map)" + (f", patch tokens after {model.grid.prefix} prefix token(s)" if model.grid else ""), file=sys.stderr)
    for note in model.notes:
        print(f"note: {note}", file=sys.stderr)
    for warning in model.warnings:
        print(f"heedmap: warning: {warning}", file=sys.stderr)


def _load(model: Path | None, sidecar: Path, factory: str | None, device: str) -> LoadedModel:
    from analysis.layer_taps import DegenerateMapWarning
    from analysis.model_io import load_model

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DegenerateMapWarning)  # printed from model.warnings instead
        return load_model(model, sidecar, factory=factory, device=device)


def saliency(args: argparse.Namespace) -> int:
    from analysis.errors import ImageInputError
    from analysis.images import find_images, read_rgb, to_model_input
    from analysis.model_io import check_finite_outputs

    from .cluster import ClusterOptions
    from .db import open_project, session_factory
    from .jobs import register_images, run_saliency, show_progress

    options = ClusterOptions(workers=args.workers, address=args.cluster) if args.workers is not None or args.cluster is not None else None
    model = _load(args.model, args.sidecar, args.model_factory, args.device)
    _print_model(model)
    records = find_images(args.images)
    # A model that gives NaN or inf is refused before the long run, naming the image.
    probe: list[Image.Image] = []
    names: list[str] = []
    for rec in records:
        if len(probe) >= 8:
            break
        try:
            probe.append(read_rgb(Path(rec.path)))
            names.append(str(rec.path))
        except ImageInputError:
            continue
    if probe:
        check_finite_outputs(model, to_model_input(probe, **model.sidecar.input_options()), names)
    name = args.name or _default_name(args.images)
    factory = session_factory(open_project(args.project, create=True))
    problems = register_images(factory, records)
    # Recorded so interventions and 'heedmap layers --project' load the same model again (a factory's
    # function and import folder go into the run's provenance).
    model_files = (args.model, args.sidecar)
    if options is not None:
        from .cluster import ModelSpec, run_saliency_on_cluster

        spec = ModelSpec(model=str(Path(args.model).resolve()) if args.model is not None else None, sidecar=str(Path(args.sidecar).resolve()),
                         factory=args.model_factory, sha256=model.sha256, device=args.device, folder=model.factory_folder)
        rep = run_saliency_on_cluster(factory, args.project, model, spec, options, batch_size=args.batch_size, progress=show_progress, model_files=model_files,
                                      images=records, name=name, source=args.images)
    else:
        rep = run_saliency(factory, args.project, model, batch_size=args.batch_size, model_files=model_files, images=records, name=name, source=args.images)
    for _path, why in problems + rep.skipped:
        print(f"skipped: {why}", file=sys.stderr)
    state = "new run" if rep.new_run else "continued"
    print(f"run {rep.run_id} '{rep.name}' ({state}): {rep.processed} images processed, {rep.already_done} already done, {rep.regions} regions, "
          f"{rep.empty_maps} empty maps, {len(problems) + len(rep.skipped)} skipped")
    if rep.processed and rep.whole_image_regions > rep.processed // 2:
        print(f"heedmap: warning: in {rep.whole_image_regions} of {rep.processed} images the top region covers 90% of the image or more; "
              "the layer's map is too coarse to say where the model looks. 'heedmap layers' lists layers with larger maps.", file=sys.stderr)
    return 0


def _default_name(source: Path) -> str:
    source = Path(source)
    return (source.stem if source.is_file() else source.resolve().name) or "images"


def runs(args: argparse.Namespace) -> int:
    from .db import open_project, session_factory
    from .jobs import list_runs

    summaries = list_runs(session_factory(open_project(args.project)))
    if not summaries:
        print(f"{args.project} has no saliency runs yet.")
        return 0
    print("id,name,created,images,done,layer,model,model_sha256,key")
    for r in summaries:
        print(f"{r.id},{r.name},{r.created},{r.images},{r.done},{r.layer},{r.model_kind},{r.model_sha256},{r.key}")
    return 0


def layers(args: argparse.Namespace) -> int:
    from analysis.images import read_rgb, to_model_input
    from analysis.layer_preview import layer_maps, preview_sheet

    model = _run_model(args) if args.project is not None else None
    if model is None:
        if args.sidecar is None:
            raise AppError("give --sidecar with the model (or --project to use the model a saliency run recorded).")
        model = _load(args.model, args.sidecar, args.model_factory, args.device)
    infos = [i for i in model.layers if i.map_size is not None]
    if not args.all and infos:
        depth = min(i.name.count(".") for i in infos)
        infos = [i for i in infos if i.name.count(".") <= depth + 1 or i.name == model.target_layer]
    print("layer,type,output,map,default")
    for i in infos:
        size = f"{i.map_size[0]}x{i.map_size[1]}" if i.map_size else "-"
        shape = "x".join(str(v) for v in i.shape)
        print(f"{i.name},{i.module_type},{shape},{size},{'*' if i.name == model.target_layer else ''}")
    for warning in model.warnings:
        print(f"heedmap: warning: {warning}", file=sys.stderr)
    if args.image is None:
        return 0
    image = read_rgb(args.image)
    x = to_model_input([image], **model.sidecar.input_options())
    shown = infos[-36:]
    maps = layer_maps(model, x, [i.name for i in shown])
    out = args.preview or Path(args.image).with_name("layers.png")
    preview_sheet(image, model.sidecar, [(i.name, i.map_size, maps[i.name]) for i in shown]).save(out)
    print(f"wrote {out} ({len(shown)} layers)", file=sys.stderr)
    return 0


def _run_model(args: argparse.Namespace) -> LoadedModel:
    """The model a saliency run recorded (its file or factory, checkpoint and sidecar)."""
    from analysis.layer_taps import DegenerateMapWarning

    from .db import open_project, session_factory
    from .jobs import find_run
    from .reliance import model_for_run

    if args.model_factory is not None:
        raise AppError("--project uses the model its run recorded; leave out --model-factory (or leave out --project).")
    factory = session_factory(open_project(args.project))
    with factory() as s:
        run_id = find_run(s, args.run)
        if run_id is None:
            raise AppError(f"{args.project} has no saliency run {args.run!r}; 'heedmap runs {args.project}' lists them." if args.run else f"{args.project} has no saliency runs yet.")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DegenerateMapWarning)
            return model_for_run(s, run_id, args.model, args.sidecar)


def _numbers(text: str, flag: str, count: int) -> list[float]:
    try:
        values = [float(v) for v in text.replace(" ", "").split(",") if v]
    except ValueError:
        raise AppError(f"{flag} must be {count} comma-separated numbers; got {text!r}.") from None
    if len(values) != count:
        raise AppError(f"{flag} must be {count} comma-separated numbers; got {text!r}.")
    return values


def sidecar(args: argparse.Namespace) -> int:
    import json
    import tempfile

    from analysis.model_io import Sidecar, sidecar_from_dict, write_sidecar

    if args.out.exists() and not args.force:
        raise AppError(f"{args.out} exists; give --force to overwrite it.")
    size = [int(v) for v in _numbers(args.input_size, "--input-size", 2 if "," in args.input_size else 1)]
    raw: dict[str, object] = {
        "classes": [c.strip() for c in args.classes.split(",") if c.strip()],
        "input_size": size * 2 if len(size) == 1 else size,
        "mean": _numbers(args.mean, "--mean", 3),
        "std": _numbers(args.std, "--std", 3),
        "mean_std_scale": args.mean_std_scale,
        "resize": args.resize,
        "channel_order": args.channel_order,
        "target_layer": args.layer,
    }
    if args.output is not None:
        raw["output"] = int(args.output) if args.output.lstrip("-").isdigit() else args.output
    checked: Sidecar = sidecar_from_dict(raw, where="the sidecar flags")
    if args.model is not None or args.model_factory is not None:
        with tempfile.TemporaryDirectory() as tmp:
            draft = Path(tmp) / "sidecar.json"
            write_sidecar(checked, draft)
            model = _load(args.model, draft, args.model_factory, "cpu")
        _print_model(model)
        checked = model.sidecar
    elif checked.target_layer is None:
        print("note: no --model given, so the layer is left for heedmap to choose when the model is loaded", file=sys.stderr)
    write_sidecar(checked, args.out)
    print(json.dumps(checked.to_json()))
    print(f"wrote {args.out}", file=sys.stderr)
    return 0


__all__ = ["add_model_parsers", "layers", "runs", "saliency", "sidecar"]
