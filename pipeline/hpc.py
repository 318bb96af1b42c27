"""Workers on an HPC batch system (SLURM, PBS, SGE) through dask-jobqueue.

A workflow with ``execution.scheduler: slurm`` (or ``pbs``, ``sge``) starts a
dask scheduler in the ``grainhabit run`` process and submits batch jobs that
each start ``processes`` dask workers on one node; the frames run on them as
on any dask cluster, and the jobs end when the run closes the cluster.
``execution.jobqueue`` describes one job:

.. code-block:: yaml

    execution:
      scheduler: slurm
      jobqueue:
        cores: 8            # cores per job (required)
        memory: 16GB        # memory per job (required)
        processes: 8        # dask workers per job (default: one per core, one thread each)
        jobs: 4             # jobs submitted (default 1)
        walltime: "02:00:00"
        queue: batch
        account: lab-123    # SLURM/PBS account (SGE: project)
        job_extra_directives: ["--constraint=avx2"]
        job_script_prologue: ["module load python/3.11", "source /srv/grainhabit/.venv/bin/activate"]

The keys are those of dask-jobqueue's cluster classes (``SLURMCluster``,
``PBSCluster``, ``SGECluster``); ``jobs`` is how many jobs to submit. The
job script exports the worker settings that keep the kernels as fast as in a
plain loop (see DEVELOPERS.md, "Keeping workers fast"), so no dask
configuration file is needed on the nodes. dask-jobqueue is an optional
dependency: ``pip install "grainhabit[hpc]"``.
"""

from __future__ import annotations

#: Batch systems and their dask-jobqueue cluster classes.
BATCH_SYSTEMS = {"slurm": "SLURMCluster", "pbs": "PBSCluster", "sge": "SGECluster"}

#: ``execution.jobqueue`` keys: type, required.
JOBQUEUE_KEYS = {
    "cores": (int, True), "memory": (str, True), "processes": (int, False), "jobs": (int, False),
    "walltime": (str, False), "queue": (str, False), "account": (str, False), "project": (str, False),
    "interface": (str, False), "local_directory": (str, False), "log_directory": (str, False),
    "python": (str, False), "resource_spec": (str, False), "job_extra_directives": (list, False),
    "job_script_prologue": (list, False), "worker_extra_args": (list, False), "death_timeout": (int, False),
}

#: dask settings of every worker (the same the local cluster uses; DEVELOPERS.md, "Keeping workers fast").
WORKER_CONFIG = {
    "distributed": {
        "nanny": {"pre-spawn-environ": {"MALLOC_TRIM_THRESHOLD_": None}},
        "worker": {"profile": {"enabled": False}, "memory": {"monitor-interval": "500ms"}},
        "admin": {"tick": {"interval": "500ms"}},
    }
}


class MissingExtra(RuntimeError):
    """dask-jobqueue is not installed."""


def check_jobqueue(system: str, options) -> list[tuple[str, str]]:
    """Problems of an ``execution.jobqueue`` section, as (key, reason) pairs (empty if fine).

    Parameters
    ----------
    system : str
        ``slurm``, ``pbs`` or ``sge``.
    options : dict or None
        The section as written in the workflow.
    """
    if not isinstance(options, dict):
        return [("execution.jobqueue", f"expected a mapping with cores and memory for scheduler {system!r}, "
                                       f"got {options!r}")]
    out = []
    for key in options:
        if key not in JOBQUEUE_KEYS:
            out.append((f"execution.jobqueue.{key}", f"unknown key (expected one of: {', '.join(JOBQUEUE_KEYS)})"))
    for key, (typ, required) in JOBQUEUE_KEYS.items():
        value = options.get(key)
        if value is None:
            if required:
                out.append((f"execution.jobqueue.{key}", "required key is missing"))
            continue
        if typ is int and (isinstance(value, bool) or not isinstance(value, int) or value < 1):
            out.append((f"execution.jobqueue.{key}", f"expected an integer >= 1, got {value!r}"))
        elif typ is str and not isinstance(value, str):
            out.append((f"execution.jobqueue.{key}", f"expected a string, got {value!r}"))
        elif typ is list and not (isinstance(value, list) and all(isinstance(v, str) for v in value)):
            out.append((f"execution.jobqueue.{key}", f"expected a list of strings, got {value!r}"))
    if system == "sge" and "account" in options:
        out.append(("execution.jobqueue.account", "SGE has no account; use project"))
    return out


def _cluster_class(system: str):
    try:
        import dask_jobqueue
    except ImportError:
        raise MissingExtra(f"execution.scheduler {system!r} needs dask-jobqueue: pip install \"grainhabit[hpc]\"") \
            from None
    return getattr(dask_jobqueue, BATCH_SYSTEMS[system])


def cluster_kwargs(options: dict, dashboard: bool = False) -> dict:
    """Keyword arguments of the dask-jobqueue cluster class for an ``execution.jobqueue`` section.

    Workers get one thread each (``processes`` defaults to ``cores``), and
    the job script's prologue exports :data:`WORKER_CONFIG` (serialised with
    ``dask.config.serialize``, which every dask process reads at start).
    """
    import dask.config

    kw = {k: v for k, v in options.items() if k != "jobs"}
    kw.setdefault("processes", kw["cores"])
    prologue = list(kw.pop("job_script_prologue", []))
    prologue.append(f"export DASK_INTERNAL_INHERIT_CONFIG={dask.config.serialize(WORKER_CONFIG)}")
    kw["job_script_prologue"] = prologue
    kw["scheduler_options"] = {"dashboard_address": ":8787" if dashboard else ":0"}
    return kw


def make_cluster(system: str, options: dict, dashboard: bool = False):
    """Start the scheduler of a batch-system cluster (no job submitted yet)."""
    return _cluster_class(system)(**cluster_kwargs(options, dashboard))


def job_script(system: str, options: dict) -> str:
    """The batch script one job would be submitted with (starts a scheduler for its address, submits nothing)."""
    cluster = make_cluster(system, options)
    try:
        return cluster.job_script()
    finally:
        cluster.close()
