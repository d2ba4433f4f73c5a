#!/usr/bin/env bash
# Start a single-node SLURM cluster on this machine by hand (no systemd): munged, slurmctld,
# slurmd; wait until the node is idle. Stop with stop_slurm.sh (by PID files).
set -euo pipefail
HOST=$(hostname -s)
CPUS=$(nproc)
MEM_MB=$(awk '/MemTotal/ {print int($2 / 1024 * 0.9)}' /proc/meminfo)
mkdir -p /etc/slurm /var/lib/slurm/slurmctld /var/lib/slurm/slurmd /var/log/slurm /run/munge
id slurm >/dev/null 2>&1 && chown -R slurm /var/lib/slurm /var/log/slurm || true
id munge >/dev/null 2>&1 && chown -R munge /run/munge /etc/munge /var/lib/munge /var/log/munge 2>/dev/null || true
if [ ! -s /etc/munge/munge.key ]; then
  dd if=/dev/urandom bs=1 count=1024 of=/etc/munge/munge.key 2>/dev/null
  chown munge /etc/munge/munge.key 2>/dev/null || true
  chmod 400 /etc/munge/munge.key
fi
cat > /etc/slurm/slurm.conf <<CONF
ClusterName=ci
SlurmctldHost=${HOST}(127.0.0.1)
AuthType=auth/munge
CredType=cred/munge
SlurmUser=slurm
StateSaveLocation=/var/lib/slurm/slurmctld
SlurmdSpoolDir=/var/lib/slurm/slurmd
SlurmctldPidFile=/run/slurmctld.pid
SlurmdPidFile=/run/slurmd.pid
SlurmctldLogFile=/var/log/slurm/slurmctld.log
SlurmdLogFile=/var/log/slurm/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
MpiDefault=none
SwitchType=switch/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
ReturnToService=2
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
SlurmctldTimeout=30
SlurmdTimeout=30
InactiveLimit=0
MinJobAge=60
KillWait=5
NodeName=${HOST} CPUs=${CPUS} Boards=1 SocketsPerBoard=1 CoresPerSocket=${CPUS} ThreadsPerCore=1 RealMemory=${MEM_MB} NodeAddr=127.0.0.1 State=UNKNOWN
PartitionName=debug Nodes=ALL Default=YES MaxTime=INFINITE State=UP
CONF
if ! pgrep -x munged >/dev/null; then
  runuser -u munge -- /usr/sbin/munged || /usr/sbin/munged --force
fi
munge -n | unmunge >/dev/null
pgrep -x slurmctld >/dev/null || /usr/sbin/slurmctld
pgrep -x slurmd >/dev/null || /usr/sbin/slurmd
for _ in $(seq 1 60); do
  if sinfo -h -o %T 2>/dev/null | grep -qx idle; then echo "ci: SLURM node idle"; exit 0; fi
  scontrol update nodename="$HOST" state=resume >/dev/null 2>&1 || true
  sleep 0.5
done
echo "ci: SLURM node did not become idle"; sinfo || true
exit 1
