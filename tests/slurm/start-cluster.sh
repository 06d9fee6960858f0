#!/usr/bin/env bash
# Start a single-node Slurm cluster on this machine for epicorr's tests.
#
# Uses Debian's slurm-wlm and munge (`make install-slurm`).  No systemd: the
# daemons (munged, slurmctld, slurmd) are started by hand, running as root.
# Idempotent: when the cluster is already up and answering, it does nothing.
#
# Environment:
#   EPICORR_SLURM_STATE   state folder (default /tmp/epicorr-slurm); the
#                         config is written to $EPICORR_SLURM_STATE/slurm.conf
#   EPICORR_SLURM_CTLD_PORT, EPICORR_SLURM_SLURMD_PORT   (default 6817, 6818)
#
# On success it prints `SLURM_CONF=<path>`: export that for sinfo/srun/sbatch.
set -euo pipefail

HERE="$(cd "$(dirname "$0")" && pwd)"
STATE="${EPICORR_SLURM_STATE:-/tmp/epicorr-slurm}"
CTLD_PORT="${EPICORR_SLURM_CTLD_PORT:-6817}"
SLURMD_PORT="${EPICORR_SLURM_SLURMD_PORT:-6818}"
PARTITION="${EPICORR_SLURM_PARTITION:-debug}"
CONF="$STATE/slurm.conf"
export SLURM_CONF="$CONF"

die() { echo "start-cluster: $*" >&2; exit 1; }

[ "$(id -u)" = 0 ] || die "must run as root (the test cluster's daemons run as root)"
for tool in munged slurmctld slurmd sinfo scontrol; do
  command -v "$tool" >/dev/null 2>&1 || die "$tool not found; run 'make install-slurm'"
done

alive() {  # pid file -> 0 when that process is running
  [ -s "$1" ] && kill -0 "$(cat "$1")" 2>/dev/null
}

cluster_ready() {
  [ -s "$CONF" ] && scontrol ping >/dev/null 2>&1 &&
    sinfo -h -N -o '%T' 2>/dev/null | grep -Eq '^(idle|mixed|allocated)'
}

# Fast path: a running cluster needs no lock.
if cluster_ready; then
  echo "start-cluster: already running"
  echo "SLURM_CONF=$CONF"
  exit 0
fi

# One start at a time (parallel test workers may call this together).  The
# daemons below are started with fd 9 closed: a daemon that inherited it would
# hold the lock for its whole life and every later start would wait on it.
mkdir -p "$STATE"
exec 9>"$STATE/start.lock"
flock -w 120 9 || die "another start-cluster.sh holds $STATE/start.lock"

if cluster_ready; then
  echo "start-cluster: already running"
  echo "SLURM_CONF=$CONF"
  exit 0
fi

mkdir -p "$STATE/ctld" "$STATE/spool" "$STATE/log"

# --- munge -----------------------------------------------------------------
MUNGE_SOCKET_DIR=/run/munge
mkdir -p "$MUNGE_SOCKET_DIR" /var/lib/munge /var/log/munge /etc/munge
chown munge:munge "$MUNGE_SOCKET_DIR" /var/lib/munge /var/log/munge /etc/munge
chmod 0755 "$MUNGE_SOCKET_DIR"
if [ ! -s /etc/munge/munge.key ]; then
  dd if=/dev/urandom of=/etc/munge/munge.key bs=1 count=1024 status=none
  chown munge:munge /etc/munge/munge.key
  chmod 0400 /etc/munge/munge.key
fi
if ! alive "$MUNGE_SOCKET_DIR/munged.pid" || ! munge -n </dev/null >/dev/null 2>&1; then
  rm -f "$MUNGE_SOCKET_DIR/munge.socket.2" "$MUNGE_SOCKET_DIR/munged.pid"
  runuser -u munge -- munged --force 9>&- </dev/null >>"$STATE/log/munged.out" 2>&1
  for _ in $(seq 50); do munge -n </dev/null >/dev/null 2>&1 && break; sleep 0.1; done
  munge -n </dev/null | unmunge >/dev/null || die "munged does not answer"
fi

# --- configuration -----------------------------------------------------------
HOST="$(hostname -s)"
# RealMemory must not exceed what slurmd detects; leave a 10 % margin.
TOTAL_MB="$(awk '/^MemTotal:/ {print int($2 / 1024)}' /proc/meminfo)"
MEM_MB=$(( TOTAL_MB * 9 / 10 ))
[ "$MEM_MB" -ge 1024 ] || die "only ${TOTAL_MB} MB of memory; the test cluster wants at least 1.2 GB"
sed -e "s|@HOST@|$HOST|g" -e "s|@STATE@|$STATE|g" -e "s|@MEM_MB@|$MEM_MB|g" \
    -e "s|@CTLD_PORT@|$CTLD_PORT|g" -e "s|@SLURMD_PORT@|$SLURMD_PORT|g" \
    -e "s|@PARTITION@|$PARTITION|g" "$HERE/slurm.conf.in" > "$CONF.tmp"
mv "$CONF.tmp" "$CONF"

# --- daemons -------------------------------------------------------------------
if ! alive "$STATE/slurmctld.pid"; then
  # -c: clear saved state (a stale test cluster leaves nothing behind); -i: ignore errors in it.
  slurmctld -f "$CONF" -c -i 9>&- </dev/null >>"$STATE/log/slurmctld.out" 2>&1
fi
for _ in $(seq 100); do scontrol ping >/dev/null 2>&1 && break; sleep 0.2; done
scontrol ping >/dev/null 2>&1 || die "slurmctld does not answer; see $STATE/log/slurmctld.log"

if ! alive "$STATE/slurmd.pid"; then
  slurmd -f "$CONF" 9>&- </dev/null >>"$STATE/log/slurmd.out" 2>&1
fi
for _ in $(seq 150); do
  state="$(sinfo -h -N -o '%T' 2>/dev/null | head -1)"
  case "$state" in
    idle*|mixed*|allocated*) break ;;
    down*|drain*) scontrol update NodeName="$HOST" State=RESUME >/dev/null 2>&1 || true ;;
  esac
  sleep 0.2
done
cluster_ready || die "node $HOST is not up (state '${state:-unknown}'); see $STATE/log/slurmd.log"
echo "start-cluster: up (node $HOST, partition $PARTITION, ${MEM_MB} MB)"
echo "SLURM_CONF=$CONF"
