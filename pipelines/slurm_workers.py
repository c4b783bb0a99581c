"""Start Dask workers on a Slurm cluster and write a scheduler file for ``stackbuild --scheduler``.

Usage (on a login node, inside the environment where stackbuild is installed)::

    pip install '.[cluster]'
    python pipelines/slurm_workers.py --jobs 20 --cores 8 --memory 64GiB --walltime 12:00:00 \\
        --scheduler-file ~/stackbuild-scheduler.json &
    stackbuild build tiles.csv --out /scratch/volume1 --scheduler ~/stackbuild-scheduler.json \\
        --config pipelines/cluster_large.toml

Each Slurm job runs one Dask worker process per core with one thread each
(stackbuild's tasks are CPU-bound NumPy/OpenCV work). The scheduler lives in
this script's process: keep it running until the build ends; stop it with
Ctrl-C, which also cancels the Slurm jobs. If the build is killed, start it
again with ``--resume``; finished sections and planes are kept.
"""
from __future__ import annotations

import argparse
import json
import os
import time
from pathlib import Path


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--jobs", type=int, default=4, help="number of Slurm jobs to submit")
    ap.add_argument("--cores", type=int, default=8, help="cores per job (one worker process each)")
    ap.add_argument("--memory", default="32GiB", help="memory per job")
    ap.add_argument("--walltime", default="04:00:00", help="Slurm walltime per job")
    ap.add_argument("--queue", default=None, help="Slurm partition")
    ap.add_argument("--account", default=None, help="Slurm account")
    ap.add_argument("--scheduler-file", type=Path, required=True,
                    help="where to write the scheduler address for 'stackbuild --scheduler'")
    ap.add_argument("--log-dir", type=Path, default=None,
                    help="folder for the Slurm jobs' output files (default: Slurm's, the current folder)")
    ap.add_argument("--no-keep-jobs", dest="keep_jobs", action="store_false",
                    help="do not replace Slurm jobs that end (by default a job that is killed or "
                         "reaches its walltime is resubmitted, so a long build survives it)")
    args = ap.parse_args()

    from dask_jobqueue import SLURMCluster

    cluster = SLURMCluster(cores=args.cores, processes=args.cores, memory=args.memory,
                           walltime=args.walltime, queue=args.queue, account=args.account,
                           job_script_prologue=["export OMP_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1"],
                           log_directory=str(args.log_dir) if args.log_dir else None)
    cluster.scale(jobs=args.jobs)
    tmp = args.scheduler_file.with_suffix(".tmp")
    tmp.write_text(json.dumps({"address": cluster.scheduler_address}))
    os.replace(tmp, args.scheduler_file)
    print(f"scheduler at {cluster.scheduler_address}; written to {args.scheduler_file}", flush=True)
    seen: set[str] = set()
    try:
        while True:
            time.sleep(20)
            if args.keep_jobs:
                _replace_lost_jobs(cluster, args.jobs, seen)
    except KeyboardInterrupt:
        cluster.close()


def _replace_lost_jobs(cluster, jobs: int, seen: set[str]) -> None:
    """Resubmit Slurm jobs whose workers were up and are gone (walltime, preemption, a lost node).

    A job counts as lost only after its workers have been seen once, so jobs still waiting
    in the queue are left alone. Meanwhile the build's tasks wait on the scheduler for the
    new workers; nothing is lost, since every stage writes its results as it goes.
    """
    names = {str(w.get("name", "")) for w in cluster.scheduler_info.get("workers", {}).values()}
    for job in list(cluster.worker_spec):
        up = any(n == str(job) or n.startswith(f"{job}-") for n in names)
        if up:
            seen.add(job)
        elif job in seen:
            print(f"Slurm job of {job} ended; submitting a replacement", flush=True)
            seen.discard(job)
            cluster.worker_spec.pop(job, None)
            cluster.workers.pop(job, None)
    if len(cluster.worker_spec) < jobs:
        cluster.scale(jobs=jobs)


if __name__ == "__main__":
    main()
