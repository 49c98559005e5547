"""Run a twinring search on Dask workers started as batch jobs (SLURM or PBS) with dask-jobqueue.

A worked example, not run by the tests.  Run it on a login node of the
cluster (it must stay alive while the search runs: the Dask scheduler lives in
this process):

    python scripts/dask_jobqueue_example.py CONFIG --out RUNDIR --queue QUEUE \\
        --jobs 8 --cores 4 --memory-gb 16 --walltime 04:00:00 [--system pbs] [--account ACCT]

What it does:

1. starts a ``SLURMCluster`` (or ``PBSCluster``): every batch job runs
   ``--cores`` single-threaded Dask worker processes sharing ``--memory-gb``;
2. asks for ``--jobs`` jobs (``cluster.scale(jobs=...)``), or lets Dask add
   and remove jobs with the load (``--adapt``);
3. writes a copy of CONFIG with ``compute: {backend: dask, scheduler:
   <address>, workers: <jobs x cores>, memory_gb: <jobs x memory per job>}``
   beside RUNDIR,
   and runs ``twinring search`` on it in this process: the chunks go to the
   workers, results stream back and are kept in RUNDIR/chunks/ as they arrive.

Jobs that hit their wall time or are preempted lose only their running chunks
(Dask resubmits them to other workers).  If this script itself dies, run it
again with the same arguments: finished chunks are loaded from RUNDIR, not
recomputed.  ``--dry-run`` prints the batch script dask-jobqueue would submit
and the derived config, and stops (works without a batch system).

Workers must be able to import twinring (same Python environment on the
compute nodes, e.g. ``--python /path/to/env/bin/python``), and the compute
nodes must reach this node's scheduler port (``--interface ib0`` picks the
network interface).  The map is read here, on the login node: workers receive
the search plan from the scheduler, so they need no access to the files.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

import yaml


def make_cluster(args):
    """A dask-jobqueue cluster object (no jobs submitted yet)."""
    if args.system == "slurm":
        from dask_jobqueue import SLURMCluster as Cluster
    else:
        from dask_jobqueue import PBSCluster as Cluster
    kw = dict(
        cores=args.cores,                       # worker processes per job x threads per process
        processes=args.cores,                   # one thread per worker process (as compute.threads = 1)
        memory=f"{args.memory_gb}GB",
        walltime=args.walltime,
        queue=args.queue,
        job_name="twinring-worker",
        log_directory=str(Path(args.out).resolve().parent / "dask-logs"),
        job_script_prologue=list(args.prologue or []),
        worker_extra_args=["--lifetime", args.lifetime, "--lifetime-stagger", "5m"] if args.lifetime else [],
    )
    if args.account:
        kw["account"] = args.account
    if args.interface:
        kw["interface"] = args.interface
    if args.python:
        kw["python"] = args.python
    if args.system == "slurm":
        kw["job_extra_directives"] = ["--requeue"]
    return Cluster(**kw)


def derived_config(config_path, scheduler, workers, memory_gb):
    raw = yaml.safe_load(Path(config_path).read_text()) or {}
    if not isinstance(raw, dict):
        sys.exit(f"{config_path}: top level is not a mapping")
    base = Path(config_path).resolve().parent
    for sec, key in (("map", "path"), ("map", "mask"), ("search", "listed")):   # keep relative paths valid
        v = (raw.get(sec) or {}).get(key)
        if isinstance(v, str) and not Path(v).expanduser().is_absolute():
            raw[sec][key] = str(base / v)
    compute = dict(raw.get("compute") or {})
    compute.update(backend="dask", scheduler=scheduler, workers=int(workers), memory_gb=float(memory_gb))
    raw["compute"] = compute
    return raw


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("config")
    ap.add_argument("--out", required=True, help="run directory")
    ap.add_argument("--system", choices=("slurm", "pbs"), default="slurm")
    ap.add_argument("--queue", help="partition (SLURM) or queue (PBS)")
    ap.add_argument("--account", help="account / project to charge")
    ap.add_argument("--jobs", type=int, default=4, help="batch jobs to start")
    ap.add_argument("--adapt", action="store_true", help="let Dask scale between 1 and --jobs jobs")
    ap.add_argument("--cores", type=int, default=4, help="worker processes per job")
    ap.add_argument("--memory-gb", type=float, default=16.0, help="memory per job")
    ap.add_argument("--walltime", default="04:00:00")
    ap.add_argument("--lifetime", help="retire workers before the wall time, e.g. 3h50m (chunks move elsewhere)")
    ap.add_argument("--interface", help="network interface the workers use to reach the scheduler")
    ap.add_argument("--python", help="python executable on the compute nodes")
    ap.add_argument("--prologue", action="append", help="shell line run before the worker starts (repeatable)")
    ap.add_argument("--force", action="store_true", help="passed to twinring search")
    ap.add_argument("--dry-run", action="store_true", help="print the job script and the derived config, stop")
    args = ap.parse_args(argv)

    cluster = make_cluster(args)
    try:
        # compute.memory_gb is the budget of all units in flight: every job's memory
        raw = derived_config(args.config, cluster.scheduler_address, args.jobs * args.cores,
                             args.jobs * args.memory_gb)
        out = Path(args.out)
        cfg_path = out.resolve().parent / f"{out.name}.dask.yaml"
        text = yaml.safe_dump(raw, sort_keys=False)
        if args.dry_run:
            print(cluster.job_script())
            print(f"# config that would be written to {cfg_path}:")
            print(text)
            return 0
        cfg_path.parent.mkdir(parents=True, exist_ok=True)
        cfg_path.write_text(text)
        if args.adapt:
            cluster.adapt(minimum_jobs=1, maximum_jobs=args.jobs)
        else:
            cluster.scale(jobs=args.jobs)
        print(f"scheduler {cluster.scheduler_address}; {args.jobs} job(s) of {args.cores} worker(s) requested; "
              f"dashboard {cluster.dashboard_link}", flush=True)

        from twinring.cli import main as twinring

        argv2 = ["search", str(cfg_path), "--out", str(out)] + (["--force"] if args.force else [])
        return twinring(argv2)
    finally:
        cluster.close()


if __name__ == "__main__":
    sys.exit(main())
