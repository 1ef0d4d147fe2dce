#!/usr/bin/env bash
# run_toy_on_slurm.sh - the toy study through SLURM, end to end, in CI:
#   1. start a one-node SLURM on loopback (local_slurm.sh; installs it if needed)
#   2. write the toy study (`python -m glmsteps.cli toy-study`) and its config
#      (config/config.yaml with inputs.root set)
#   3. run the workflow locally:        snakemake --cores 2              (LOCAL)
#   4. run the same through SLURM:      snakemake --profile config/slurm (WORK/slurm)
#      with the same config file
#   Steps 2-3 reuse the toy study and local run that pytest keeps when
#   GLMSTEPS_KEEP_TOY_RUN=DIR is set (DIR/data, DIR/local with its config.yaml):
#   step 3 then only lets Snakemake confirm that nothing is left to do there.
#   5. compare: every *.nii.gz byte-identical (sha256) and index.tsv identical
#      in its params_hash and lineage_hash columns; the SLURM job completion
#      file (sacct -c) and squeue list the submitted jobs as COMPLETED
#   6. failure case: a copy of the study (2 subjects, no group models) with
#      ONE subject's BOLD corrupted, through SLURM with --keep-going:
#      snakemake fails, the fit job's log holds the one-line user-facing
#      DataError naming the file, the other subjects' combined maps exist
#   7. stop the cluster (trap on EXIT: also after a failure or Ctrl-C)
# and print how long each stage took. Exit status 0 only if every check passed
# ("TOY ON SLURM OK").
#
# Run as root on Debian 12:  bash tests/cluster/run_toy_on_slurm.sh
# Knobs (environment):
#   GS_PYTHON            python with snakemake 9, snakemake-executor-plugin-slurm
#                        and glmsteps' dependencies (default: $VIRTUAL_ENV/bin/python,
#                        else /work/venv/bin/python, else python3)
#   GS_SLURM_ACCOUNTING  none (default) | slurmdbd, passed to local_slurm.sh
#   GS_TOY_DIR           working folder (default: a new temporary folder,
#                        deleted after a successful run, kept after a failure)
#   GS_TOY_LOCAL_RUN     folder of a toy study (data/) and its local run (local/,
#                        with local/config.yaml) to reuse for steps 2-3
#                        (default: $GLMSTEPS_KEEP_TOY_RUN, the folder pytest keeps);
#                        ignored unless both exist; never deleted
#   GS_TOY_STAGES        which parts to run: "compare failure" (default);
#                        "compare" = steps 3-5, "failure" = step 6
#   GS_TOY_CORRUPTION    how the BOLD of the failure case is corrupted:
#                        truncate (default): the .nii.gz cut to its first 1000
#                          bytes (header readable, compressed stream cut off);
#                        short-data: a well-formed .nii.gz whose image data
#                          stops after 1000 bytes (header still says 120 volumes)
set -euo pipefail

here=$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)
repo=$(cd "$here/../.." && pwd)
export GS_SLURM_ACCOUNTING=${GS_SLURM_ACCOUNTING:-none}
stages=${GS_TOY_STAGES:-compare failure}
kept=${GS_TOY_LOCAL_RUN:-${GLMSTEPS_KEEP_TOY_RUN:-}}
corruption=${GS_TOY_CORRUPTION:-truncate}

# shellcheck source=tests/cluster/lib.sh
source "$here/lib.sh"
choose_python

say() { printf '[toy_slurm] %s\n' "$*" >&2; }
wants() { [[ " $stages " == *" $1 "* ]]; }

[[ $corruption == truncate || $corruption == short-data ]] || {
  say "FAILED: GS_TOY_CORRUPTION is '$corruption'; expected truncate or short-data"
  exit 1
}
wants compare || wants failure || {
  say "FAILED: GS_TOY_STAGES is '$stages'; expected 'compare', 'failure' or both"
  exit 1
}
require_imports snakemake snakemake_executor_plugin_slurm yaml

