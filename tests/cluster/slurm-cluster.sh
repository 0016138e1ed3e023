#!/usr/bin/env bash
# A one-node Slurm cluster on this machine, for the survey's Slurm test (CI).
#
#   tests/cluster/slurm-cluster.sh start   # prints: export SLURM_CONF=...
#   tests/cluster/slurm-cluster.sh stop
#   tests/cluster/slurm-cluster.sh status
#
# Needs root and Debian's slurm-wlm and munge. No systemd: munged (as the munge
# user), slurmctld (SlurmUser=slurm) and slurmd are started as background
# daemons with a minimal configuration and state in $SKERRY_SLURM_DIR (default
# /tmp/skerry-slurm), on TCP ports free at start, and stopped by the PIDs
# recorded there: only the daemons this script started are stopped, and a record
# whose daemons are all gone is treated as stale. Nothing under /etc is changed;
# commands find the configuration through SLURM_CONF.
#
# Configuration notes (Slurm 22.05): proctrack/linuxproc and task/none need no
# cgroups, but slurmd loads a cgroup plugin anyway and its auto-detection fails
# in containers, so cgroup.conf names cgroup/v1 (whose start-up does nothing).
# The node needs NodeAddr=127.0.0.1, or it shows idle but never starts a job.
# batch_sched_delay=0 starts small test jobs at once.
set -euo pipefail

DIR=${SKERRY_SLURM_DIR:-/tmp/skerry-slurm}
CONF=$DIR/slurm.conf
PIDS=$DIR/started.pids

die() { echo "slurm-cluster: $*" >&2; exit 1; }

wait_gone() {  # pid, seconds
  local pid=$1 n=$(( $2 * 10 ))
  while kill -0 "$pid" 2>/dev/null && [ $n -gt 0 ]; do sleep 0.1; n=$((n - 1)); done
  ! kill -0 "$pid" 2>/dev/null
}

free_port() {  # a TCP port on 127.0.0.1 that nothing listens on now
  python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])'
}

read_pid() {  # file, seconds to wait for it
  local f=$1 n=$(( $2 * 10 ))
  while [ ! -s "$f" ] && [ $n -gt 0 ]; do sleep 0.1; n=$((n - 1)); done
  [ -s "$f" ] && tr -dc '0-9' < "$f"
}

