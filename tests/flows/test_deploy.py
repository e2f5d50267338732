"""Deployment: prefect.yaml against the flows it names, the cluster profiles
and their dry-run builds, and (slow) one run submitted through a real Prefect
server, work pool and worker."""

from __future__ import annotations

import inspect
import json
import math
import os
import re
import shlex
import signal
import socket
import subprocess
import sys
import time
import tomllib
import urllib.request
from pathlib import Path

import pytest
import yaml

from descatter.flows.cluster import (
    DRY_RUN_SCHEDULER,
    build_cluster,
    dask_client,
    default_workers,
    local_cluster_kwargs,
    resolve_profile,
)
from descatter.storage.cluster_profiles import available_profiles, find_profile, load_profile, read_profile
from descatter.tasks.cluster_profile import byte_count, parse_profile
from descatter.tasks.errors import ClusterStartError
from descatter.tasks.errors import ConfigError, InputNotFoundError

REPO = Path(__file__).resolve().parents[2]
DEPLOY = REPO / "deploy"
PROFILES = sorted((DEPLOY / "clusters").glob("*.toml"))
FLOWS = {"descatter-run", "descatter-ingest", "descatter-estimate", "descatter-apply"}


def _prefect_yaml() -> dict:
    return yaml.safe_load((DEPLOY / "prefect.yaml").read_text())


def _flow(entrypoint: str):
    from prefect.flows import load_flow_from_entrypoint

    path, func = entrypoint.split(":")
    # the loader the flow-run process uses; the pull step makes REPO the cwd there
    return load_flow_from_entrypoint(f"{REPO / path}:{func}")


def _readme_runs() -> dict[str, dict]:
    """Parameters of each `prefect deployment run 'FLOW/NAME' --param k=v ...`
    command in deploy/README.md, values parsed as JSON where they parse (as
    the Prefect CLI does), keyed by 'FLOW/NAME'."""
    text = (DEPLOY / "README.md").read_text().replace("\\\n", " ")
    runs: dict[str, dict] = {}
    for line in text.splitlines():
        line = line.strip()
        if not line.startswith("prefect deployment run "):
            continue
        words = shlex.split(line)
        params = {}
        for flag, value in zip(words, words[1:]):
            if flag == "--param":
                key, raw = value.split("=", 1)
                try:
                    params[key] = json.loads(raw)
                except json.JSONDecodeError:
                    params[key] = raw
        runs[words[3]] = params
    return runs


# -- prefect.yaml --------------------------------------------------------------

def test_prefect_yaml_passes_prefects_own_schema_and_names_the_pool_and_environment():
    # the model `prefect deploy` validates the file with (Prefect 3.9, prefect.cli.deploy)
    from prefect.cli.deploy._models import PrefectYamlModel

    raw = _prefect_yaml()
    model = PrefectYamlModel.model_validate(raw)
    assert len(model.deployments) == 4
    (step,) = raw["pull"]
    assert step["prefect.deployments.steps.set_working_directory"]["directory"] == "{{ $DESCATTER_HOME }}"
    for d in raw["deployments"]:
        assert d["name"] == "cluster"
        assert d["work_pool"]["name"] == "descatter-pool"
        env = d["work_pool"]["job_variables"]["env"]
        assert env["DO_NOT_TRACK"] == "1" and env["PREFECT_SERVER_ANALYTICS_ENABLED"] == "false"
        # Prefect's process worker takes string values for the environment
        assert all(isinstance(v, str) for v in env.values())


def test_every_entrypoint_imports_and_its_parameters_fit_the_flow():
    runs = _readme_runs()
    seen = set()
    for d in _prefect_yaml()["deployments"]:
        flow = _flow(d["entrypoint"])
        seen.add(flow.name)
        sig = inspect.signature(flow.fn)
        assert set(d["parameters"]) <= set(sig.parameters), (d["entrypoint"], d["parameters"])
        # the deployment's values with the README's run command supply every
        # required parameter, and Prefect's own validation accepts their types
        run = runs[f"{flow.name}/{d['name']}"]
        merged = {**d["parameters"], **run}
        required = {n for n, p in sig.parameters.items() if p.default is inspect.Parameter.empty}
        assert required <= set(merged), (flow.name, required - set(merged))
        sig.bind(**merged)
        flow.validate_parameters(merged)
        # the deployment's cluster resolves to a profile
        resolve_profile(merged["cluster"])
    assert seen == FLOWS


