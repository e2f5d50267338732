"""The Dask cluster a flow runs on.

By default an embedded local cluster of worker processes with one thread
each (segyio and much of numpy's I/O path hold the GIL, so parallelism comes
from processes), sized to the machine; or an existing scheduler given as
``tcp://HOST:PORT``; or a cluster profile (``deploy/clusters/<name>.toml``,
by name or path): batch jobs on SLURM or PBS (dask-jobqueue), pods on
Kubernetes (the Dask operator), a scheduler address, or a local cluster of
other settings.

``build_cluster(profile, dry_run=True)`` shows what a profile would start
(the batch job script, the Kubernetes resource) without a batch system.
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import os
import shutil
from pathlib import Path
from typing import Any, Iterator

from descatter.tasks.cluster_profile import (
    ClusterProfile,
    KubernetesProfile,
    LocalProfile,
    PbsProfile,
    SchedulerProfile,
    SlurmProfile,
    parse_profile,
)
from descatter.tasks.errors import ClusterStartError, ConfigError

log = logging.getLogger(__name__)

# Shown in a dry-run job script where the real scheduler address will go.
DRY_RUN_SCHEDULER = "tcp://<scheduler-address>:8786"


def default_workers() -> int:
    return max(1, os.cpu_count() or 1)


@dataclasses.dataclass(frozen=True)
class ClusterPlan:
    """What a profile would start: the cluster class, its keywords, how it
    scales, and the batch job script or Kubernetes resource it would submit."""

    kind: str
    cluster_class: str
    kwargs: dict[str, Any]
    scaling: dict[str, Any]
    job_script: str | None = None
    spec: dict[str, Any] | None = None


def resolve_profile(cluster: str | Path, *, workers: int | None = None,
                    memory_limit: str | None = None) -> tuple[ClusterProfile, str]:
    """The profile for a ``--cluster`` value and where it came from.

    ``local`` and ``threads`` are built in; ``tcp://``/``tls://`` addresses
    are schedulers; anything else is a profile name or a path to one.
    ``workers`` and ``memory_limit`` (the command-line options) override a
    local profile's values; ``workers`` also sets the worker count of a batch
    or Kubernetes profile (see :func:`build_cluster`)."""
    from descatter.storage.cluster_profiles import load_profile

    text = str(cluster)
    overrides = {k: v for k, v in (("workers", workers), ("memory_limit", memory_limit)) if v is not None}
    if text == "local":
        return parse_profile({"kind": "local", **overrides}, source="--workers/--memory-limit"), "built-in 'local'"
    if text == "threads":
        # one in-process worker whatever --workers says, as it always was
        doc = {"kind": "local", "workers": 1, "processes": False}
        if memory_limit is not None:
            doc["memory_limit"] = memory_limit
        return parse_profile(doc, source="--memory-limit"), "built-in 'threads'"
    if text.startswith(("tcp://", "tls://")):
        # an address is used as given (it always was): the scheduler checks it
        return SchedulerProfile.model_construct(address=text, timeout_s=30.0), "scheduler address"
    profile, path = load_profile(cluster)
    source = str(path)
    if isinstance(profile, LocalProfile) and overrides:
        profile = parse_profile({**profile.model_dump(exclude_none=True), **overrides},
                                source=f"{source} with --workers/--memory-limit")
    elif memory_limit is not None and not isinstance(profile, (LocalProfile, SchedulerProfile)):
        raise ConfigError(
            f"{source}: --memory-limit {memory_limit!r} applies to local clusters only; "
            f"set the memory of a {profile.kind} worker in the profile instead")
    return profile, source


# -- keywords of each cluster class ------------------------------------------

# glibc allocator settings for local worker processes (glibc manual, "Malloc Tunable Parameters";
# Dask passes them through distributed.nanny.pre-spawn-environ). Dask's own
# MALLOC_TRIM_THRESHOLD_=65536 fixes glibc's mmap threshold at 128 KiB, so every chunk-sized
# temporary is a fresh mmap that page-faults in. Measured on 1e5 traces, alternating runs: worker
# page faults 1.9 M -> 0.14 M, spectra 5.3 -> 3.0 CPU-s, statistics 9.6 -> 6.5 CPU-s; worker peak
# RSS 211 -> 252-288 MB.
WORKER_MALLOC_ENV = {"MALLOC_MMAP_THRESHOLD_": 64 * 2**20, "MALLOC_TRIM_THRESHOLD_": 256 * 2**20}


def _worker_environ() -> None:
    import dask

    dask.config.set({f"distributed.nanny.pre-spawn-environ.{k}": v for k, v in WORKER_MALLOC_ENV.items()})


# Imported by every worker as it starts (flows/worker_setup.py): the stage modules. Measured on
# 502,400 traces, 3 alternating runs of the three stages on a fresh local cluster: median
# 28.75 -> 27.68 s in all, ingest 3.76 -> 3.22 s, for 0.35 -> 0.75 s of cluster start.
WORKER_PRELOAD = "descatter.flows.worker_setup"


def local_cluster_kwargs(profile: LocalProfile) -> dict[str, Any]:
    """``distributed.LocalCluster`` keywords of a local profile."""
    kwargs: dict[str, Any] = dict(
        n_workers=profile.workers or default_workers(),
        threads_per_worker=profile.threads_per_worker,
        processes=profile.processes,
        dashboard_address=profile.dashboard_address,
        silence_logs=logging.WARNING,
        preload=[WORKER_PRELOAD],
    )
    if profile.memory_limit:
        kwargs["memory_limit"] = profile.memory_limit
    return kwargs


def jobqueue_job_kwargs(profile: SlurmProfile | PbsProfile) -> dict[str, Any]:
    """The per-job keywords of ``SLURMCluster``/``PBSCluster`` (dask-jobqueue
    names); keys left out of the profile are left to dask-jobqueue's config."""
    job = profile.job
    kwargs: dict[str, Any] = dict(
        cores=job.cores,
        memory=job.memory,
        processes=job.processes,
        walltime=job.walltime,
        job_name="descatter-worker",
        worker_extra_args=["--preload", WORKER_PRELOAD],
        job_extra_directives=list(job.extra_directives),
        job_script_prologue=list(job.prologue),
    )
    optional = dict(queue=job.queue, account=job.account, interface=job.interface,
                    local_directory=job.local_directory, log_directory=job.log_directory,
                    python=job.python, death_timeout=job.death_timeout_s,
                    resource_spec=getattr(job, "resource_spec", None))
    kwargs.update({k: v for k, v in optional.items() if v is not None})
    return kwargs


