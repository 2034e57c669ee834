"""The saliency job on a Dask cluster: workers read images and compute batches, this process is the one writer.

``--workers N`` starts a local cluster of N worker processes on this machine (bound to 127.0.0.1);
``--cluster ADDRESS`` joins a running scheduler (``tcp://host:8786``). Each worker loads the model from
the files named on the command line (the same paths must reach the same files on every worker; its
sha256 is checked against this process's) and reads images by the paths the project registered.
Workers return plain data (:class:`app.jobs.BatchResult`); this process stores each batch as it
arrives through the same :func:`app.jobs.store_batch` as the single-process job, so results are the
same and a stopped job resumes where it stopped. Batches in flight are bounded (two per worker), so
memory does not grow with the image set.
"""

from __future__ import annotations

import contextlib
import itertools
import logging
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from analysis.errors import AnalysisError
from analysis.images import ImageRecord
from analysis.model_io import LoadedModel

from .errors import AppError
from .jobs import BatchResult, JobReport, RegionParams, compute_batch, prepare_run, store_batch

DEFAULT_PARAMS = RegionParams()
INSTALL_HINT = "install the cluster extra: pip install 'heedmap[cluster]' (Dask distributed)"


@dataclass(frozen=True)
class ModelSpec:
    """How a worker loads the model: the files (reachable by the worker), the factory, and the sha256 it must match."""

    model: str | None
    sidecar: str
    factory: str | None
    sha256: str
    device: str = "cpu"
    folder: str | None = None  # where the factory's package was imported from (workers import it from there first)


