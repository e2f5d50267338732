"""Cluster profiles: where the Dask workers of a run come from, as one typed
object per kind, validated when it is loaded.

The model is pure (pydantic only, no I/O): ``descatter.storage.cluster_profiles``
finds and reads the TOML files (``deploy/clusters/<name>.toml``) and
``descatter.flows.cluster`` turns a profile into a Dask cluster.

Kinds:

- ``local``: an embedded cluster of worker processes on this machine (the
  default when no profile is named);
- ``scheduler``: an existing Dask scheduler, by address;
- ``slurm`` / ``pbs``: worker processes started as batch jobs (dask-jobqueue);
- ``kubernetes``: worker pods created through the Dask Kubernetes operator.

Sizes follow two conventions because two systems read them: Dask byte
strings (``"4GiB"``, ``"500MB"``) for Dask and the batch systems, Kubernetes
resource quantities (``"4Gi"``, ``"500m"``) for pods.
"""

from __future__ import annotations

import re
from typing import Any, Literal, Union

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from descatter.tasks.errors import ConfigError

# -- size and time strings ---------------------------------------------------

# The form of a Dask byte string in a profile: a non-negative decimal number
# and a unit. The unit is required so that "4" is never read as four bytes by
# accident; dask.utils.parse_bytes reads the value (and refuses unknown units).
_BYTES_RE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*([A-Za-z]*)\s*$")

# Kubernetes resource quantities: a decimal number with an optional SI suffix
# (k M G T P E), binary suffix (Ki Mi Gi Ti Pi Ei) or milli (m, for CPU).
_QUANTITY_RE = re.compile(r"^\d+(?:\.\d+)?(?:m|k|M|G|T|P|E|Ki|Mi|Gi|Ti|Pi|Ei)?$")

# SLURM time limits: [D-]HH:MM:SS (sbatch also takes shorter forms; one form
# keeps profiles readable). PBS walltime: HH:MM:SS.
_SLURM_TIME_RE = re.compile(r"^(?:\d+-)?\d{1,3}:[0-5]\d:[0-5]\d$")
_PBS_TIME_RE = re.compile(r"^\d{1,4}:[0-5]\d:[0-5]\d$")

# RFC 1123 label, the form of a Kubernetes resource name (63 characters at most).
_K8S_NAME_RE = re.compile(r"^[a-z0-9]([-a-z0-9]{0,61}[a-z0-9])?$")


def byte_count(text: str, *, bare: bool = False) -> int:
    """Bytes in a Dask byte string, as Dask reads it (``dask.utils.parse_bytes``):
    ``"4GiB"`` -> 4 * 2**30, ``"500 MB"`` -> 5e8.

    ``bare=True`` also takes a plain number of bytes (``"4000000000"``).
    Raises ``ValueError`` naming the accepted units for anything else."""
    from dask.utils import parse_bytes  # here, not at the top: the model loads without Dask

    match = _BYTES_RE.match(text)
    if match and (match.group(2) or bare):
        try:
            return parse_bytes(text)
        except ValueError:
            pass  # an unknown unit
    raise ValueError(
        f"expected a size with a unit such as '4GiB' or '500MB' (units: B, kB, MB, GB, TB, PB, KiB, MiB, GiB, TiB, PiB; "
        f"the B may be left out), got {text!r}")


def _byte_string(value: str | None, *, local: bool = False) -> str | None:
    # a local cluster's limit also takes what LocalCluster always took: "auto", bytes
    if value is not None and not (local and value == "auto"):
        byte_count(value, bare=local)
    return value


# -- profile sections ----------------------------------------------------------