def test_readme_submit_command_is_the_documented_one():
    runs = _readme_runs()
    assert runs["descatter-run/cluster"]["files"] == ["/data/line06.sgy"]
    text = (DEPLOY / "README.md").read_text()
    for command in ("prefect work-pool create descatter-pool --type process",
                    "prefect deploy --prefect-file deploy/prefect.yaml --all",
                    "prefect worker start --pool descatter-pool"):
        assert command in text


# -- profiles -----------------------------------------------------------------

def test_the_shipped_profiles_are_there_and_validate():
    names = {p.stem for p in PROFILES}
    assert {"local", "scheduler", "slurm", "pbs", "kubernetes"} <= names
    for path in PROFILES:
        profile = read_profile(path)
        assert profile.kind == path.stem, path


def test_local_profile_file_is_the_built_in_default():
    assert read_profile(DEPLOY / "clusters" / "local.toml") == resolve_profile("local")[0]
    # the keywords dask_client("local") / ("threads") passed to LocalCluster
    # before profiles existed
    kw = local_cluster_kwargs(resolve_profile("local")[0])
    assert {k: kw[k] for k in ("n_workers", "threads_per_worker", "processes", "dashboard_address")} == \
        {"n_workers": default_workers(), "threads_per_worker": 1, "processes": True, "dashboard_address": ":0"}
    kw = local_cluster_kwargs(resolve_profile("threads", workers=4, memory_limit="1GiB")[0])
    assert (kw["n_workers"], kw["processes"], kw["memory_limit"]) == (1, False, "1GiB")
    assert local_cluster_kwargs(resolve_profile("local", workers=3)[0])["n_workers"] == 3


def _write(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text)
    return path


SLURM_OK = """kind = "slurm"
[job]
cores = 6
memory = "20GiB"
processes = 3
walltime = "01:30:00"
queue = "short"
account = "geo"
extra_directives = ["--exclusive"]
[scale]
jobs = 2
"""


@pytest.mark.parametrize("replace, key", [
    (("cores = 6", "corez = 6"), "job.corez"),           # unknown key in a table
    (('kind = "slurm"', 'kind = "slurm"\nqueue = "x"'), "queue"),  # unknown at the top
    (("cores = 6", 'cores = "six"'), "job.cores"),        # wrong type
    (('memory = "20GiB"', 'memory = "20 gigs"'), "job.memory"),
    (('walltime = "01:30:00"', 'walltime = "90 minutes"'), "job.walltime"),
    (("processes = 3", "processes = 8"), "job"),          # more processes than cores
    (("jobs = 2", "jobs = 2\nmaximum_jobs = 4"), "scale"),
    (('kind = "slurm"', 'kind = "lsf"'), "kind"),
])
def test_a_bad_profile_names_the_file_and_the_key(tmp_path, replace, key):
    path = _write(tmp_path / "bad.toml", SLURM_OK.replace(*replace))
    with pytest.raises(ConfigError) as info:
        load_profile(path)
    message = str(info.value)
    assert str(path) in message
    assert re.search(rf"^  - {re.escape(key)}:", message, re.M), message


def test_unknown_key_message_lists_the_keys_of_its_table(tmp_path):
    path = _write(tmp_path / "bad.toml", SLURM_OK.replace("cores = 6", "corez = 6"))
    with pytest.raises(ConfigError, match=r"job\.corez: unknown key \(expected one of: cores, memory, processes"):
        read_profile(path)


def test_profile_search_order(tmp_path, monkeypatch):
    site = tmp_path / "site"
    _write(site / "slurm.toml", SLURM_OK)
    _write(tmp_path / "work" / "deploy" / "clusters" / "bigmem.toml", 'kind = "local"\nworkers = 2\n')
    monkeypatch.chdir(tmp_path / "work")
    monkeypatch.setenv("DESCATTER_CLUSTERS", str(site))
    assert find_profile("slurm") == site / "slurm.toml"                     # the site directory first
    assert find_profile("pbs") == DEPLOY / "clusters" / "pbs.toml"          # then the source tree's
    assert find_profile("bigmem").samefile(tmp_path / "work" / "deploy" / "clusters" / "bigmem.toml")  # ./deploy/clusters
    monkeypatch.setenv("DESCATTER_CLUSTERS", "")                             # empty: skipped
    assert find_profile("slurm") == DEPLOY / "clusters" / "slurm.toml"
    assert {"bigmem", "slurm", "pbs", "kubernetes", "scheduler", "local"} <= set(available_profiles())
    with pytest.raises(ConfigError, match=r"'nosuch'.*available: .*bigmem.*slurm"):
        find_profile("nosuch")
    with pytest.raises(InputNotFoundError, match="missing.toml"):
        find_profile(str(tmp_path / "missing.toml"))


