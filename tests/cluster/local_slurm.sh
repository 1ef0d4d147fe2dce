#!/usr/bin/env bash
# local_slurm.sh - a one-node SLURM cluster on the loopback interface, for
# testing glmsteps' cluster profile (config/slurm/config.yaml).
#
# Target: Debian 12 (slurm-wlm 22.05, munge 0.5), run as root, no systemd.
# Every daemon is started in the foreground in its own session with its
# output sent to a log file; its process id is written to $GS_SLURM_STATE/pids
# the moment it is started, so stop_local_slurm.sh can stop exactly those
# processes whatever happens afterwards (even if this script fails half way).
#
# Usage:  bash tests/cluster/local_slurm.sh
# Knobs (environment):
#   GS_SLURM_ACCOUNTING  none (default) | slurmdbd
#       none:     no database. `sacct` does not work; run Snakemake with
#                 --slurm-status-command squeue (MinJobAge below keeps finished
#                 jobs visible to squeue for 300 s).
#       slurmdbd: MariaDB + slurmdbd, so `sacct` works (the plugin's default
#                 status command). Slower to install and to start.
#   GS_SLURM_PARTITION   partition name (default: debug)
#   GS_SLURM_WAIT_S      seconds to wait for each daemon (default: 90)
#   GS_SLURM_STATE       directory for the pid list (default: /run/glmsteps-slurm)
#
# On success the last line printed is the `sinfo` table with the node idle.
# Timings of each stage go to stderr as "[local_slurm] <stage>: <s> s".
set -euo pipefail

ACCOUNTING=${GS_SLURM_ACCOUNTING:-none}
PARTITION=${GS_SLURM_PARTITION:-debug}
WAIT_S=${GS_SLURM_WAIT_S:-90}
STATE=${GS_SLURM_STATE:-/run/glmsteps-slurm}
PIDS=$STATE/pids
LOGS=/var/log/slurm
NODE=localhost
CLUSTER=glmsteps
SLURM_CONF=/etc/slurm/slurm.conf
DBD_CONF=/etc/slurm/slurmdbd.conf

say() { printf '[local_slurm] %s\n' "$*" >&2; }
fail() { say "FAILED: $*"; exit 1; }

[[ $(id -u) == 0 ]] || fail "run as root (it installs packages and starts daemons)"
[[ $ACCOUNTING == none || $ACCOUNTING == slurmdbd ]] \
  || fail "GS_SLURM_ACCOUNTING is '$ACCOUNTING'; expected none or slurmdbd"

t_stage=$SECONDS
stage_done() { say "$1: $((SECONDS - t_stage)) s"; t_stage=$SECONDS; }

# until_ok <seconds> <what> <command...>: poll every 0.25 s
until_ok() {
  local limit=$1 what=$2 deadline
  shift 2
  deadline=$((SECONDS + limit))
  while ! "$@" >/dev/null 2>&1; do
    ((SECONDS < deadline)) || fail "no $what after ${limit} s (logs in $LOGS)"
    sleep 0.25
  done
}

# is_ours <name>: the daemon <name> was recorded by us and is alive
is_ours() {
  local pid
  pid=$(awk -v n="$1" '$1 == n { p = $2 } END { print p }' "$PIDS" 2>/dev/null)
  [[ -n $pid ]] && [[ -r /proc/$pid/comm ]] && [[ $(</proc/"$pid"/comm) == "$1" ]] \
    && ! grep -qs '^State:.*zombie' /proc/"$pid"/status
}

# launch <name> <command...>: start a foreground daemon detached, record its pid
launch() {
  local name=$1 pid
  shift
  mkdir -p "$STATE" "$LOGS"
  # setsid (no fork: a background child of a non-interactive shell is not a
  # group leader) gives the daemon its own session, so $! is the daemon itself
  setsid "$@" </dev/null >>"$LOGS/$name.out" 2>&1 &
  pid=$!
  echo "$name $pid" >>"$PIDS"
  say "$name started, pid $pid"
}

# ------------------------------------------------------------------ packages
packages=(munge slurmctld slurmd slurm-client)
[[ $ACCOUNTING == slurmdbd ]] && packages+=(slurmdbd mariadb-server)
absent=()
for p in "${packages[@]}"; do
  dpkg-query -W -f '${db:Status-Status}' "$p" 2>/dev/null | grep -qx installed || absent+=("$p")