class _Part(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class LocalProfile(_Part):
    """An embedded cluster on this machine (``distributed.LocalCluster``)."""

    kind: Literal["local"] = "local"
    workers: int | None = Field(None, ge=1, description="worker count; leave out for one per core")
    threads_per_worker: int = Field(1, ge=1, description="threads in each worker")
    processes: bool = Field(True, description="workers as processes (true) or threads of this process (false)")
    memory_limit: str | None = Field(None, description="memory limit of each worker (Dask byte string, or 'auto'); "
                                                       "leave out for Dask's share of the machine")
    dashboard_address: str = Field(":0", description="where the dashboard listens; ':0' picks a free port")

    @field_validator("memory_limit")
    @classmethod
    def _size(cls, v: str | None) -> str | None:
        return _byte_string(v, local=True)


class SchedulerProfile(_Part):
    """An existing Dask scheduler that workers have already joined."""

    kind: Literal["scheduler"] = "scheduler"
    address: str = Field(description="scheduler address, tcp://HOST:PORT or tls://HOST:PORT")
    timeout_s: float = Field(30.0, gt=0, description="seconds to wait for the connection")

    @field_validator("address")
    @classmethod
    def _address(cls, v: str) -> str:
        if not re.match(r"^(tcp|tls)://[^\s:/]+:\d{1,5}$", v):
            raise ValueError(f"expected tcp://HOST:PORT or tls://HOST:PORT, got {v!r}")
        return v


class BatchJob(_Part):
    """One batch job: how many cores and how much memory it books, and the
    worker processes it starts."""

    cores: int = Field(ge=1, description="CPU cores booked per job")
    memory: str = Field(description="memory booked per job (Dask byte string), shared by its worker processes")
    processes: int = Field(1, ge=1, description="Dask worker processes per job; each gets cores/processes threads")
    walltime: str = Field(description="time limit per job, HH:MM:SS")
    queue: str | None = Field(None, description="queue (PBS) or partition (SLURM); leave out for the site default")
    account: str | None = Field(None, description="account charged for the jobs; leave out for the default")
    interface: str | None = Field(None, description="network interface of the workers, e.g. 'ib0'")
    local_directory: str | None = Field(None, description="node-local directory where workers spill memory to disk")
    log_directory: str | None = Field(None, description="directory of the batch system's job output files")
    python: str | None = Field(None, description="Python on the compute nodes; leave out for the one submitting")
    extra_directives: list[str] = Field(default_factory=list, description="more batch-system directives, one option each")
    prologue: list[str] = Field(default_factory=list, description="shell lines run before the worker starts")
    death_timeout_s: float | None = Field(None, gt=0, description="seconds a worker waits for a lost scheduler before it exits")

    @field_validator("memory")
    @classmethod
    def _size(cls, v: str) -> str:
        return _byte_string(v)

    @model_validator(mode="after")
    def _processes_fit(self) -> "BatchJob":
        if self.processes > self.cores:
            raise ValueError(f"processes ({self.processes}) exceeds cores ({self.cores}): each worker process needs at least one core")
        return self


class SlurmJob(BatchJob):
    @field_validator("walltime")
    @classmethod
    def _walltime(cls, v: str) -> str:
        if not _SLURM_TIME_RE.match(v):
            raise ValueError(f"expected HH:MM:SS or D-HH:MM:SS, got {v!r}")
        return v


class PbsJob(BatchJob):
    resource_spec: str | None = Field(None, description="the '-l' resource request; leave out to derive it from cores and memory")

    @field_validator("walltime")
    @classmethod
    def _walltime(cls, v: str) -> str:
        if not _PBS_TIME_RE.match(v):
            raise ValueError(f"expected HH:MM:SS, got {v!r}")
        return v


class JobScale(_Part):
    """A fixed number of jobs, or a range the cluster adapts within."""

    jobs: int | None = Field(None, ge=1, description="fixed number of batch jobs")
    minimum_jobs: int | None = Field(None, ge=0, description="adaptive: fewest jobs kept")
    maximum_jobs: int | None = Field(None, ge=1, description="adaptive: most jobs at once")
    start_timeout_s: float = Field(900.0, gt=0, description="seconds to wait for the first worker to join (queue wait included)")

    @model_validator(mode="after")
    def _one_mode(self) -> "JobScale":
        adaptive = self.minimum_jobs is not None or self.maximum_jobs is not None
        if self.jobs is not None and adaptive:
            raise ValueError("give either jobs (fixed) or minimum_jobs/maximum_jobs (adaptive), not both")
        if self.jobs is None and not adaptive:
            raise ValueError("give jobs (fixed) or maximum_jobs (adaptive)")
        if adaptive and self.maximum_jobs is None:
            raise ValueError("adaptive scaling needs maximum_jobs")
        if adaptive and (self.minimum_jobs or 0) > self.maximum_jobs:
            raise ValueError(f"minimum_jobs ({self.minimum_jobs}) exceeds maximum_jobs ({self.maximum_jobs})")
        return self


class JobScheduler(_Part):
    """The Dask scheduler that a jobqueue cluster starts in the flow process."""

    host: str | None = Field(None, description="address the scheduler binds, reachable from the compute nodes; "
                                               "leave out for the workers' interface")
    dashboard_address: str = Field(":8787", description="where the scheduler's dashboard listens")


class SlurmProfile(_Part):
    """Dask workers as SLURM batch jobs (``dask_jobqueue.SLURMCluster``)."""

    kind: Literal["slurm"] = "slurm"
    job: SlurmJob
    scale: JobScale
    scheduler: JobScheduler = Field(default_factory=JobScheduler)


class PbsProfile(_Part):
    """Dask workers as PBS batch jobs (``dask_jobqueue.PBSCluster``)."""

    kind: Literal["pbs"] = "pbs"
    job: PbsJob
    scale: JobScale
    scheduler: JobScheduler = Field(default_factory=JobScheduler)


class PodResources(_Part):
    """Requests (and equal limits) of each scheduler and worker pod."""

    cpu: str = Field("1", description="CPU per pod (Kubernetes quantity: '1', '500m')")
    memory: str = Field("4Gi", description="memory per pod (Kubernetes quantity: '4Gi', '512Mi')")

    @field_validator("cpu", "memory")
    @classmethod
    def _quantity(cls, v: str) -> str:
        if not _QUANTITY_RE.match(v):
            raise ValueError(f"expected a Kubernetes quantity such as '2', '500m', '4Gi', got {v!r}")
        return v


class KubernetesProfile(_Part):
    """Dask workers as pods of a ``DaskCluster`` resource (Dask Kubernetes operator)."""

    kind: Literal["kubernetes"] = "kubernetes"
    name: str = Field("descatter", description="name of the DaskCluster resource")
    namespace: str | None = Field(None, description="namespace; leave out for the current one")
    image: str = Field(description="container image with descatter installed, for scheduler and workers")
    workers: int = Field(ge=1, description="worker pods")
    worker_command: str = Field("dask-worker --nthreads 1 --preload descatter.flows.worker_setup",
                                description="command that starts a worker in its pod")
    idle_timeout_s: int = Field(0, ge=0, description="seconds idle before Kubernetes deletes the cluster; 0 never")
    resource_timeout_s: int = Field(300, gt=0, description="seconds to wait for the cluster's resources to come up")
    resources: PodResources = Field(default_factory=PodResources)
    env: dict[str, str] = Field(default_factory=dict, description="environment variables of scheduler and workers")

    @field_validator("name")
    @classmethod
    def _name(cls, v: str) -> str:
        if not _K8S_NAME_RE.match(v):
            raise ValueError(f"expected lowercase letters, digits and '-' (a Kubernetes resource name), got {v!r}")
        return v


ClusterProfile = Union[LocalProfile, SchedulerProfile, SlurmProfile, PbsProfile, KubernetesProfile]

PROFILE_KINDS: dict[str, type[BaseModel]] = {
    "local": LocalProfile,
    "scheduler": SchedulerProfile,
    "slurm": SlurmProfile,
    "pbs": PbsProfile,
    "kubernetes": KubernetesProfile,
}


def _fields_at(model: type[BaseModel], loc: tuple) -> list[str]:
    """The keys allowed in the table that holds ``loc`` (for unknown-key messages)."""
    for part in loc[:-1]:
        field = model.model_fields.get(str(part))
        sub = getattr(field, "annotation", None) if field else None
        if not (isinstance(sub, type) and issubclass(sub, BaseModel)):
            return []
        model = sub
    return list(model.model_fields)


def explain_validation_error(exc: ValidationError, model: type[BaseModel], *, source: str, what: str,
                             unknown_key_hint: str | None = None) -> str:
    """A pydantic ``ValidationError`` as text for a person: a heading naming
    ``source`` (the file) and ``what`` it should be, then one line per bad key
    (dotted, e.g. ``job.memory``) with what was expected and the value got.

    An unknown key is answered with ``unknown_key_hint``, or else with the keys
    its table allows. Pure, like the models, so that both the cluster profiles
    here and the survey config (``descatter.storage.config_file``) use it."""
    lines = [f"{source}: invalid {what}"]
    for err in exc.errors():
        key = ".".join(str(p) for p in err["loc"]) or "(top level)"
        if err["type"] == "extra_forbidden":
            hint = unknown_key_hint or f"expected one of: {', '.join(_fields_at(model, err['loc']))}"
            lines.append(f"  - {key}: unknown key ({hint})")
            continue
        got = err.get("input")
        msg = err["msg"].removeprefix("Value error, ")
        got_txt = "" if isinstance(got, dict) or f"got {got!r}" in msg else f" (got {got!r})"
        lines.append(f"  - {key}: {msg}{got_txt}")
    return "\n".join(lines)


def parse_profile(document: dict[str, Any], *, source: str = "cluster profile") -> ClusterProfile:
    """Validate a profile mapping (a parsed TOML document).

    The ``kind`` key picks the model; every bad key is listed in one
    :class:`ConfigError` that names ``source`` and the key."""
    kind = document.get("kind")
    if kind not in PROFILE_KINDS:
        got = "missing" if kind is None else f"got {kind!r}"
        raise ConfigError(f"{source}: invalid cluster profile\n  - kind: expected one of {', '.join(PROFILE_KINDS)} ({got})")
    model = PROFILE_KINDS[kind]
    try:
        return model.model_validate(document)
    except ValidationError as exc:
        raise ConfigError(explain_validation_error(exc, model, source=source, what="cluster profile")) from None
