#!/usr/bin/env bash
# slurm.sh start|stop DIR - a single-node SLURM (slurmctld, slurmd, munge)
# for the tests, without systemd. Installs Debian's packages if missing
# (needs root). Stops only the daemons whose PIDs it recorded in DIR.
# Settings that matter (learned on this kind of machine): proctrack/pgid so a
# job's children die with it; loopback only; batch_sched_delay=0 so array
# tasks start at once; cred_expire=10 so a requeued job is eligible in ~11 s.
set -euo pipefail
cmd=$1 dir=$2
run=$dir/run log=$dir/log state=$dir/state
alive() { local p; p=$(cat "$1" 2>/dev/null) || return 1
          [ -n "$p" ] && [ "$(cat /proc/"$p"/comm 2>/dev/null)" = "$2" ]; }
case "$cmd" in
start)
  if ! command -v slurmctld >/dev/null || ! command -v slurmd >/dev/null \
     || ! command -v sbatch >/dev/null || ! command -v munged >/dev/null; then
    flock /tmp/orbitledger-apt.lock apt-get update -q >/dev/null
    DEBIAN_FRONTEND=noninteractive flock /tmp/orbitledger-apt.lock apt-get install -y -q --no-install-recommends \
      slurmctld slurmd slurm-client munge >/dev/null
  fi
  mkdir -p "$run" "$log" "$state/ctld" "$state/d"
  install -d -o munge -g munge -m 0755 /run/munge
  install -d -o munge -g munge -m 0700 /etc/munge /var/log/munge
  install -d -o munge -g munge -m 0711 /var/lib/munge
  [ -s /etc/munge/munge.key ] || mungekey --create --keyfile=/etc/munge/munge.key
  chown munge:munge /etc/munge/munge.key && chmod 0400 /etc/munge/munge.key
  if ! munge -n </dev/null 2>/dev/null | unmunge >/dev/null 2>&1; then
    rm -f /run/munge/munged.pid
    setpriv --reuid=munge --regid=munge --init-groups /usr/sbin/munged
    for _ in $(seq 50); do [ -s /run/munge/munged.pid ] && break; sleep 0.1; done
    cp /run/munge/munged.pid "$run/munged.ours"
  fi
  node=$(hostname -s)
  mkdir -p /etc/slurm
  cat > /etc/slurm/slurm.conf <<CONF
ClusterName=orbitledger-test
SlurmctldHost=localhost
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CommunicationParameters=NoCtldInAddrAny,NoInAddrAny
MpiDefault=none
ProctrackType=proctrack/pgid
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
ReturnToService=2
SchedulerParameters=batch_sched_delay=0
AuthInfo=cred_expire=10
MinJobAge=600
StateSaveLocation=$state/ctld
SlurmdSpoolDir=$state/d
SlurmctldPidFile=$run/slurmctld.pid
SlurmdPidFile=$run/slurmd.pid
SlurmctldLogFile=$log/slurmctld.log
SlurmdLogFile=$log/slurmd.log
NodeName=$node NodeAddr=127.0.0.1 CPUs=$(nproc) State=UNKNOWN
PartitionName=debug Nodes=$node Default=YES MaxTime=INFINITE State=UP
CONF
  if ! alive "$run/slurmctld.pid" slurmctld; then
    slurmctld
    # Up to 60 s: on a loaded machine (the suite on every core) it can take a while.
    for _ in $(seq 300); do alive "$run/slurmctld.pid" slurmctld && break; sleep 0.2; done
    alive "$run/slurmctld.pid" slurmctld || { echo "slurmctld did not start within 60 s; see $log" >&2; exit 1; }
    cp "$run/slurmctld.pid" "$run/slurmctld.ours"
  fi
  if ! alive "$run/slurmd.pid" slurmd; then
    slurmd
    # Up to 60 s: on a loaded machine (the suite on every core) it can take a while.
    for _ in $(seq 300); do alive "$run/slurmd.pid" slurmd && break; sleep 0.2; done
    alive "$run/slurmd.pid" slurmd || { echo "slurmd did not start within 60 s; see $log" >&2; exit 1; }
    cp "$run/slurmd.pid" "$run/slurmd.ours"
  fi
  for _ in $(seq 120); do
    st=$(sinfo -h -n "$node" -o %T 2>/dev/null || true)
    case "$st" in idle|mixed|allocated) echo "slurm ready"; exit 0;; esac
    sleep 0.5
  done
  echo "slurm did not become ready; see $log" >&2; exit 1
  ;;
stop)
  for d in slurmd slurmctld munged; do
    p=$(cat "$run/$d.ours" 2>/dev/null || true)
    [ -n "$p" ] && kill -TERM "$p" 2>/dev/null || true
    rm -f "$run/$d.ours"
  done
  ;;
*) echo "usage: slurm.sh start|stop DIR" >&2; exit 2 ;;
esac