use_work_dir "${GS_TOY_DIR:-}" glmsteps-toy-slurm

# the local cluster's single node: its cpus (slurm.conf CPUs=$(nproc)) cap the
# cpus one bundle of grouped jobs asks for; the local run uses as many cores
cpus=$(nproc)

LAP_WIDTH=34
t0=$(now)
t_all=$t0

passed=false
smk_pid=""
finish_on_exit "TOY ON SLURM" "accounting: $GS_SLURM_ACCOUNTING, $cpus cpus, stages: $stages"

# run_snakemake <log> <args...>: snakemake in the background, waited for, so
# that INT/TERM reach the trap at once; returns snakemake's exit status
run_snakemake() {
  local log=$1 rc=0
  shift
  say "running: snakemake $*"
  (cd "$repo" && exec "$python" -m snakemake --snakefile "$repo/Snakefile" "$@") >"$log" 2>&1 &
  smk_pid=$!
  wait "$smk_pid" || rc=$?
  smk_pid=""
  return "$rc"
}

# write_config <dest> <data root> [subject...]: config/config.yaml with
# inputs.root set; with subjects, only those are analysed, without group models
# and without run-level maps (the subject maps come straight from the run fits)
write_config() {
  "$python" - "$repo/config/config.yaml" "$@" <<'PY'
import sys

import yaml

source, dest, root = sys.argv[1:4]
with open(source, encoding="utf-8") as f:
    config = yaml.safe_load(f)
config["inputs"]["root"] = root
if sys.argv[4:]:
    config["inputs"]["subjects"] = sys.argv[4:]
    config["group_models"] = {}
    config.setdefault("contrast_options", {})["run_maps"] = False
with open(dest, "w", encoding="utf-8") as f:
    yaml.safe_dump(config, f, sort_keys=False)
PY
}

slurm_flags=(--profile "$repo/config/slurm" --cores "$cpus")
if [[ $GS_SLURM_ACCOUNTING == none ]]; then
  # no accounting database: sacct cannot answer the plugin's status queries
  slurm_flags+=(--slurm-status-command squeue)
  sacct_cmd=(sacct -c)  # reads the job completion file (JobCompType=jobcomp/filetxt)
else
  sacct_cmd=(sacct -X)
fi

# slurm_states <snakemake log> <out file>: "jobid|squeue state|sacct state" of
# every SLURM job the log says was submitted
slurm_states() {
  local ids ids_csv
  ids=$(sed -n 's/.*has been submitted with SLURM jobid \([0-9]*\).*/\1/p' "$1" | sort -un)
  if [[ -z $ids ]]; then
    : >"$2"
    return
  fi
  ids_csv=$(paste -sd, <<<"$ids")
  # finished jobs stay in squeue for MinJobAge (300 s); older ones only in sacct
  squeue -h -t all -j "$ids_csv" -o '%i|%T' >"$2.squeue" 2>/dev/null || true
  "${sacct_cmd[@]}" -n -P -j "$ids_csv" -o JobID,State >"$2.sacct" 2>/dev/null || true
  awk -F'|' 'FILENAME == ARGV[1] { sq[$1] = $2; next }
             FILENAME == ARGV[2] { sa[$1] = $2; next }
             { print $1 "|" ($1 in sq ? sq[$1] : "-") "|" ($1 in sa ? sa[$1] : "-") }' \
    "$2.squeue" "$2.sacct" <(printf '%s\n' "$ids") >"$2"
}

# ---------------------------------------------------------------- 1. cluster
say "working folder: $work"
say "starting the cluster (accounting: $GS_SLURM_ACCOUNTING)"
bash "$here/local_slurm.sh" 2>&1 | tee "$work/local_slurm.log" >&2
install_s=$(sed -n 's/^\[local_slurm\] install: \([0-9]*\) s$/\1/p' "$work/local_slurm.log")
lap "start cluster"
timings[-1]+=" (of which package install ${install_s:-?} s)"

