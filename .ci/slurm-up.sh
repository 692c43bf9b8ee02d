#!/usr/bin/env bash
# Install and start a single-node Slurm (Debian 12 packages, munge) for the batch-system
# tests. Idempotent: a running controller is left alone. Run as root.
set -euo pipefail

if ! command -v slurmctld >/dev/null 2>&1; then
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq
  apt-get install -y -qq --no-install-recommends slurmctld slurmd slurm-client munge >/dev/null
fi

host=$(hostname -s)
cpus=$(slurmd -C | sed -n 's/.*CPUs=\([0-9]*\).*/\1/p' | head -1)
mem=$(slurmd -C | sed -n 's/.*RealMemory=\([0-9]*\).*/\1/p' | head -1)
mem=$(( mem > 2000 ? mem - 1000 : mem ))
mkdir -p /etc/slurm /tmp/slurm/state/ctld /tmp/slurm/state/d /tmp/slurm/log /run/munge
cat > /etc/slurm/slurm.conf <<CONF
ClusterName=local
SlurmctldHost=${host}(127.0.0.1)
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
MpiDefault=none
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/filetxt
JobCompLoc=/tmp/slurm/log/jobcomp.log
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
SchedulerType=sched/backfill
SchedulerParameters=batch_sched_delay=0
ReturnToService=2
KillWait=5
MailProg=/bin/true
StateSaveLocation=/tmp/slurm/state/ctld
SlurmdSpoolDir=/tmp/slurm/state/d
SlurmctldPidFile=/tmp/slurm/slurmctld.pid
SlurmdPidFile=/tmp/slurm/slurmd.pid
SlurmctldLogFile=/tmp/slurm/log/slurmctld.log
SlurmdLogFile=/tmp/slurm/log/slurmd.log
NodeName=${host} NodeAddr=127.0.0.1 CPUs=${cpus} RealMemory=${mem} State=UNKNOWN
PartitionName=debug Nodes=ALL Default=YES MaxTime=INFINITE State=UP
CONF

chown munge:munge /run/munge
[ -f /etc/munge/munge.key ] || mungekey --create
if ! munge -n 2>/dev/null | unmunge >/dev/null 2>&1; then
  runuser -u munge -- /usr/sbin/munged
  for _ in $(seq 40); do munge -n 2>/dev/null | unmunge >/dev/null 2>&1 && break; sleep 0.25; done
fi
running() { [ -f "$1" ] && kill -0 "$(cat "$1")" 2>/dev/null; }
running /tmp/slurm/slurmctld.pid || slurmctld
running /tmp/slurm/slurmd.pid || slurmd
for _ in $(seq 120); do
  state=$(sinfo -h -o %t 2>/dev/null | head -1 || true)
  [ "$state" = idle ] && break
  sleep 0.25
done
sinfo