start() {
  [ "$(id -u)" -eq 0 ] || die "must run as root"
  for c in munged slurmctld slurmd sinfo; do command -v $c >/dev/null || die "$c not found (apt-get install slurm-wlm munge)"; done
  if [ -s "$PIDS" ]; then
    # A record whose daemons are all gone (a machine reset, a killed run) is stale.
    local alive=0
    while read -r _ pid _; do kill -0 "$pid" 2>/dev/null && alive=1; done < "$PIDS"
    [ $alive -eq 0 ] || die "already started (see $PIDS); run '$0 stop' first"
    echo "slurm-cluster: removing a stale record of daemons no longer running ($PIDS)" >&2
    rm -f "$PIDS"
  fi
  mkdir -p "$DIR/slurmd" "$DIR/state"
  : > "$PIDS"

  # munge: the key comes with the package; the socket folder belongs to munge.
  if [ ! -S /run/munge/munge.socket.2 ] || ! munge -n >/dev/null 2>&1; then
    [ -s /etc/munge/munge.key ] || die "/etc/munge/munge.key is missing"
    install -d -o munge -g munge -m 0755 /run/munge
    rm -f /run/munge/munged.pid
    runuser -u munge -- /usr/sbin/munged
    pid=$(read_pid /run/munge/munged.pid 10) || die "munged did not start"
    echo "munged $pid /run/munge/munged.pid" >> "$PIDS"
  fi
  munge -n | unmunge >/dev/null || die "munge does not work"

  chown slurm:slurm "$DIR" "$DIR/state"
  # Ports free now, so that a cluster already running on this machine (another
  # CI run, another folder) does not collide with this one.
  local ctld_port slurmd_port
  ctld_port=$(free_port) && slurmd_port=$(free_port) || die "no free TCP port found"
  [ "$ctld_port" != "$slurmd_port" ] || slurmd_port=$(free_port)
  local node host
  node=$(slurmd -C | head -n 1)
  host=$(echo "$node" | sed -n 's/^NodeName=\([^ ]*\).*/\1/p')
  [ -n "$host" ] || die "slurmd -C gave no node line"
  cat > "$CONF" <<CONF
# One-node test cluster (tests/cluster/slurm-cluster.sh).
ClusterName=skerrytest
SlurmctldHost=localhost(127.0.0.1)
SlurmctldPort=$ctld_port
SlurmdPort=$slurmd_port
SlurmUser=slurm
AuthType=auth/munge
StateSaveLocation=$DIR/state
SlurmdSpoolDir=$DIR/slurmd
SlurmctldPidFile=$DIR/slurmctld.pid
SlurmdPidFile=$DIR/slurmd.pid
SlurmctldLogFile=$DIR/slurmctld.log
SlurmdLogFile=$DIR/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
MpiDefault=none
ReturnToService=2
SchedulerType=sched/backfill
SchedulerParameters=batch_sched_delay=0
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
JobCompType=jobcomp/none
MinJobAge=600
InactiveLimit=0
KillWait=5
$node NodeAddr=127.0.0.1 State=UNKNOWN
PartitionName=skerry Nodes=$host Default=YES MaxTime=INFINITE State=UP
CONF
  sed -i 's/ UpTime=[^ ]*//' "$CONF"
  echo "CgroupPlugin=cgroup/v1" > "$DIR/cgroup.conf"
  chmod 644 "$CONF" "$DIR/cgroup.conf"

  rm -f "$DIR/slurmctld.pid" "$DIR/slurmd.pid"
  SLURM_CONF=$CONF slurmctld -f "$CONF"
  pid=$(read_pid "$DIR/slurmctld.pid" 20) || die "slurmctld did not start (see $DIR/slurmctld.log)"
  echo "slurmctld $pid $DIR/slurmctld.pid" >> "$PIDS"
  SLURM_CONF=$CONF slurmd -f "$CONF"
  pid=$(read_pid "$DIR/slurmd.pid" 20) || die "slurmd did not start (see $DIR/slurmd.log)"
  echo "slurmd $pid $DIR/slurmd.pid" >> "$PIDS"

  local n=300 state=""
  while [ $n -gt 0 ]; do
    state=$(SLURM_CONF=$CONF sinfo -h -o %T 2>/dev/null | head -n 1 || true)
    [ "$state" = "idle" ] && break
    sleep 0.1; n=$((n - 1))
  done
  [ "$state" = "idle" ] || die "node did not become idle (state '$state'; see $DIR/*.log)"
  echo "export SLURM_CONF=$CONF"
}

stop() {
  [ -s "$PIDS" ] || { echo "slurm-cluster: nothing started by this script" >&2; return 0; }
  # Reverse order of starting: slurmd, slurmctld, munged.
  tac "$PIDS" | while read -r name pid pidfile; do
    if kill -0 "$pid" 2>/dev/null; then
      kill -TERM "$pid" 2>/dev/null || true
      wait_gone "$pid" 15 || { kill -KILL "$pid" 2>/dev/null || true; wait_gone "$pid" 5 || true; }
    fi
    rm -f "$pidfile"  # slurmctld leaves its pid file behind
  done
  rm -f "$PIDS"
}

status() {
  [ -s "$PIDS" ] || { echo "not started"; return 1; }
  while read -r name pid _; do
    if kill -0 "$pid" 2>/dev/null; then echo "$name $pid running"; else echo "$name $pid gone"; fi
  done < "$PIDS"
  SLURM_CONF=$CONF sinfo
}

case "${1:-}" in
  start) start ;;
  stop) stop ;;
  status) status ;;
  *) echo "usage: $0 start|stop|status" >&2; exit 2 ;;
esac