# ---------------------------------------------------------------- 2. toy study
if [[ -n $kept && -d $kept/data && -f $kept/local/config.yaml ]]; then
  # physical paths: the failure case copies the data, never through a link
  toy=$(cd "$kept/data" && pwd -P)
  local_dir=$(cd "$kept/local" && pwd -P)
  config=$local_dir/config.yaml
  say "reusing the toy study $toy and the local run in $local_dir (kept by pytest)"
  lap "toy study (kept by pytest)"
else
  toy=$work/toy
  config=$work/config.yaml
  local_dir=$work/local
  (cd "$repo" && exec "$python" -m glmsteps.cli toy-study "$toy") >"$work/toy_study.log" 2>&1 \
    || { say "FAILED: toy-study; see $work/toy_study.log"; tail -n 20 "$work/toy_study.log" >&2; exit 1; }
  write_config "$config" "$toy"
  lap "write toy study"
fi

if wants compare; then
  # -------------------------------------------------------------- 3. local run
  # (in a kept run, Snakemake finds nothing to do unless the code changed since)
  # the SLURM run always starts from nothing (a GS_TOY_DIR may hold an old one)
  rm -rf "$work/slurm"
  mkdir -p "$local_dir" "$work/slurm"
  if ! run_snakemake "$work/local.log" --directory "$local_dir" --configfile "$config" --cores 2; then
    say "FAILED: the local run; last lines of $work/local.log:"
    tail -n 40 "$work/local.log" >&2
    exit 1
  fi
  n_local=$(grep -c '^Finished jobid' "$work/local.log" || true)
  lap "local run (--cores 2, $n_local jobs run)"

  # -------------------------------------------------------------- 4. SLURM run
  if ! run_snakemake "$work/slurm.log" --directory "$work/slurm" --configfile "$config" \
      "${slurm_flags[@]}"; then
    say "FAILED: the SLURM run; last lines of $work/slurm.log:"
    tail -n 40 "$work/slurm.log" >&2
    find "$work/slurm/.snakemake/slurm_logs" -name '*.log' -exec tail -n 20 {} + >&2 2>/dev/null || true
    exit 1
  fi
  lap "SLURM run (profile)"

  # -------------------------------------------------------------- 5. compare
  slurm_states "$work/slurm.log" "$work/slurm_states.txt"
  "$python" - "$local_dir/results" "$work/slurm/results" "$work/slurm_states.txt" "$config" <<'PY'
"""Local and SLURM results identical; every SLURM job COMPLETED; one cluster job per
subject and per group model. Exit 1 on any problem."""
import csv
import hashlib
import sys
from pathlib import Path

import yaml

local, slurm, states_file, config_file = (Path(a) for a in sys.argv[1:5])
problems = []


def say(message):
    print(f"[toy_slurm] {message}", file=sys.stderr)


def digests(root):
    out = {}
    for path in sorted(root.rglob("*.nii.gz")):
        with open(path, "rb") as f:
            out[path.relative_to(root).as_posix()] = hashlib.file_digest(f, "sha256").hexdigest()
    return out


a, b = digests(local), digests(slurm)
only_a, only_b = sorted(a.keys() - b.keys()), sorted(b.keys() - a.keys())
differ = sorted(k for k in a.keys() & b.keys() if a[k] != b[k])
same = len(a.keys() & b.keys()) - len(differ)
say(f"maps: {len(a)} local, {len(b)} SLURM, {same} byte-identical, {len(differ)} differ, "
    f"{len(only_a)} only local, {len(only_b)} only SLURM")
if not a:
    problems.append(f"no *.nii.gz under {local}")
for kind, names in (("differ between the runs", differ), ("only in the local run", only_a),
                    ("only in the SLURM run", only_b)):
    if names:
        problems.append(f"{len(names)} map(s) {kind}, e.g. {', '.join(names[:3])}")


def index(root):
    path = root / "index.tsv"
    if not path.is_file():
        problems.append(f"missing {path}")
        return {}
    with open(path, encoding="utf-8", newline="") as f:
        return {row["path"]: (row["params_hash"], row["lineage_hash"]) for row in csv.DictReader(f, delimiter="\t")}


