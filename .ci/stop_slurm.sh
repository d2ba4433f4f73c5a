#!/usr/bin/env bash
# Stop the daemons started by start_slurm.sh, by their PID files, and wait for them to exit.
for f in /run/slurmd.pid /run/slurmctld.pid /run/munge/munged.pid; do
  [ -s "$f" ] || continue
  pid=$(cat "$f")
  kill "$pid" 2>/dev/null || continue
  for _ in $(seq 1 50); do kill -0 "$pid" 2>/dev/null || break; sleep 0.1; done
  kill -9 "$pid" 2>/dev/null || true
done
exit 0
