# lib.sh - shell helpers shared by run_slurm_smoke.sh and run_toy_on_slurm.sh.
# Source it after setting `here` (this folder); it defines:
#   choose_python              sets $python: $GS_PYTHON, else the active venv's, else
#                              /work/venv/bin/python, else python3
#   require_imports MOD...     exit 1 with a one-line hint unless $python imports them
#   use_work_dir DIR PREFIX    sets work (DIR, created and kept afterwards, if DIR is
#                              set; else a new /tmp/PREFIX.XXXXXX) and keep_work
#   now / seconds_since T / lap STAGE
#                              stage timings collected in the array `timings`
#                              (label width: $LAP_WIDTH, default 22)
#   stop_run_and_cluster       stop the snakemake in $smk_pid (if any) and the local
#                              cluster (stop_local_slurm.sh, daemons by recorded pid)
#   finish_on_exit NAME HEADER on exit (also after a failure or INT/TERM): stop the run
#                              and the cluster, print the timings under "timings
#                              (HEADER):", then say "NAME OK" and remove $work unless
#                              $keep_work, when $passed is true and the status is 0,
#                              else "NAME FAILED" (exit status non-zero)

choose_python() {
  if [[ -n ${GS_PYTHON:-} ]]; then
    python=$GS_PYTHON
  elif [[ -n ${VIRTUAL_ENV:-} && -x $VIRTUAL_ENV/bin/python ]]; then
    python=$VIRTUAL_ENV/bin/python
  elif [[ -x /work/venv/bin/python ]]; then
    python=/work/venv/bin/python
  else
    python=python3
  fi
}

require_imports() {
  if ! "$python" -c "import $(IFS=,; echo "$*")" 2>/dev/null; then
    say "FAILED: $python cannot import $*; set GS_PYTHON to a python that has them" \
      "(pip install '.[slurm]')"
    exit 1
  fi
}

use_work_dir() {
  if [[ -n $1 ]]; then
    work=$1
    mkdir -p "$work"
    keep_work=true
  else
    work=$(mktemp -d "/tmp/$2.XXXXXX")
    keep_work=false
  fi
  work=$(cd "$work" && pwd)
}

now() { date +%s.%N; }
timings=()
t0=$(now)
t_all=$t0
seconds_since() { awk -v a="$(now)" -v b="$1" 'BEGIN { printf "%7.1f", a - b }'; }
lap() { # lap <stage>: record the time since the previous lap
  timings+=("$(printf "%-${LAP_WIDTH:-22}s %s s" "$1" "$(seconds_since "$t0")")")
  t0=$(now)
}

stop_run_and_cluster() {
  # interrupted during a run: SIGTERM stops our snakemake from submitting more;
  # the stop script cancels the SLURM jobs and stops the daemons (by their
  # recorded pids); a snakemake still waiting for its cancelled jobs is killed
  local smk_alive=false
  if [[ -n ${smk_pid:-} ]] && kill -0 "$smk_pid" 2>/dev/null; then
    say "stopping snakemake (pid $smk_pid)"
    kill -TERM "$smk_pid" 2>/dev/null
    smk_alive=true
    sleep 1
  fi
  bash "$here/stop_local_slurm.sh" || true
  if $smk_alive && kill -0 "$smk_pid" 2>/dev/null; then
    kill -KILL "$smk_pid" 2>/dev/null
    wait "$smk_pid" 2>/dev/null  # reap it (status 137)
  fi
}

finish_on_exit() {
  _finish_name=$1
  _finish_header=$2
  trap _finish EXIT
  trap 'exit 130' INT TERM
}

_finish() {
  local rc=$?
  trap - EXIT INT TERM
  set +e  # clean up as far as possible, whatever fails
  t0=$(now)
  stop_run_and_cluster
  lap "stop cluster"
  timings+=("$(printf "%-${LAP_WIDTH:-22}s %s s" total "$(seconds_since "$t_all")")")
  say "timings ($_finish_header):"
  printf '  %s\n' "${timings[@]}" >&2
  if ${passed:-false} && ((rc == 0)); then
    ${keep_work:-true} || rm -rf "$work"
    say "$_finish_name OK"
  else
    say "$_finish_name FAILED (outputs and logs kept in $work)"
    ((rc != 0)) || rc=1
  fi
  exit "$rc"
}
