#!/usr/bin/env bash
# Stops the one-node Slurm cluster that tests/slurm/up.sh started.
#
# Stopping the daemons while jobs run leaves orphaned step processes behind and
# requeues the jobs when Slurm starts again, so: cancel every job, wait for an empty
# queue (of jobs not yet ended), then stop slurmd, slurmctld and munged.
#
# Environment: SLURM_DOWN_TIMEOUT (seconds to wait for the queue to drain, default 60).
set -uo pipefail
timeout_s=${SLURM_DOWN_TIMEOUT:-60}
t0=$(date +%s)

if command -v squeue >/dev/null && squeue -h >/dev/null 2>&1; then
  echo "== slurm: cancelling every job"
  scancel --full --state=PENDING 2>/dev/null || true
  scancel --full --state=RUNNING 2>/dev/null || true
  scancel --full --state=SUSPENDED 2>/dev/null || true
  while [ -n "$(squeue -h -t PENDING,RUNNING,SUSPENDED,COMPLETING,CONFIGURING -o %i 2>/dev/null)" ]; do
    if [ $(( $(date +%s) - t0 )) -gt "$timeout_s" ]; then
      echo "tests/slurm/down.sh: jobs still in the queue after ${timeout_s}s:" >&2
      squeue -t all >&2 || true
      break
    fi
    sleep 0.5
  done
fi

stop() {  # stop NAME PIDFILE: SIGTERM, then wait up to 10 s, then SIGKILL
  local name=$1 pidfile=$2 pid
  [ -s "$pidfile" ] || return 0
  pid=$(cat "$pidfile")
  kill -0 "$pid" 2>/dev/null || { rm -f "$pidfile"; return 0; }
  echo "== slurm: stopping $name (pid $pid)"
  kill "$pid" 2>/dev/null || true
  for _ in $(seq 100); do
    kill -0 "$pid" 2>/dev/null || break
    sleep 0.1
  done
  kill -0 "$pid" 2>/dev/null && kill -9 "$pid" 2>/dev/null
  rm -f "$pidfile"
}
stop slurmd /run/slurm/slurmd.pid
stop slurmctld /run/slurm/slurmctld.pid
stop munged /run/munge/munged.pid
echo "== slurm: down in $(( $(date +%s) - t0 )) s"
