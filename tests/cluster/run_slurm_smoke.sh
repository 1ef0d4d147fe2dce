#!/usr/bin/env bash
# run_slurm_smoke.sh - prove that the cluster profile works end to end:
#   1. start a one-node SLURM on loopback (local_slurm.sh; installs it if needed)
#   2. run tests/cluster/smoke/Snakefile through Snakemake's SLURM executor
#      with the profile config/slurm
#   3. check the outputs, that the two grouped jobs ran as ONE cluster job,
#      and that squeue and sacct list every submitted job as COMPLETED
#   4. stop the cluster (trap on EXIT: also after a failure or Ctrl-C)
# and print how long each stage took. Exit status 0 only if every check passed.
#
# Run as root on Debian 12:  bash tests/cluster/run_slurm_smoke.sh
# Knobs (environment):
#   GS_PYTHON            python with snakemake 9 and snakemake-executor-plugin-slurm
#                        (default: $VIRTUAL_ENV/bin/python, else /work/venv/bin/python,
#                        else python3)
#   GS_SLURM_ACCOUNTING  none (default) | slurmdbd, passed to local_slurm.sh
#   GS_SMOKE_DIR         working directory for the smoke outputs (default: a new
#                        temporary directory, deleted after a successful run)
set -euo pipefail

here=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)
repo=$(cd "$here/../.." && pwd)
export GS_SLURM_ACCOUNTING=${GS_SLURM_ACCOUNTING:-none}

# shellcheck source=tests/cluster/lib.sh
source "$here/lib.sh"
choose_python

say() { printf '[slurm_smoke] %s\n' "$*" >&2; }

require_imports snakemake snakemake_executor_plugin_slurm

use_work_dir "${GS_SMOKE_DIR:-}" glmsteps-slurm-smoke
# in a given folder, outputs of an earlier run would leave Snakemake nothing to
# submit, and the lock of an interrupted one would stop it
$keep_work && rm -rf "$work/sub-01" "$work/.snakemake"

t0=$(now)
t_all=$t0

passed=false
smk_pid=""
finish_on_exit "SMOKE" "accounting: $GS_SLURM_ACCOUNTING"

# ---------------------------------------------------------------- 1. cluster
say "starting the cluster (accounting: $GS_SLURM_ACCOUNTING)"
bash "$here/local_slurm.sh" 2>&1 | tee "$work/local_slurm.log" >&2
# keep local_slurm.sh's own split of install time and daemon start time
install_s=$(sed -n 's/^\[local_slurm\] install: \([0-9]*\) s$/\1/p' "$work/local_slurm.log")
lap "start cluster"
timings[-1]+=" (of which package install ${install_s:-?} s)"

# ---------------------------------------------------------------- 2. smoke run
flags=(--profile "$repo/config/slurm")
if [[ $GS_SLURM_ACCOUNTING == none ]]; then
  # no accounting database: sacct cannot answer the plugin's status queries
  flags+=(--slurm-status-command squeue)
fi
cmd=("$python" -m snakemake -s "$here/smoke/Snakefile" --directory "$work" "${flags[@]}")
say "running: ${cmd[*]}"
# in the background and waited for, so that INT/TERM reach the trap at once
(cd "$repo" && exec "${cmd[@]}") >"$work/snakemake.log" 2>&1 &
smk_pid=$!
if ! wait "$smk_pid"; then
  smk_pid=""
  say "snakemake failed; last lines of $work/snakemake.log:"
  tail -n 40 "$work/snakemake.log" >&2
  find "$work/.snakemake/slurm_logs" -name '*.log' -exec tail -n 20 {} + >&2 2>/dev/null || true
  exit 1
fi
smk_pid=""
lap "snakemake smoke run"

# ---------------------------------------------------------------- 3. checks
# SLURM job ids, in submission order, from the plugin's log lines
mapfile -t job_ids < <(sed -n 's/.*has been submitted with SLURM jobid \([0-9]*\).*/\1/p' "$work/snakemake.log")
say "submitted SLURM jobs: ${job_ids[*]:-none}"
if ((${#job_ids[@]} == 0)); then
  say "check failed: no 'submitted with SLURM jobid' line in $work/snakemake.log"
  exit 1
fi
ids_csv=$(IFS=,; echo "${job_ids[*]}")

say "squeue -t all -j $ids_csv:"
squeue_out=$(squeue -h -t all -j "$ids_csv" -o '%i|%T|%k')
sed 's/^/  /' <<<"$squeue_out" >&2
if [[ $GS_SLURM_ACCOUNTING == slurmdbd ]]; then
  sacct_cmd=(sacct -X -n -P -j "$ids_csv" -o "JobID,State")
else
  # without slurmdbd, sacct reads the job completion file (JobCompType=jobcomp/filetxt)
  sacct_cmd=(sacct -c -n -P -j "$ids_csv" -o "JobID,State")
fi
say "${sacct_cmd[*]}:"
sacct_out=$("${sacct_cmd[@]}")
sed 's/^/  /' <<<"$sacct_out" >&2

GS_SQUEUE="$squeue_out" GS_SACCT="$sacct_out" GS_JOB_IDS="${job_ids[*]:-}" \
  "$python" - "$work" <<'PY'
"""Checks of the smoke run; one line per failed check, exit 1 if any failed."""
import json
import os
import sys
from pathlib import Path

work = Path(sys.argv[1])
problems = []


def load(name):
    path = work / "sub-01" / name
    if not path.is_file():
        problems.append(f"missing output {path}")
        return {}
    return json.loads(path.read_text(encoding="utf-8"))


runs = [load("run-1.json"), load("run-2.json")]
total = load("total.json")
if runs[0] and runs[1] and total:
    # 1**2 + 2**2, computed by two jobs and summed by a third
    if total.get("total") != 5:
        problems.append(f"total.json has total={total.get('total')}; expected 5")
    run_ids = {r.get("slurm_job_id") for r in runs}
    if "" in run_ids or None in run_ids:
        problems.append("a square job ran outside SLURM (no SLURM_JOB_ID)")
    elif len(run_ids) != 1:
        problems.append(f"the grouped square jobs ran in SLURM jobs {sorted(run_ids)}; expected one")
    if not total.get("slurm_job_id") or total["slurm_job_id"] in run_ids:
        problems.append(f"total ran in SLURM job {total.get('slurm_job_id')!r}; expected its own job")
    expected = sorted(run_ids | {total.get("slurm_job_id")})
else:
    expected = []

submitted = sorted(os.environ["GS_JOB_IDS"].split())
if submitted != expected:
    problems.append(f"snakemake submitted SLURM jobs {submitted}; outputs name {expected}")


def states(text):
    return {line.split("|")[0]: line.split("|")[1] for line in text.splitlines() if "|" in line}


for tool, text in (("squeue", os.environ["GS_SQUEUE"]), ("sacct", os.environ["GS_SACCT"])):
    seen = states(text)
    for job in submitted:
        if seen.get(job) != "COMPLETED":
            problems.append(f"{tool} shows job {job} as {seen.get(job, 'absent')}; expected COMPLETED")

for p in problems:
    print(f"[slurm_smoke] check failed: {p}", file=sys.stderr)
print(f"[slurm_smoke] {len(problems)} check(s) failed" if problems else
      "[slurm_smoke] checks: outputs right, 2 square jobs in 1 SLURM job, "
      "squeue and sacct show every job COMPLETED", file=sys.stderr)
sys.exit(1 if problems else 0)
PY
lap "checks"
passed=true