def test_memory_limit_is_for_local_clusters_only():
    with pytest.raises(ConfigError, match=r"slurm\.toml: --memory-limit '4GiB' applies to local clusters only"):
        resolve_profile("slurm", memory_limit="4GiB")
    with pytest.raises(ConfigError, match="memory_limit"):
        resolve_profile("local", memory_limit="4 gigs")


@pytest.mark.parametrize("text", ["4GiB", "500MB", "1.5 GB", "64kB", "2TiB", "100B", "3gib", "250 MiB", "4G", "2Gi", "7k"])
def test_byte_count_agrees_with_dask(text):
    from dask.utils import parse_bytes  # reference: dask's own parser of these strings

    assert byte_count(text) == parse_bytes(text)


@pytest.mark.parametrize("text", ["4", "4 gigs", "GB", "-1GB", "4GBs"])
def test_byte_count_refuses_sizes_without_a_known_unit(text):
    with pytest.raises(ValueError, match="expected a size with a unit"):
        byte_count(text)


def test_local_memory_limit_takes_what_local_cluster_took():
    # LocalCluster's memory_limit also accepts "auto" and a plain byte count
    for value in ("auto", "4000000000", "4G"):
        assert local_cluster_kwargs(resolve_profile("local", memory_limit=value)[0])["memory_limit"] == value
    with pytest.raises(ConfigError, match=r"job\.memory: expected a size with a unit"):
        parse_profile(tomllib.loads(SLURM_OK.replace('"20GiB"', '"20000000000"')), source="s.toml")


def test_a_local_profile_file_runs(tmp_path):
    path = _write(tmp_path / "one.toml", 'kind = "local"\nworkers = 1\nprocesses = false\n')
    with dask_client(str(path)) as client:
        assert len(client.scheduler_info()["workers"]) == 1
        assert client.submit(sum, [1, 2, 3]).result() == 6


# -- dry-run builds -----------------------------------------------------------

def _jobqueue_cases(tmp_path) -> list[Path]:
    return [DEPLOY / "clusters" / "slurm.toml", DEPLOY / "clusters" / "pbs.toml",
            _write(tmp_path / "slurm-short.toml", SLURM_OK),
            _write(tmp_path / "pbs-short.toml", SLURM_OK.replace('kind = "slurm"', 'kind = "pbs"'))]


def test_batch_dry_run_job_script_books_the_configured_job(tmp_path):
    for path in _jobqueue_cases(tmp_path):
        profile, _ = load_profile(path)
        job = profile.job
        plan = build_cluster(profile, dry_run=True)
        script = plan.job_script
        n_bytes = byte_count(job.memory)
        if profile.kind == "slurm":
            # sbatch(1) options; SLURM takes memory in whole K/M/G (binary units), rounded up
            assert f"#SBATCH --cpus-per-task={job.cores}\n" in script
            assert f"#SBATCH --mem={math.ceil(n_bytes / 2**30)}G\n" in script
            assert f"#SBATCH -t {job.walltime}\n" in script
            if job.queue:
                assert f"#SBATCH -p {job.queue}\n" in script and f"#SBATCH -A {job.account}\n" in script
            for d in job.extra_directives:
                assert f"#SBATCH {d}\n" in script
        else:
            # qsub(1) resource request select=...:ncpus=...:mem=..., memory in GB (binary) rounded up
            assert f"#PBS -l select=1:ncpus={job.cores}:mem={math.ceil(n_bytes / 2**30)}GB\n" in script
            assert f"#PBS -l walltime={job.walltime}\n" in script
        # the worker line: processes per job, cores/processes threads each, memory shared
        assert DRY_RUN_SCHEDULER in script
        assert f"--nthreads {job.cores // job.processes} " in script
        if job.processes > 1:
            assert f"--nworkers {job.processes} " in script
        from dask.utils import format_bytes  # reference: how dask-worker is told its memory

        assert f"--memory-limit {format_bytes(n_bytes // job.processes).replace(' ', '')}" in script
        # each worker imports the stage modules as it starts (dask-worker's --preload)
        assert "--preload descatter.flows.worker_setup" in script


