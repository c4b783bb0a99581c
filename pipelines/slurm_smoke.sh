#!/usr/bin/env bash
# Smoke test of stackbuild on a real Slurm scheduler: a one-node Slurm cluster on this machine.
#
# FOR A THROWAWAY MACHINE OR CONTAINER ONLY: it needs root, installs Debian's slurm-wlm and
# munge, starts munged, slurmctld and slurmd, and cancels every Slurm job of the user at the end.
# Its own Slurm configuration lives in a temporary folder (SLURM_CONF), not in /etc/slurm.
#
# What it checks, on the shipped sample:
#   1. pipelines/slurm_workers.py starts dask-jobqueue workers as a Slurm job, and
#      `stackbuild build --scheduler FILE` runs the whole pipeline on them;
#   2. the Slurm job is cancelled in the middle of the build; the workers script resubmits it,
#      the build waits for the new workers and finishes on its own;
#   3. the volume is byte for byte the one a local build makes.
# Run from the repository root, with stackbuild installed: bash pipelines/slurm_smoke.sh
set -euo pipefail
cd "$(dirname "$0")/.."

command -v slurmctld >/dev/null || apt-get install -y -qq slurm-wlm munge >/dev/null
work=$(mktemp -d /tmp/stackbuild-slurm.XXXXXX)
export SLURM_CONF="$work/slurm.conf"
host=$(hostname -s)
cpus=$(nproc)
mem=$(( $(awk '/MemTotal/ {print $2}' /proc/meminfo) / 1024 - 2048 ))
mkdir -p "$work/spool/ctld" "$work/spool/d" /run/munge
cat > "$SLURM_CONF" <<EOF
ClusterName=stackbuild-smoke
SlurmctldHost=$host
AuthType=auth/munge
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
SlurmUser=root
SlurmctldPidFile=$work/slurmctld.pid
SlurmdPidFile=$work/slurmd.pid
SlurmdSpoolDir=$work/spool/d
StateSaveLocation=$work/spool/ctld
SlurmctldLogFile=$work/slurmctld.log
SlurmdLogFile=$work/slurmd.log
ReturnToService=2
MpiDefault=none
JobAcctGatherType=jobacct_gather/none
NodeName=$host CPUs=$cpus RealMemory=$mem State=UNKNOWN
PartitionName=smoke Nodes=$host Default=YES MaxTime=INFINITE State=UP
EOF

if ! pgrep -x munged >/dev/null; then
  chown munge:munge /run/munge 2>/dev/null || true
  runuser -u munge -- /usr/sbin/munged 2>/dev/null || munged --force
fi
slurmctld
slurmd
cleanup() {
  scancel -u "$(id -un)" 2>/dev/null || true
  [ -n "${workers_pid:-}" ] && kill "$workers_pid" 2>/dev/null || true
  kill "$(cat "$work/slurmd.pid" 2>/dev/null)" "$(cat "$work/slurmctld.pid" 2>/dev/null)" 2>/dev/null || true
}
trap cleanup EXIT
for _ in $(seq 30); do sinfo -h -o %T 2>/dev/null | grep -q idle && break; sleep 1; done
sinfo

python pipelines/slurm_workers.py --jobs 1 --cores "$cpus" --memory "$((mem / 1024 - 1))GiB" \
  --walltime 00:30:00 --scheduler-file "$work/scheduler.json" --log-dir "$work/jobs" > "$work/workers.log" 2>&1 &
workers_pid=$!
for _ in $(seq 60); do [ -f "$work/scheduler.json" ] && break; sleep 1; done

echo "== a local build for reference"
stackbuild build sample_tiles/tiles.csv --channels sample_tiles/channels.csv --out "$work/local" --quiet || true

echo "== the same build on Slurm workers; their job is cancelled after 10 s"
stackbuild build sample_tiles/tiles.csv --channels sample_tiles/channels.csv --out "$work/slurm" \
  --scheduler "$work/scheduler.json" --quiet > "$work/build.log" 2>&1 &
build_pid=$!
sleep 10
squeue
scancel -u "$(id -un)"
echo "cancelled the workers' job at $(date +%T)"
set +e
wait "$build_pid"
status=$?
set -e
cat "$work/workers.log"
[ "$status" -eq 0 ] || { echo "smoke: the Slurm build failed (status $status)"; cat "$work/build.log"; exit 1; }

python - "$work" <<'EOF'
import sys
import numpy as np
import zarr
work = sys.argv[1]
for level in ("em/0", "em/1", "channels/ambrin/0", "channels/stippolin/0"):
    a = zarr.open_array(f"{work}/slurm/volume.zarr/{level}", mode="r")[...]
    b = zarr.open_array(f"{work}/local/volume.zarr/{level}", mode="r")[...]
    assert np.array_equal(a, b), f"{level} differs between the Slurm and the local build"
    print(f"{level}: {a.shape} identical to the local build")
EOF
echo "smoke: passed (logs in $work)"