def jobqueue_scheduler_options(profile: SlurmProfile | PbsProfile) -> dict[str, Any]:
    options: dict[str, Any] = {"dashboard_address": profile.scheduler.dashboard_address}
    if profile.scheduler.host:
        options["host"] = profile.scheduler.host
    return options


def jobqueue_scaling(profile: SlurmProfile | PbsProfile, workers: int | None = None) -> dict[str, Any]:
    """Keywords of ``cluster.scale`` (``jobs`` or ``n`` workers) or
    ``cluster.adapt`` (``minimum_jobs``/``maximum_jobs``)."""
    if workers is not None:
        return {"scale": {"n": workers}}
    s = profile.scale
    if s.jobs is not None:
        return {"scale": {"jobs": s.jobs}}
    return {"adapt": {"minimum_jobs": s.minimum_jobs or 0, "maximum_jobs": s.maximum_jobs}}


def kubernetes_cluster_spec(profile: KubernetesProfile, workers: int | None = None) -> dict[str, Any]:
    """The ``DaskCluster`` resource of a Kubernetes profile, as the operator's
    ``make_cluster_spec`` writes it (scheduler and workers get equal requests
    and limits)."""
    from dask_kubernetes.operator import make_cluster_spec
    from dask_kubernetes.operator.validation import validate_cluster_name

    validate_cluster_name(profile.name)
    amounts = {"cpu": profile.resources.cpu, "memory": profile.resources.memory}
    return make_cluster_spec(
        name=profile.name,
        image=profile.image,
        n_workers=workers or profile.workers,
        resources={"requests": dict(amounts), "limits": dict(amounts)},
        env=dict(profile.env) or None,
        worker_command=profile.worker_command,
        idle_timeout=profile.idle_timeout_s,
    )