def test_batch_dry_run_is_dask_jobqueues_own_job_script(tmp_path):
    # reference: the script dask-jobqueue renders for a cluster built with the
    # same keywords (cluster.job_script(); constructing it submits nothing)
    for path in _jobqueue_cases(tmp_path)[2:]:
        plan = build_cluster(str(path), dry_run=True)
        cls = {"slurm": "SLURMCluster", "pbs": "PBSCluster"}[plan.kind]
        import dask_jobqueue

        kwargs = {**plan.kwargs, "scheduler_options": {"host": "127.0.0.1", "dashboard_address": ":0"}}
        with getattr(dask_jobqueue, cls)(**kwargs) as cluster:
            reference = cluster.job_script().replace(cluster.scheduler_address, DRY_RUN_SCHEDULER)
        assert plan.job_script == reference.replace("--name dummy-name", "--name dry-run")
        assert plan.scaling == {"scale": {"jobs": 2}}


def test_batch_scaling_modes(tmp_path):
    adaptive = _write(tmp_path / "a.toml", SLURM_OK.replace("jobs = 2", "minimum_jobs = 1\nmaximum_jobs = 5"))
    assert build_cluster(str(adaptive), dry_run=True).scaling == {"adapt": {"minimum_jobs": 1, "maximum_jobs": 5}}
    assert build_cluster(load_profile(adaptive)[0], dry_run=True, workers=7).scaling == {"scale": {"n": 7}}


FAKE_SBATCH = """#!/bin/sh
# a batch system of one: keep the script, run it in its own session, print a job id
cp "$1" "$JOBS/$$.sh"
setsid sh "$JOBS/$$.sh" > "$JOBS/$$.log" 2>&1 < /dev/null &
echo $! > "$JOBS/$$.pid"
echo "Submitted batch job $$"
"""
FAKE_SCANCEL = """#!/bin/sh
for id in "$@"; do kill -TERM -- "-$(cat "$JOBS/$id.pid")" 2>/dev/null; done
exit 0
"""


def _fake_slurm(tmp_path, monkeypatch) -> Path:
    jobs = tmp_path / "jobs"
    jobs.mkdir()
    bin_dir = tmp_path / "bin"
    for name, text in (("sbatch", FAKE_SBATCH), ("scancel", FAKE_SCANCEL)):
        _write(bin_dir / name, text).chmod(0o755)
    monkeypatch.setenv("PATH", f"{bin_dir}{os.pathsep}{os.environ['PATH']}")
    monkeypatch.setenv("JOBS", str(jobs))
    return jobs


def _kill_jobs(jobs: Path) -> None:
    for pid_file in jobs.glob("*.pid"):
        try:
            os.killpg(int(pid_file.read_text()), signal.SIGKILL)
        except (ProcessLookupError, ValueError):
            pass


SLURM_HERE = """kind = "slurm"
[job]
cores = 1
memory = "1GiB"
walltime = "00:10:00"
[scale]
jobs = 1
start_timeout_s = {timeout}
[scheduler]
host = "127.0.0.1"
dashboard_address = ":0"
"""


def test_slurm_profile_submits_its_job_script_and_the_worker_joins(tmp_path, monkeypatch):
    jobs = _fake_slurm(tmp_path, monkeypatch)
    path = _write(tmp_path / "here.toml", SLURM_HERE.format(timeout=120))
    try:
        with dask_client(str(path)) as client:
            assert client.submit(sum, [1, 2, 3]).result() == 6
            address = client.scheduler.address
        (submitted,) = jobs.glob("*.sh")
        dry = build_cluster(str(path), dry_run=True).job_script.replace(DRY_RUN_SCHEDULER, address)
        # the submitted script is the dry run's, but for the scheduler address and the worker name
        assert re.sub(r"--name \S+", "", submitted.read_text()) == re.sub(r"--name \S+", "", dry)
    finally:
        _kill_jobs(jobs)


