#!/usr/bin/env bash
# Stop the test cluster started by start-cluster.sh (munged is left running:
# other tools on the machine may use it).  Safe to run when nothing is up.
set -uo pipefail
STATE="${EPICORR_SLURM_STATE:-/tmp/epicorr-slurm}"
for daemon in slurmd slurmctld; do
  pidfile="$STATE/$daemon.pid"
  if [ -s "$pidfile" ] && kill -0 "$(cat "$pidfile")" 2>/dev/null; then
    pid="$(cat "$pidfile")"
    kill "$pid"
    for _ in $(seq 50); do kill -0 "$pid" 2>/dev/null || break; sleep 0.1; done
    kill -0 "$pid" 2>/dev/null && kill -9 "$pid"
  fi
  rm -f "$pidfile"
done
echo "stop-cluster: stopped"