done
if ((${#absent[@]})); then
  say "installing ${absent[*]}"
  export DEBIAN_FRONTEND=noninteractive
  # the package lists may be missing or stale on a fresh machine
  apt-get install -y -q --no-install-recommends "${absent[@]}" >"$STATE.apt.log" 2>&1 \
    || { apt-get update -q >>"$STATE.apt.log" 2>&1 &&
         apt-get install -y -q --no-install-recommends "${absent[@]}" >>"$STATE.apt.log" 2>&1; } \
    || fail "apt-get install ${absent[*]} (see $STATE.apt.log)"
fi
stage_done install

# ------------------------------------------------------------------ slurm.conf
install -d -o slurm -g slurm "$LOGS" /var/lib/slurm /var/lib/slurm/ctld /var/lib/slurm/node
cpus=$(nproc)
# slurmd -C prints the hardware it sees; keep 10 % of the memory back, else
# the node registers with less than configured and is drained
mem_mb=$(slurmd -C | grep -o 'RealMemory=[0-9]*' | cut -d= -f2)
mem_mb=$((mem_mb * 9 / 10))
if [[ $ACCOUNTING == slurmdbd ]]; then
  accounting="AccountingStorageType=accounting_storage/slurmdbd
AccountingStorageHost=localhost
JobAcctGatherType=jobacct_gather/linux"
else
  accounting="AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none"
fi
new_conf=$(cat <<EOF
# written by glmsteps tests/cluster/local_slurm.sh (accounting: $ACCOUNTING)
ClusterName=$CLUSTER
SlurmctldHost=localhost
SlurmUser=slurm
AuthType=auth/munge
StateSaveLocation=/var/lib/slurm/ctld
SlurmdSpoolDir=/var/lib/slurm/node
SlurmctldPidFile=/run/glmsteps-slurmctld.pid
SlurmdPidFile=/run/glmsteps-slurmd.pid
SlurmctldLogFile=$LOGS/slurmctld.log
SlurmdLogFile=$LOGS/slurmd.log
# no cgroups in a container: track processes through /proc, no task binding
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
MpiDefault=none
MailProg=/bin/true
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
# without a default a job that asks for no memory is given the whole node
DefMemPerCPU=1024
# a node that was down comes back by itself when slurmd registers
ReturnToService=2
$accounting
JobCompType=jobcomp/filetxt
JobCompLoc=$LOGS/jobcomp.log
# finished jobs stay visible to squeue this long; the Snakemake plugin needs
# at least 3 x --slurm-init-seconds-before-status-checks, and its polling
# interval grows to 180 s on long runs
MinJobAge=300
SlurmctldTimeout=30
SlurmdTimeout=30
InactiveLimit=0
KillWait=5
NodeName=$NODE NodeAddr=127.0.0.1 CPUs=$cpus RealMemory=$mem_mb State=UNKNOWN
PartitionName=$PARTITION Nodes=$NODE Default=YES MaxTime=INFINITE State=UP
EOF
)
conf_changed=false
if [[ ! -f $SLURM_CONF ]] || [[ $(<"$SLURM_CONF") != "$new_conf" ]]; then
  printf '%s\n' "$new_conf" >"$SLURM_CONF.tmp"
  chmod 0644 "$SLURM_CONF.tmp"
  mv "$SLURM_CONF.tmp" "$SLURM_CONF"
  conf_changed=true
fi

# a running slurmctld/slurmd of ours with an old configuration is stopped and
# started again below (stop_local_slurm.sh knows how to stop by pid)
if $conf_changed && { is_ours slurmctld || is_ours slurmd; }; then
  say "slurm.conf changed: restarting the SLURM daemons"
  GS_SLURM_STATE=$STATE GS_SLURM_ONLY="slurmd slurmctld slurmdbd" \
    bash "$(dirname "$0")/stop_local_slurm.sh"
fi

# ------------------------------------------------------------------ munge
if is_ours munged; then
  say "munged already running"
elif munge -n 2>/dev/null | unmunge >/dev/null 2>&1; then
  say "a munged not started by this script answers: using it"
else
  if [[ ! -s /etc/munge/munge.key ]]; then
    dd if=/dev/urandom of=/etc/munge/munge.key bs=1024 count=1 status=none
  fi
  chown munge:munge /etc/munge/munge.key
  chmod 0400 /etc/munge/munge.key
  install -d -o munge -g munge -m 0755 /run/munge
  # a stale socket or pid file from an earlier munged makes it refuse to start
  rm -f /run/munge/munged.pid /run/munge/munge.socket.2 /run/munge/munge.socket.2.lock
  # setpriv executes munged in place (runuser would fork and wait), so the
  # recorded pid is munged's own
  launch munged setpriv --reuid=munge --regid=munge --init-groups /usr/sbin/munged --foreground
  until_ok "$WAIT_S" "answer from munged" sh -c 'munge -n | unmunge'
fi
stage_done munge

# ------------------------------------------------------------------ accounting
if [[ $ACCOUNTING == slurmdbd ]]; then
  if is_ours mariadbd; then
    say "mariadbd already running"
  else
    [[ -d /var/lib/mysql/mysql ]] \
      || mariadb-install-db --user=mysql --datadir=/var/lib/mysql >"$LOGS/mariadb-install.log" 2>&1
    install -d -o mysql -g mysql /run/mysqld
    launch mariadbd /usr/sbin/mariadbd --user=mysql --bind-address=127.0.0.1 \
      --skip-name-resolve --innodb-buffer-pool-size=64M
    until_ok "$WAIT_S" "answer from MariaDB" mariadb-admin ping
  fi
  db_pass=$(sed -n 's/^StoragePass=//p' "$DBD_CONF" 2>/dev/null || true)
  # (a finite read: `tr </dev/urandom | head` dies of SIGPIPE under pipefail)
  [[ -n $db_pass ]] || db_pass=$(head -c 48 /dev/urandom | base64 | tr -dc 'a-zA-Z0-9')
  mariadb <<SQL
CREATE DATABASE IF NOT EXISTS slurm_acct_db;
CREATE USER IF NOT EXISTS 'slurm'@'localhost' IDENTIFIED BY '$db_pass';
ALTER USER 'slurm'@'localhost' IDENTIFIED BY '$db_pass';
GRANT ALL ON slurm_acct_db.* TO 'slurm'@'localhost';
SQL
  (umask 077 && cat >"$DBD_CONF" <<EOF
AuthType=auth/munge
DbdHost=localhost
SlurmUser=slurm
LogFile=$LOGS/slurmdbd.log
PidFile=/run/glmsteps-slurmdbd.pid
StorageType=accounting_storage/mysql
StorageHost=localhost
StorageUser=slurm
StoragePass=$db_pass
StorageLoc=slurm_acct_db
EOF
  )
  chown slurm:slurm "$DBD_CONF"
  if is_ours slurmdbd; then
    say "slurmdbd already running"
  else
    launch slurmdbd /usr/sbin/slurmdbd -D
    until_ok "$WAIT_S" "answer from slurmdbd" sacctmgr -n list cluster
  fi
  stage_done accounting
fi

# ------------------------------------------------------------------ controller and node
if is_ours slurmctld; then
  say "slurmctld already running"
else
  launch slurmctld /usr/sbin/slurmctld -D
  until_ok "$WAIT_S" "answer from slurmctld" scontrol ping
fi
if is_ours slurmd; then
  say "slurmd already running"
else
  launch slurmd /usr/sbin/slurmd -D -N "$NODE"
fi

node_ready() {
  local state
  state=$(sinfo -h -n "$NODE" -o %T 2>/dev/null | head -n 1)
  case $state in
    idle | mixed | allocated) return 0 ;;
    down* | drain*) scontrol update NodeName="$NODE" State=RESUME >/dev/null 2>&1 ;;
  esac
  return 1
}
until_ok "$WAIT_S" "idle node '$NODE' in sinfo" node_ready
if [[ $ACCOUNTING == slurmdbd ]]; then
  # slurmctld registers the cluster in slurmdbd shortly after it starts;
  # before that, sacct answers with nothing
  until_ok "$WAIT_S" "cluster '$CLUSTER' in slurmdbd" \
    sh -c "sacctmgr -n -P list cluster format=cluster,controlport | grep -q '^$CLUSTER|[1-9]'"
fi
stage_done "controller and node"
say "ready (accounting: $ACCOUNTING, partition: $PARTITION)"
sinfo