def _jobqueue_class(profile: SlurmProfile | PbsProfile):
    try:
        from dask_jobqueue import PBSCluster, SLURMCluster
    except ImportError:
        raise ConfigError(f"cluster profile kind {profile.kind!r} needs dask-jobqueue: "
                          "pip install 'descatter[cluster]'") from None
    return SLURMCluster if isinstance(profile, SlurmProfile) else PBSCluster


def _need_kubernetes() -> None:
    try:
        import dask_kubernetes.operator  # noqa: F401
    except ImportError:
        raise ConfigError("cluster profile kind 'kubernetes' needs dask-kubernetes: "
                          "pip install 'descatter[cluster]'") from None


def build_cluster(profile: ClusterProfile | str | Path, *, dry_run: bool = False,
                  workers: int | None = None):
    """The cluster a profile describes.

    ``dry_run=True`` starts nothing and returns a :class:`ClusterPlan`: for
    SLURM and PBS the job script dask-jobqueue would submit (with a
    placeholder scheduler address), for Kubernetes the ``DaskCluster``
    resource, for local clusters the keywords. Otherwise it returns the
    started cluster object, already scaled (``workers`` overrides the
    profile's job or pod count); the caller closes it. A scheduler profile has
    no cluster object: connect with ``distributed.Client(address)``.
    """
    if isinstance(profile, (str, Path)):
        profile, _ = resolve_profile(profile)
    if isinstance(profile, SchedulerProfile):
        if dry_run:
            return ClusterPlan("scheduler", "distributed.Client", {"address": profile.address,
                                                                   "timeout": profile.timeout_s}, {})
        raise ConfigError(f"scheduler profile {profile.address}: nothing to start; connect a Client to it")
    if isinstance(profile, LocalProfile):
        kwargs = local_cluster_kwargs(profile)
        if dry_run:
            return ClusterPlan("local", "distributed.LocalCluster", kwargs, {"n_workers": kwargs["n_workers"]})
        from distributed import LocalCluster

        _worker_environ()
        return LocalCluster(**kwargs)
    if isinstance(profile, (SlurmProfile, PbsProfile)):
        cls = _jobqueue_class(profile)
        job_kwargs = jobqueue_job_kwargs(profile)
        scaling = jobqueue_scaling(profile, workers)
        if dry_run:
            # The job object alone renders the script; no scheduler is started
            # and nothing is submitted (dask-jobqueue does the same for
            # cluster.job_script() before its scheduler is up).
            job = cls.job_cls(scheduler=DRY_RUN_SCHEDULER, name="dry-run", **job_kwargs)
            kwargs = {**job_kwargs, "scheduler_options": jobqueue_scheduler_options(profile)}
            return ClusterPlan(profile.kind, f"dask_jobqueue.{cls.__name__}", kwargs, scaling,
                               job_script=job.job_script())
        submit = cls.job_cls.submit_command
        if shutil.which(submit) is None:
            raise ClusterStartError(f"a {profile.kind} profile submits worker jobs with {submit!r}, which is not on "
                                    "PATH here: run the flow on a host that can submit jobs")
        cluster = cls(scheduler_options=jobqueue_scheduler_options(profile), **job_kwargs)
        try:
            if "scale" in scaling:
                cluster.scale(**scaling["scale"])
            else:
                cluster.adapt(**scaling["adapt"])
        except BaseException:
            cluster.close()
            raise
        return cluster
    if isinstance(profile, KubernetesProfile):
        _need_kubernetes()
        spec = kubernetes_cluster_spec(profile, workers)
        kwargs = {"namespace": profile.namespace, "resource_timeout": profile.resource_timeout_s,
                  "shutdown_on_close": True}
        if dry_run:
            return ClusterPlan("kubernetes", "dask_kubernetes.operator.KubeCluster",
                               {**kwargs, "custom_cluster_spec": spec},
                               {"n_workers": spec["spec"]["worker"]["replicas"]}, spec=spec)
        from dask_kubernetes.operator import KubeCluster

        return KubeCluster(custom_cluster_spec=spec, quiet=True, **kwargs)
    raise ConfigError(f"unknown cluster profile type {type(profile).__name__}")


