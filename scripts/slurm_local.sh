#!/usr/bin/env bash
# A real single-node Slurm on loopback, for the slurm-marked tests and for trying batch mode.
#
#   scripts/slurm_local.sh start    # progress on stderr; prints "export SLURM_CONF=..." on stdout
#   scripts/slurm_local.sh stop     # cancels leftover jobs, stops the daemons by saved PID
#   scripts/slurm_local.sh status
#
#   eval "$(scripts/slurm_local.sh start)"   # then sinfo, sbatch, pytest -m slurm ...
#
# Needs root and apt-get (Debian 12: Slurm 22.05 and munge); installs slurmctld, slurmd,
# slurm-client and munge when missing. Everything the script writes goes to a private state
# directory ($HELISWEEP_SLURM_STATE, default /tmp/helisweep-slurm): slurm.conf, spool and
# state directories, logs and the PID of every daemon it started; /etc is not touched (only
# the munge package's own /etc/munge/munge.key is created when it is missing).
#
# The node is declared with $HELISWEEP_SLURM_CPUS CPUs (default 4) through
# SlurmdParameters=config_overrides, so several one-core jobs run at once on a 2-core machine.
# Daemons are stopped only through the PIDs saved at start, never by name.
set -euo pipefail

STATE=${HELISWEEP_SLURM_STATE:-/tmp/helisweep-slurm}
CPUS=${HELISWEEP_SLURM_CPUS:-4}
CONF=$STATE/slurm.conf
PIDS=$STATE/pids
# Daemons in start order; stop goes in reverse.
DAEMONS=(munged slurmctld slurmd)

say() { printf '[slurm_local] %s\n' "$*" >&2; }
die() { say "ERROR: $*"; exit 1; }

# ---------------------------------------------------------------------------------- helpers
# wait_for SECONDS DESCRIPTION COMMAND...: poll COMMAND every 0.2 s until it succeeds.
wait_for() {
  local limit=$1 what=$2 i
  shift 2
  for ((i = 0; i < limit * 5; i++)); do
    if "$@" >/dev/null 2>&1; then return 0; fi
    sleep 0.2
  done
  say "timed out after ${limit} s waiting for $what"
  return 1
}

# is_ours NAME: the saved PID of NAME is alive and still runs that program (PIDs get reused).
is_ours() {
  local name=$1 pid
  [ -f "$PIDS/$name" ] || return 1
  pid=$(cat "$PIDS/$name")
  [ -n "$pid" ] && kill -0 "$pid" 2>/dev/null || return 1
  [ "$(cat "/proc/$pid/comm" 2>/dev/null)" = "$name" ]
}

munge_works() { munge -n 2>/dev/null | unmunge >/dev/null 2>&1; }
ctld_up() { scontrol ping 2>/dev/null | grep -q 'is UP'; }
node_idle() { sinfo -h -o %T 2>/dev/null | grep -qx 'idle'; }

# start_daemon NAME COMMAND...: run COMMAND in the background in its own session, output to
# $STATE/NAME.out, and save its PID. setsid and setpriv exec their argument, so $! is the
# daemon's own PID.
start_daemon() {
  local name=$1
  shift
  setsid "$@" </dev/null >>"$STATE/$name.out" 2>&1 &
  echo $! >"$PIDS/$name"
  say "started $name (PID $!)"
}