ia, ib = index(local), index(slurm)
hash_differ = sorted(k for k in ia.keys() & ib.keys() if ia[k] != ib[k])
say(f"index.tsv: {len(ia)} rows local, {len(ib)} SLURM, {len(hash_differ)} with other params/lineage hashes")
if ia.keys() != ib.keys():
    problems.append(f"index.tsv lists other maps: {len(ia.keys() - ib.keys())} only local, "
                    f"{len(ib.keys() - ia.keys())} only SLURM")
if hash_differ:
    problems.append(f"index.tsv: {len(hash_differ)} row(s) with other params/lineage hashes, e.g. {hash_differ[0]}")

rows = [line.split("|") for line in states_file.read_text().splitlines() if line]
say(f"SLURM jobs submitted: {len(rows)}; in squeue: {sum(r[1] != '-' for r in rows)}; "
    f"in sacct: {sum(r[2] != '-' for r in rows)}")
if not rows:
    problems.append("no 'submitted with SLURM jobid' line in the SLURM run's log")
for job, in_squeue, in_sacct in rows:
    if in_sacct != "COMPLETED" or in_squeue not in ("-", "COMPLETED"):
        problems.append(f"SLURM job {job}: squeue {in_squeue}, sacct {in_sacct}; expected COMPLETED")
# the profile's groups: one bundle per subject, one per group model, index on the submitting machine
config = yaml.safe_load(config_file.read_text(encoding="utf-8"))
n_subjects = len({p.name for p in local.glob("sub-*") if p.is_dir()})
expected = n_subjects + len(config.get("group_models") or {})
if len(rows) != expected:
    problems.append(f"{len(rows)} SLURM jobs; expected {expected} ({n_subjects} subject bundles + "
                    f"{expected - n_subjects} group-model bundles)")

for p in problems:
    say(f"check failed: {p}")
say(f"{len(problems)} check(s) failed" if problems else
    "checks: every map byte-identical, index hashes identical, every SLURM job COMPLETED")
sys.exit(1 if problems else 0)
PY
  lap "compare"
fi

if wants failure; then
  # -------------------------------------------------------------- 6. failure case
  # two subjects, the second one's first run corrupt
  failure_subjects=(01 02)
  bad_subject=${failure_subjects[-1]}
  broken=$work/toy_broken
  rm -rf "$broken"
  mkdir -p "$broken"
  cp -a "$toy/." "$broken/"
  bad_rel=sub-$bad_subject/func/sub-${bad_subject}_task-beacon_run-1_space-toy_desc-preproc_bold.nii.gz
  bad=$broken/$bad_rel
  "$python" - "$bad" "$corruption" <<'PY'
"""Corrupt one BOLD file in place (the copy of the study)."""
import gzip
import sys

path, how = sys.argv[1:3]
if how == "truncate":
    # the compressed stream cut off, as by an interrupted copy; the NIfTI
    # header (first 352 bytes once decompressed) is still readable
    with open(path, "rb") as f:
        head = f.read(1000)
    with open(path, "wb") as f:
        f.write(head)
else:  # short-data: valid gzip, header intact, image data cut after 1000 bytes
    with gzip.open(path, "rb") as f:
        head = f.read(352 + 1000)
    with gzip.GzipFile(path, "wb", mtime=0) as f:
        f.write(head)
PY
  write_config "$work/config_broken.yaml" "$broken" "${failure_subjects[@]}"
  rm -rf "$work/slurm_broken"
  mkdir -p "$work/slurm_broken"
  failure_rc=0
  run_snakemake "$work/slurm_broken.log" --directory "$work/slurm_broken" \
    --configfile "$work/config_broken.yaml" "${slurm_flags[@]}" --keep-going || failure_rc=$?
  lap "SLURM run, 1 of ${#failure_subjects[@]} subjects corrupt"
  slurm_states "$work/slurm_broken.log" "$work/slurm_broken_states.txt"
  "$python" - "$work/slurm_broken" "$bad" "$bad_subject" "$failure_rc" \
      "$work/slurm_broken_states.txt" "$work/slurm_broken.log" "${failure_subjects[@]}" <<'PY'