@dataclass(frozen=True)
class ClusterOptions:
    """``workers``: start a local cluster of that many processes; ``address``: join that scheduler instead."""

    workers: int | None = None
    address: str | None = None
    threads_per_worker: int | None = None  # torch threads per worker; None: this machine's cores shared out (local), 1 (a joined cluster)

    def __post_init__(self) -> None:
        if (self.workers is None) == (self.address is None):
            raise AppError("give either --workers N (a local cluster) or --cluster ADDRESS (a running scheduler), not both.")
        if self.workers is not None and not 1 <= self.workers <= 256:
            raise AppError(f"--workers must be between 1 and 256; got {self.workers}.")
        if self.threads_per_worker is not None and not 1 <= self.threads_per_worker <= 256:
            raise AppError(f"threads per worker must be between 1 and 256; got {self.threads_per_worker}.")

    @property
    def torch_threads(self) -> int:
        """Torch threads each worker computes with: the given number, else the local cores shared out among the
        workers (at least one), or one on a joined cluster (start its workers with one thread each and as many
        worker processes as cores: ``dask worker ADDRESS --nthreads 1 --nworkers N``)."""
        if self.threads_per_worker is not None:
            return self.threads_per_worker
        if self.workers is not None:
            return max(1, (os.cpu_count() or 1) // self.workers)
        return 1


_LOADED: dict[ModelSpec, LoadedModel] = {}  # per worker process: the model is loaded once, not per batch


def _worker_model(spec: ModelSpec) -> LoadedModel:
    model = _LOADED.get(spec)
    if model is None:
        from analysis.model_io import load_model

        model = load_model(Path(spec.model) if spec.model else None, Path(spec.sidecar), factory=spec.factory, device=spec.device, folder=spec.folder)
        if model.sha256 != spec.sha256:
            import socket

            raise AppError(f"on worker {socket.gethostname()} the model file {spec.model} differs from the one the job started with "
                           "(its sha256 differs); give every worker the same file.")
        _LOADED.clear()
        _LOADED[spec] = model
    return model


def worker_batch(spec: ModelSpec, batch: list[tuple[int, str]], params: RegionParams, threads: int) -> BatchResult:
    """What a worker runs for one batch (module level, so workers import it by name)."""
    import torch

    if torch.get_num_threads() != threads:
        torch.set_num_threads(threads)
    return compute_batch(_worker_model(spec), batch, params)


@contextlib.contextmanager
def connect(options: ClusterOptions) -> Iterator[Any]:
    """A Dask client on a local cluster started here, or on the scheduler at ``options.address``."""
    try:
        from distributed import Client, LocalCluster
    except ImportError:
        raise AppError(f"--workers and --cluster need Dask distributed; {INSTALL_HINT}.") from None
    if options.address is not None:
        try:
            client = Client(options.address, timeout=10)  # type: ignore[no-untyped-call]  # distributed: untyped
        except (OSError, TimeoutError, ValueError) as exc:
            raise AppError(f"could not reach the Dask scheduler at {options.address!r}: {exc}. Start one ('dask scheduler') and its workers "
                           "('dask worker ADDRESS'), or use --workers N for a cluster on this machine.") from None
        with client:
            if not client.scheduler_info().get("workers"):
                try:
                    client.wait_for_workers(1, timeout=60)
                except (OSError, TimeoutError) as exc:
                    raise AppError(f"the Dask scheduler at {options.address!r} has no workers ({exc}); start some with "
                                   f"'dask worker {options.address} --nthreads 1 --nworkers N' on machines that reach the images.") from None
            yield client
        return
    cluster = LocalCluster(n_workers=options.workers, threads_per_worker=1, processes=True,  # type: ignore[no-untyped-call]  # distributed: untyped
                           host="127.0.0.1", dashboard_address=None, silence_logs=logging.CRITICAL)
    with cluster, Client(cluster) as client:  # type: ignore[no-untyped-call]  # distributed: untyped
        yield client


def run_saliency_on_cluster(
    factory: sessionmaker[Session],
    project_dir: Path,
    model: LoadedModel,
    spec: ModelSpec,
    options: ClusterOptions,
    *,
    params: RegionParams = DEFAULT_PARAMS,
    batch_size: int = 32,
    progress: Callable[[int, int], None] | None = None,
    after_batch: Callable[[int], None] | None = None,
    model_files: tuple[Path | None, Path] | None = None,
    images: list[ImageRecord] | None = None,
    name: str = "default",
    source: Path | None = None,
    client: Any | None = None,
) -> JobReport:
    """The saliency job of :func:`app.jobs.run_saliency`, its batches computed on a Dask cluster and stored here.

    ``model`` is loaded in this process too: its provenance keys the run, so a job on the cluster
    continues a single-process run of the same model and images, and the other way round.
    ``after_batch`` is called with the number of batches stored so far, after each one is stored.
    ``client``: a Dask client already connected (``options`` then only sets the torch threads per worker).
    A worker runs one batch at a time (one Dask thread), with ``options.torch_threads`` torch threads.
    """
    if spec.sha256 != model.sha256:
        raise AppError("the model spec does not match the loaded model (sha256 differs).")
    prep = prepare_run(factory, project_dir, model, params=params, model_files=model_files, images=images, name=name, source=source)
    batches = [prep.todo[start : start + batch_size] for start in range(0, len(prep.todo), batch_size)]
    total, done, stored = len(prep.todo), 0, 0
    classes = model.sidecar.classes
    if not batches:
        return prep.report
    with contextlib.nullcontext(client) if client is not None else connect(options) as client:
        from distributed import as_completed

        n_workers = max(1, len(client.scheduler_info().get("workers", {})) or (options.workers or 1))
        window = 2 * n_workers
        queue = iter(batches)

        def submit(batch: list[tuple[int, str]]) -> Any:
            return client.submit(worker_batch, spec, batch, params, options.torch_threads, pure=False)

        running = as_completed([submit(b) for b in itertools.islice(queue, window)])  # type: ignore[no-untyped-call]  # distributed: untyped
        for fut in running:
            try:
                result: BatchResult = fut.result()
            except (AppError, AnalysisError):
                raise
            except Exception as exc:  # noqa: BLE001 - a worker's failure, whatever it was, ends the job with its message
                raise AppError(f"a worker failed on a batch: {type(exc).__name__}: {exc}. Batches stored so far are kept; run the job again to continue.") from None
            store_batch(factory, prep.layout, prep.run_id, classes, result, prep.report)
            done += result.size
            stored += 1
            if progress:
                progress(done, total)
            if after_batch:
                after_batch(stored)
            nxt = next(queue, None)
            if nxt is not None:
                running.add(submit(nxt))  # type: ignore[no-untyped-call]  # distributed: untyped
    return prep.report