install_packages() {
  local need=()
  command -v slurmctld >/dev/null || [ -x /usr/sbin/slurmctld ] || need+=(slurmctld)
  command -v slurmd >/dev/null || [ -x /usr/sbin/slurmd ] || need+=(slurmd)
  command -v sinfo >/dev/null || need+=(slurm-client)
  [ -x /usr/sbin/munged ] || need+=(munge)
  [ ${#need[@]} -eq 0 ] && return 0
  [ "$(id -u)" = 0 ] || die "not root: cannot install ${need[*]}"
  command -v apt-get >/dev/null || die "no apt-get: install ${need[*]} by other means"
  say "installing ${need[*]} (apt)"
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq >/dev/null 2>&1 || say "apt-get update failed; trying the install anyway"
  # "policy-rc.d denied execution of start" is expected: the daemons are started below.
  apt-get install -y -qq --no-install-recommends slurmctld slurmd slurm-client munge \
    >"$STATE/apt.log" 2>&1 || { tail -5 "$STATE/apt.log" >&2; die "apt-get install failed"; }
}

write_conf() {
  local host node name mem
  host=$(hostname -s)
  node=$(/usr/sbin/slurmd -C | head -1)
  name=$(sed -n 's/.*NodeName=\([^ ]*\).*/\1/p' <<<"$node")
  mem=$(sed -n 's/.*RealMemory=\([0-9]*\).*/\1/p' <<<"$node")
  [ -n "$name" ] && [ -n "$mem" ] || die "cannot read the node from 'slurmd -C': $node"
  mkdir -p "$STATE/ctld" "$STATE/spool" "$STATE/log"
  cat >"$CONF" <<EOF
# Written by scripts/slurm_local.sh start: single node on loopback, no accounting, no cgroups.
ClusterName=local
SlurmctldHost=$host(127.0.0.1)
AuthType=auth/munge
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core
SlurmdParameters=config_overrides
ReturnToService=2
MailProg=/bin/true
# short grace between SIGTERM and SIGKILL on scancel or at the time limit
KillWait=5
StateSaveLocation=$STATE/ctld
SlurmdSpoolDir=$STATE/spool
SlurmctldPidFile=$STATE/slurmctld.daemon.pid
SlurmdPidFile=$STATE/slurmd.daemon.pid
SlurmctldLogFile=$STATE/log/slurmctld.log
SlurmdLogFile=$STATE/log/slurmd.log
NodeName=$name NodeAddr=127.0.0.1 CPUs=$CPUS Boards=1 SocketsPerBoard=1 CoresPerSocket=$CPUS ThreadsPerCore=1 RealMemory=$mem State=UNKNOWN
PartitionName=debug Nodes=ALL Default=YES MaxTime=INFINITE State=UP
EOF
  say "wrote $CONF (node $name: $CPUS CPUs, $mem MB)"
}

# ---------------------------------------------------------------------------------- commands
cmd_start() {
  mkdir -p "$STATE" "$PIDS"
  chmod 0755 "$STATE"
  export SLURM_CONF=$CONF
  if is_ours slurmctld && is_ours slurmd && node_idle; then
    say "already running (state in $STATE)"
    echo "export SLURM_CONF=$CONF"
    return 0
  fi
  install_packages
  write_conf

  if munge_works; then
    say "munge already works; using the running munged"
  else
    if [ ! -s /etc/munge/munge.key ]; then
      setpriv --reuid=munge --regid=munge --clear-groups mungekey --create
    fi
    install -d -o munge -g munge -m 0755 /run/munge
    start_daemon munged setpriv --reuid=munge --regid=munge --clear-groups /usr/sbin/munged -F
    wait_for 20 "munged" munge_works || die "munged did not start (see $STATE/munged.out)"
  fi

  is_ours slurmctld || start_daemon slurmctld /usr/sbin/slurmctld -D -c -f "$CONF"
  wait_for 30 "slurmctld" ctld_up || die "slurmctld did not come up (see $STATE/log/slurmctld.log)"
  is_ours slurmd || start_daemon slurmd /usr/sbin/slurmd -D -f "$CONF"
  wait_for 30 "the node to become idle" node_idle || {
    sinfo >&2 || true
    die "the node is not idle (see $STATE/log/slurmd.log)"
  }
  echo "export SLURM_CONF=$CONF" >"$STATE/env"
  say "Slurm is up: $(sinfo -h -o '%P %D %T %c CPUs' | head -1)"
  echo "export SLURM_CONF=$CONF"
}

cmd_stop() {
  export SLURM_CONF=$CONF
  [ -d "$PIDS" ] || { say "nothing to stop (no $PIDS)"; return 0; }
  # Cancel leftover jobs by job id so that no job step outlives the daemons.
  if is_ours slurmctld; then
    local jobs
    jobs=$(squeue -h -o %i 2>/dev/null || true)
    if [ -n "$jobs" ]; then
      say "cancelling leftover jobs: $(echo $jobs)"
      # shellcheck disable=SC2086
      scancel $jobs 2>/dev/null || true
      wait_for 20 "leftover jobs to end" test -z "$(squeue -h -o %i 2>/dev/null)" || true
    fi
  fi
  local i name pid
  for ((i = ${#DAEMONS[@]} - 1; i >= 0; i--)); do
    name=${DAEMONS[i]}
    [ -f "$PIDS/$name" ] || continue
    pid=$(cat "$PIDS/$name")
    if is_ours "$name"; then
      kill -TERM "$pid" 2>/dev/null || true
      if ! wait_for 15 "$name (PID $pid) to exit" eval "! kill -0 $pid"; then
        kill -KILL "$pid" 2>/dev/null || true
      fi
      say "stopped $name (PID $pid)"
    fi
    rm -f "$PIDS/$name"
  done
}

cmd_status() {
  export SLURM_CONF=$CONF
  local name
  for name in "${DAEMONS[@]}"; do
    if is_ours "$name"; then echo "$name: running (PID $(cat "$PIDS/$name"))"; else echo "$name: not started here"; fi
  done
  # without a configuration file sinfo would look for one through DNS: ask only ours
  if [ -f "$CONF" ]; then sinfo 2>/dev/null || echo "sinfo: no answer"; else echo "no $CONF"; fi
}

case "${1:-}" in
  start) cmd_start ;;
  stop) cmd_stop ;;
  status) cmd_status ;;
  *) echo "usage: $0 start|stop|status" >&2; exit 2 ;;
esac