def test_slurm_workers_that_never_join_stop_the_run(tmp_path, monkeypatch):
    jobs = _fake_slurm(tmp_path, monkeypatch)
    _write(jobs.parent / "bin" / "sbatch", "#!/bin/sh\necho 'Submitted batch job 7'\n")  # queued forever
    path = _write(tmp_path / "stuck.toml", SLURM_HERE.format(timeout=2))
    with pytest.raises(ClusterStartError, match=r"stuck\.toml: no Dask worker joined within 2 s"):
        with dask_client(str(path)):
            pass
    monkeypatch.setenv("PATH", "/nonexistent")
    with pytest.raises(ClusterStartError, match="'sbatch', which is not on PATH"):
        build_cluster(str(path))


def test_kubernetes_dry_run_spec_has_the_image_and_worker_count(tmp_path):
    profile, _ = load_profile("kubernetes")
    spec = build_cluster(profile, dry_run=True).spec
    # layout of the DaskCluster resource (kubernetes.dask.org/v1) of the Dask Kubernetes operator
    assert spec["kind"] == "DaskCluster" and spec["metadata"]["name"] == profile.name
    assert spec["spec"]["worker"]["replicas"] == profile.workers
    (worker,) = spec["spec"]["worker"]["spec"]["containers"]
    (scheduler,) = spec["spec"]["scheduler"]["spec"]["containers"]
    assert worker["image"] == scheduler["image"] == profile.image
    assert worker["resources"]["limits"] == {"cpu": profile.resources.cpu, "memory": profile.resources.memory}
    assert worker["args"][: len(profile.worker_command.split())] == profile.worker_command.split()
    custom = _write(tmp_path / "k.toml", 'kind = "kubernetes"\nname = "line-06"\nimage = "site/descatter:2"\nworkers = 3\n')
    spec = build_cluster(str(custom), dry_run=True).spec
    # the shipped profile and the default command both preload the stage modules
    for command in (profile.worker_command, spec["spec"]["worker"]["spec"]["containers"][0]["args"]):
        assert "--preload descatter.flows.worker_setup" in " ".join(command if isinstance(command, list) else [command])
    assert spec["spec"]["worker"]["replicas"] == 3
    assert spec["spec"]["worker"]["spec"]["containers"][0]["image"] == "site/descatter:2"
    assert build_cluster(str(custom), dry_run=True, workers=5).spec["spec"]["worker"]["replicas"] == 5
    bad = _write(tmp_path / "kb.toml", 'kind = "kubernetes"\nname = "Line_06"\nimage = "x"\nworkers = 3\n')
    with pytest.raises(ConfigError, match=r"kb\.toml.*\n  - name:"):
        load_profile(bad)


# -- end to end: a real server, work pool, deployment and worker --------------

def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _prefect(*args: str, env: dict, cwd: Path | None = None, timeout: float = 300) -> str:
    proc = subprocess.run([sys.executable, "-m", "prefect", *args], env=env, cwd=cwd, capture_output=True,
                          text=True, timeout=timeout, stdin=subprocess.DEVNULL, start_new_session=True)
    assert proc.returncode == 0, f"prefect {' '.join(args)}:\n{proc.stdout}\n{proc.stderr}"
    return proc.stdout + proc.stderr


def _get(url: str):
    with urllib.request.urlopen(url, timeout=10) as r:
        return json.loads(r.read())


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        os.killpg(proc.pid, signal.SIGTERM)
        try:
            proc.wait(20)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(10)