"""The corrupt subject failed with a one-line DataError in its fit log; the others finished."""
import re
import sys
from pathlib import Path

work, bad = Path(sys.argv[1]), sys.argv[2]
bad_subject, rc, states_file, smk_log = sys.argv[3], int(sys.argv[4]), Path(sys.argv[5]), Path(sys.argv[6])
subjects = sys.argv[7:]
results = work / "results"
problems = []


def say(message):
    print(f"[toy_slurm] {message}", file=sys.stderr)


if rc == 0:
    problems.append("snakemake exited 0 although a BOLD file is corrupt")

fit_log = results / "logs" / f"sub-{bad_subject}" / "task-beacon_run-1" / "fit.log"
if not fit_log.is_file():
    problems.append(f"missing {fit_log}")
else:
    text = fit_log.read_text(encoding="utf-8", errors="replace")
    errors = [line for line in text.splitlines() if re.search(r"\bDataError: ", line)]
    if not errors:
        last = text.strip().splitlines()[-1:] or ["(empty)"]
        problems.append(f"{fit_log} has no 'DataError: ' line; its last line: {last[0][:300]}")
    elif not any(bad in line or Path(bad).name in line for line in errors):
        problems.append(f"{fit_log}: the DataError does not name {bad}: {errors[0][:300]}")
    else:
        say(f"fit log: {errors[0][:300]}")
    if "Traceback" in text:
        problems.append(f"{fit_log} holds a Python traceback; expected only the one-line user-facing error")

others = [s for s in subjects if s != bad_subject]
for s in others:
    combined = sorted((results / f"sub-{s}" / "combined").glob("contrast-*/z.nii.gz"))
    # the toy config has four t contrasts and one F contrast, each combined over the two runs
    # (t: fixed effects; F: the fixed-effects Wald F)
    if len(combined) != 5:
        problems.append(f"sub-{s}: {len(combined)} combined z maps; expected 5 (one per contrast)")
    else:
        say(f"sub-{s}: 5 combined z maps present")
bad_combined = sorted((results / f"sub-{bad_subject}" / "combined").glob("contrast-*/z.nii.gz"))
if bad_combined:
    problems.append(f"sub-{bad_subject} has combined maps although its run-1 BOLD is corrupt")

rows = [line.split("|") for line in states_file.read_text().splitlines() if line]
final = [r[2] if r[2] != "-" else r[1] for r in rows]
say(f"SLURM jobs submitted: {len(rows)}; states: " +
    ", ".join(f"{s} {final.count(s)}" for s in sorted(set(final))))
if "FAILED" not in final:
    problems.append("no SLURM job is FAILED in squeue/sacct")
if "COMPLETED" not in final:
    problems.append("no SLURM job COMPLETED in squeue/sacct")
log_text = smk_log.read_text(encoding="utf-8", errors="replace")
# the end-of-run summary names the failed job's log and its one-line error (Snakemake's own
# "Error in rule" lines are hidden by the quiet default profile)
failed = [line for line in log_text.splitlines() if line.startswith("  failed: ") and "/fit.log: DataError: " in line]
if not failed:
    problems.append(f"{smk_log} does not name the failed fit job ('  failed: .../fit.log: DataError: ...')")
else:
    say(f"summary: {failed[0][:300]}")

for p in problems:
    say(f"check failed: {p}")
say(f"{len(problems)} check(s) failed" if problems else
    "checks: snakemake failed, fit log names the corrupt file in a one-line DataError, "
    "the other subjects' combined maps exist, squeue/sacct show the FAILED and COMPLETED jobs")
sys.exit(1 if problems else 0)
PY
  lap "failure checks"
fi
passed=true
