#!/usr/bin/env bash
# Brings up a one-node Slurm cluster on this machine for tarn's Slurm tests.
#
# Debian 12 (Slurm 22.05), run as root, no systemd: installs slurmctld, slurmd,
# slurm-client and munge, writes a configuration for localhost (no accounting
# database, no cgroups), starts munged (as the munge user), slurmctld and slurmd as
# background daemons, and waits until `sinfo` shows the node idle. Idempotent: a
# second run on a machine where the cluster is up only checks that it is idle.
#
# Environment: SLURM_UP_TIMEOUT (seconds to wait for an idle node, default 120).
set -euo pipefail
export DEBIAN_FRONTEND=noninteractive
timeout_s=${SLURM_UP_TIMEOUT:-120}
t0=$(date +%s)

if [ "$(id -u)" != 0 ]; then
  echo "tests/slurm/up.sh: must run as root (it installs packages and starts daemons)" >&2
  exit 1
fi

echo "== slurm: packages"
if ! command -v slurmctld >/dev/null || ! command -v slurmd >/dev/null \
   || ! command -v sbatch >/dev/null || ! command -v munged >/dev/null; then
  apt-get update -qq
  apt-get install -y -qq --no-install-recommends slurmctld slurmd slurm-client munge >/dev/null
fi

echo "== slurm: munge"
if [ ! -s /etc/munge/munge.key ]; then
  # A fresh key; the package's postinst normally creates one.
  mungekey --create --keyfile=/etc/munge/munge.key 2>/dev/null \
    || dd if=/dev/urandom of=/etc/munge/munge.key bs=1024 count=1 status=none
fi
chown munge:munge /etc/munge/munge.key
chmod 0400 /etc/munge/munge.key
mkdir -p /run/munge /var/log/munge /var/lib/munge
chown munge:munge /run/munge /var/log/munge /var/lib/munge
chmod 0755 /run/munge
if ! munge -n </dev/null 2>/dev/null | unmunge >/dev/null 2>&1; then
  # munged refuses to run as root: start it as its own user. It forks.
  runuser -u munge -- /usr/sbin/munged
  for _ in $(seq 50); do
    munge -n </dev/null 2>/dev/null | unmunge >/dev/null 2>&1 && break
    sleep 0.1
  done
fi
munge -n </dev/null | unmunge >/dev/null

echo "== slurm: configuration"
host=$(hostname -s)
# The node line exactly as slurmd detects the hardware, with RealMemory below what
# is free so that the node is not drained for having less memory than declared.
node_line=$(slurmd -C | head -n 1)
free_mb=$(free -m | awk '/^Mem:/ {print $7}')
real_mb=$(( free_mb * 8 / 10 ))
node_line=$(echo "$node_line" | sed -E "s/RealMemory=[0-9]+/RealMemory=${real_mb}/")
mkdir -p /etc/slurm /var/spool/slurmctld /var/spool/slurmd /var/log/slurm /run/slurm
conf=/etc/slurm/slurm.conf
new=$(mktemp)
cat >"$new" <<CONF
# Written by tarn's tests/slurm/up.sh: a one-node cluster on $host.
ClusterName=tarn-test
SlurmctldHost=$host
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
StateSaveLocation=/var/spool/slurmctld
SlurmdSpoolDir=/var/spool/slurmd
SlurmctldPidFile=/run/slurm/slurmctld.pid
SlurmdPidFile=/run/slurm/slurmd.pid
SlurmctldLogFile=/var/log/slurm/slurmctld.log
SlurmdLogFile=/var/log/slurm/slurmd.log
# The cgroup plugins fail quietly here (the node drains, yet jobs report success).
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
# Without this every batch job after the first waits about 3 s to be scheduled.
SchedulerParameters=batch_sched_delay=0
# Finished jobs stay visible to squeue/scontrol for 10 minutes.
MinJobAge=600
ReturnToService=2
SlurmdTimeout=60
InactiveLimit=0
KillWait=5
MpiDefault=none
$node_line State=UNKNOWN
PartitionName=debug Nodes=$host Default=YES MaxTime=INFINITE State=UP
CONF
if ! cmp -s "$new" "$conf"; then
  cp "$new" "$conf"
  changed=1
else
  changed=0
fi
rm -f "$new"

echo "== slurm: daemons"
alive() { [ -s "$1" ] && kill -0 "$(cat "$1")" 2>/dev/null; }
if [ "$changed" = 1 ] && alive /run/slurm/slurmctld.pid; then
  scontrol reconfigure || true
fi
alive /run/slurm/slurmctld.pid || slurmctld
alive /run/slurm/slurmd.pid || slurmd

echo "== slurm: waiting for $host to be idle"
while true; do
  state=$(sinfo -h -n "$host" -o %T 2>/dev/null | head -n 1 || true)
  case "$state" in
    idle) break ;;
    drain*|drng|down*)
      # A node drained by an earlier run stays drained across restarts.
      scontrol update nodename="$host" state=resume 2>/dev/null || true ;;
  esac
  if [ $(( $(date +%s) - t0 )) -gt "$timeout_s" ]; then
    echo "tests/slurm/up.sh: node $host is '${state:-unknown}' after ${timeout_s}s" >&2
    sinfo -N -l >&2 || true
    tail -n 30 /var/log/slurm/slurmctld.log /var/log/slurm/slurmd.log >&2 || true
    exit 1
  fi
  sleep 0.5
done
sinfo
echo "== slurm: up in $(( $(date +%s) - t0 )) s"