@pytest.mark.slow
def test_submit_through_a_prefect_server_and_worker(tmp_path):
    from descatter.flows.status import stage_status
    from descatter.flows.synth import write_synthetic_survey
    from descatter.storage.estimation import read_corrected_chunk
    from descatter.storage.store import SurveyStore

    t0 = time.monotonic()
    timings = {}
    survey = write_synthetic_survey(tmp_path / "survey", size="tiny", seed=0)
    port = _free_port()
    api = f"http://127.0.0.1:{port}/api"
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PREFECT_", "DESCATTER_"))}
    env |= {"PREFECT_HOME": str(tmp_path / "prefect-home"),
            "PREFECT_API_DATABASE_CONNECTION_URL": f"sqlite+aiosqlite:///{tmp_path / 'prefect.db'}",
            "DO_NOT_TRACK": "1", "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
            "PREFECT_API_URL": api, "DESCATTER_HOME": str(REPO)}
    started: list[subprocess.Popen] = []
    server_log = open(tmp_path / "server.log", "w")
    worker_log = open(tmp_path / "worker.log", "w")
    try:
        started.append(subprocess.Popen(
            [sys.executable, "-m", "prefect", "server", "start", "--host", "127.0.0.1", "--port", str(port)],
            env=env, stdout=server_log, stderr=subprocess.STDOUT, stdin=subprocess.DEVNULL, start_new_session=True))
        deadline = time.monotonic() + 180
        while True:
            try:
                if _get(f"{api}/health") is True:
                    break
            except OSError:
                pass
            assert started[0].poll() is None, (tmp_path / "server.log").read_text()
            assert time.monotonic() < deadline, "server not healthy in 180 s"
            time.sleep(1)
        timings["server start"] = time.monotonic() - t0

        t = time.monotonic()
        _prefect("work-pool", "create", "descatter-pool", "--type", "process", env=env)
        _prefect("--no-prompt", "deploy", "--prefect-file", "deploy/prefect.yaml", "--all", env=env, cwd=REPO)
        timings["work pool + deploy"] = time.monotonic() - t

        store = tmp_path / "s.zarr"
        t = time.monotonic()
        out = _prefect("deployment", "run", "descatter-run/cluster", "--param", f"store={store}",
                       "--param", "files=" + json.dumps([str(f) for f in survey.files]),
                       "--param", f"config={survey.config}", "--param", "workers=1", env=env)
        flow_run = re.search(r"UUID: ([0-9a-f-]{36})", out).group(1)

        worker = subprocess.Popen([sys.executable, "-m", "prefect", "worker", "start", "--pool", "descatter-pool",
                                   "--run-once"], env=env, stdout=worker_log, stderr=subprocess.STDOUT,
                                  stdin=subprocess.DEVNULL, start_new_session=True)
        started.append(worker)
        deadline = time.monotonic() + 600
        while True:
            state = _get(f"{api}/flow_runs/{flow_run}")["state_type"]
            if state in ("COMPLETED", "FAILED", "CRASHED", "CANCELLED"):
                break
            assert time.monotonic() < deadline, f"flow run still {state} after 600 s"
            time.sleep(2)
        timings["submit -> completed"] = time.monotonic() - t
        assert state == "COMPLETED", (tmp_path / "worker.log").read_text()[-6000:]
        worker.wait(120)  # --run-once: the worker exits once its run has ended

        s = SurveyStore.open(store)
        assert s.attrs["current_solution"]
        rows = {r["stage"]: r for r in stage_status(store)}
        assert rows["apply"]["state"] == "finished" and rows["apply"]["done"] == rows["apply"]["total"]
        for rec in s.manifest():
            corrected, applied = read_corrected_chunk(store, rec.name, 0, rec.n_traces)
            assert (applied >= 0).all() and corrected.any()
        timings["total"] = time.monotonic() - t0
        print("deployment end to end (s): " + ", ".join(f"{k} {v:.1f}" for k, v in timings.items()))
    finally:
        for proc in reversed(started):
            _stop(proc)
        server_log.close()
        worker_log.close()


def test_local_workers_start_with_the_allocator_settings_and_the_stage_modules():
    # the environment a local worker process starts with (flows/cluster.py WORKER_MALLOC_ENV)
    from descatter.flows.cluster import WORKER_MALLOC_ENV

    with dask_client("local", workers=1) as client:
        seen = client.run(lambda: {k: os.environ.get(k) for k in WORKER_MALLOC_ENV})
        # and, before any task, the stage modules (flows/worker_setup.py, Dask's worker preload)
        loaded = client.run(lambda: sorted(m for m in sys.modules if m.startswith("descatter.flows.")))
    assert list(seen.values()) == [{k: str(v) for k, v in WORKER_MALLOC_ENV.items()}]
    (modules,) = loaded.values()
    assert {"descatter.flows.ingest", "descatter.flows.estimate", "descatter.flows.solve",
            "descatter.flows.apply"} <= set(modules)