def _start_timeout(profile: SlurmProfile | PbsProfile | KubernetesProfile) -> float:
    """Seconds to wait for the first worker of a batch or Kubernetes cluster
    (local and scheduler clusters have their workers before they are used)."""
    if isinstance(profile, KubernetesProfile):
        return float(profile.resource_timeout_s)
    return profile.scale.start_timeout_s


@contextlib.contextmanager
def dask_client(
    cluster: str = "local", *, workers: int | None = None, memory_limit: str | None = None
) -> Iterator["distributed.Client"]:  # noqa: F821
    """Yield a ``distributed.Client`` for ``cluster`` and close what we opened.

    ``cluster`` is ``"local"`` (an embedded cluster of ``workers`` processes,
    default: one per core), ``"threads"`` (one in-process worker, for tests
    and debugging), a scheduler address ``tcp://HOST:PORT``, or a cluster
    profile: a name in ``deploy/clusters`` (``slurm``, ``pbs``,
    ``kubernetes``, ``scheduler``...) or a path to a ``.toml`` profile.
    """
    from distributed import Client

    profile, source = resolve_profile(cluster, workers=workers, memory_limit=memory_limit)
    if isinstance(profile, SchedulerProfile):
        client = Client(profile.address, timeout=f"{profile.timeout_s:g}s")
        log.info("connected to Dask scheduler %s", profile.address)
        try:
            yield client
        finally:
            client.close()
        return
    if isinstance(profile, LocalProfile):
        with build_cluster(profile) as lc, Client(lc) as client:
            log.info("local Dask cluster: %d worker(s), %s; %s", len(lc.workers),
                     "processes" if profile.processes else "threads", dashboard_text(client))
            yield client
        return
    with build_cluster(profile, workers=workers) as remote, Client(remote) as client:
        timeout = _start_timeout(profile)
        log.info("%s cluster from %s: waiting up to %g s for the first worker", profile.kind, source, timeout)
        try:
            client.wait_for_workers(1, timeout=timeout)
        except TimeoutError:
            raise ClusterStartError(
                f"{source}: no Dask worker joined within {timeout:g} s (a {profile.kind} cluster); "
                "check the queue or pods, or raise the profile's start timeout") from None
        log.info("%s cluster from %s: %d worker(s) so far; %s", profile.kind, source,
                 len(client.scheduler_info(n_workers=-1)["workers"]), dashboard_text(client))
        yield client


def map_chunks(client, fn, store_path: str, swath: str, bounds: list[tuple[int, int]], *, key: str,
               **constants) -> list:
    """``fn(store_path, swath, chunk, start, stop, **constants)`` for every chunk
    of a swath (``bounds``: the chunks' (start, stop) rows), sent to the
    scheduler as one graph update; a submit per chunk cost the flow process
    1-8 ms each (measured: 1.2-2.2 ms quiet, 8 ms busy). Task keys are
    ``f"{key}-{chunk}"``: give a prefix unique to the call, since the
    scheduler answers a key it still holds with the held result instead of
    running the task again. Returns the futures in chunk order.
    """
    n = len(bounds)
    return client.map(fn, [store_path] * n, [swath] * n, range(n), [a for a, _ in bounds], [b for _, b in bounds],
                      key=[f"{key}-{chunk}" for chunk in range(n)], pure=False, **constants)


def dashboard_text(client) -> str:
    """Where to watch the cluster: the scheduler and its dashboard (the
    dashboard needs the optional bokeh package)."""
    try:
        import bokeh  # noqa: F401

        link = client.dashboard_link
    except ImportError:
        link = "not available (pip install bokeh)"
    return f"Dask scheduler {client.scheduler.address}, dashboard {link}"
