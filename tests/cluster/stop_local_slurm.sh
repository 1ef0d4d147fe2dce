#!/usr/bin/env bash
# stop_local_slurm.sh - stop the daemons that local_slurm.sh started.
#
# Only the process ids recorded in $GS_SLURM_STATE/pids are signalled, and a
# pid is signalled only while /proc/<pid>/comm still names the daemon recorded
# with it (a recycled pid is left alone). Safe to run at any time, any number
# of times: after a failed start, after a crash, with nothing running.
# Jobs still queued or running on the private cluster are cancelled first.
#
# Knobs (environment):
#   GS_SLURM_STATE  directory holding the pid list (default: /run/glmsteps-slurm)
#   GS_SLURM_ONLY   space-separated daemon names to stop (default: all of them)
# Always exits 0; what it did goes to stderr as "[stop_local_slurm] ...".
set -uo pipefail

STATE=${GS_SLURM_STATE:-/run/glmsteps-slurm}
PIDS=$STATE/pids
ONLY=${GS_SLURM_ONLY:-slurmd slurmctld slurmdbd mariadbd munged}

say() { printf '[stop_local_slurm] %s\n' "$*" >&2; }

if [[ ! -s $PIDS ]]; then
  say "no pids recorded in $PIDS: nothing to stop"
  exit 0
fi

alive_as() {  # alive_as <pid> <name>: running (not a zombie) under that name
  [[ -r /proc/$1/comm ]] && [[ $(cat /proc/"$1"/comm 2>/dev/null) == "$2" ]] \
    && ! grep -qs '^State:.*zombie' /proc/"$1"/status
}

# cancel the cluster's jobs while the controller still answers, and wait
# until they are over: a job step is over when its slurmstepd has exited
# (SLURM sends SIGTERM, then SIGKILL after KillWait=5 s, then the slurmstepd
# ends). The daemons are stopped only then, so no job process outlives them.
active_jobs() {
  squeue -h -t PENDING,RUNNING,CONFIGURING,COMPLETING,SUSPENDED -o %i 2>/dev/null
}
step_daemons() {  # only looked at, never signalled: SLURM ends them itself
  pgrep -x slurmstepd 2>/dev/null
}
if [[ " $ONLY " == *" slurmctld "* ]] && timeout 10 scontrol ping >/dev/null 2>&1; then
  jobs_left=$(active_jobs)
  if [[ -n $jobs_left ]]; then
    say "cancelling jobs: ${jobs_left//$'\n'/ }"
    # shellcheck disable=SC2086
    scancel $jobs_left 2>/dev/null
  fi
  for _ in $(seq 1 120); do  # 30 s
    [[ -z $(active_jobs) && -z $(step_daemons) ]] && break
    sleep 0.25
  done
  left=$(step_daemons)
  [[ -z $left ]] || say "job steps still running after 30 s (slurmstepd pids: ${left//$'\n'/ })"
fi

stop_pid() {  # stop_pid <name> <pid>
  local name=$1 pid=$2
  if ! alive_as "$pid" "$name"; then
    say "$name (pid $pid) is not running"
    return
  fi
  kill -TERM "$pid" 2>/dev/null
  for _ in $(seq 1 80); do  # 20 s
    alive_as "$pid" "$name" || { say "$name (pid $pid) stopped"; return; }
    sleep 0.25
  done
  say "$name (pid $pid) ignored SIGTERM for 20 s: sending SIGKILL"
  kill -KILL "$pid" 2>/dev/null
}

# reverse order of starting; every recorded pid of a name (a restart may have
# recorded several)
for name in slurmd slurmctld slurmdbd mariadbd munged; do
  [[ " $ONLY " == *" $name "* ]] || continue
  for pid in $(awk -v n="$name" '$1 == n { print $2 }' "$PIDS"); do
    stop_pid "$name" "$pid"
  done
  # forget this daemon (the file is rewritten in place, never left half-written)
  awk -v n="$name" '$1 != n' "$PIDS" >"$PIDS.tmp" && mv "$PIDS.tmp" "$PIDS"
done
[[ -s $PIDS ]] || rm -f "$PIDS"
exit 0
