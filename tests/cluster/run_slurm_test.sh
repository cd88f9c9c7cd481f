#!/usr/bin/env bash
# End-to-end test on a real Slurm cluster: a one-node cluster on localhost
# (Debian's slurm-wlm + munge, no accounting database) runs a small demo study
# through `snakemake --profile config/profiles/slurm`; the same study then runs
# locally, and the two results/manifest.tsv must be byte-identical.
#
#   sudo bash tests/cluster/run_slurm_test.sh        # root: it installs packages,
#                                                    # writes /etc/slurm/slurm.conf
#                                                    # and starts munged, slurmctld, slurmd
#
# It refuses to run where a slurm.conf it did not write exists, or where the
# daemons already run. The daemons it starts are stopped by PID on exit.
# Exit status: 0 when the manifests match, non-zero on any failure.
# FOLDWISE_KEEP_WORK=1 keeps the temp folder for inspection.
# FOLDWISE_CLUSTER_GROUPING=per_subject submits each subject's jobs as one
# Slurm job (Snakemake job grouping); the default, none, submits every job.
set -euo pipefail

REPO=$(cd "$(dirname "${BASH_SOURCE[0]}")/../.." && pwd)
# shellcheck source=tests/cluster/local_slurm.sh
source "$REPO/tests/cluster/local_slurm.sh"

WORKFLOW_TIMEOUT_S=1200        # per run; the measured slurm run takes a few minutes
STATUS_INTERVAL_S=2            # fast status checks: the test cluster answers in milliseconds
GROUPING=${FOLDWISE_CLUSTER_GROUPING:-none}
TEST_STARTED_S=$SECONDS
WORK=$(mktemp -d /tmp/foldwise-cluster-test.XXXXXX)

finish() {
    local status=$?
    stop_local_slurm
    if [ "$status" -eq 0 ] && [ "${FOLDWISE_KEEP_WORK:-0}" != 1 ]; then
        rm -rf "$WORK"
    else
        echo "[cluster-test] work folder kept: $WORK" >&2
    fi
    local verdict=PASSED
    [ "$status" -eq 0 ] || verdict="FAILED (exit $status)"
    log_step "$verdict; elapsed $((SECONDS - TEST_STARTED_S)) s"
    exit "$status"
}
trap finish EXIT
trap 'exit 130' INT TERM

require_root() {
    [ "$(id -u)" -eq 0 ] || fail "run as root: the test installs Debian packages, writes /etc/slurm/slurm.conf and starts daemons"
}

ensure_venv() {
    # The repository's own pinned environment (make env is a no-op when current).
    make -C "$REPO" --no-print-directory env || fail "make env failed: the pinned environment could not be installed"
    SNAKEMAKE="$REPO/.venv/bin/snakemake"
    [ -x "$SNAKEMAKE" ] || fail "$SNAKEMAKE missing after make env"
}

copy_working_tree() {
    # What git sees: tracked files plus untracked ones not ignored (so no
    # .venv, results or .snakemake). A fresh CI clone copies to the same thing.
    local destination=$1
    mkdir -p "$destination"
    (cd "$REPO" && git ls-files -z --cached --others --exclude-standard \
        | tar --null -T - --ignore-failed-read -cf - 2>/dev/null) | tar -xf - -C "$destination" \
        || fail "could not copy the working tree to $destination"
}

write_small_study() {
    # 3 subjects x 2 runs on a 12x12x10 grid, one ROI, one decoding analysis
    # with 10 permutations: every rule runs (24 jobs), with seconds of compute;
    # on Slurm each job also pays two Snakemake start-ups (sbatch, then srun).
    cat >"$1/cluster_test_study.yaml" <<'EOF'
# Written by tests/cluster/run_slurm_test.sh: a small demo study.
study: {name: lantern-cluster-test, seed: 20261201}
dataset: {source: demo, confounds: [trans_x, trans_y, trans_z, rot_x, rot_y, rot_z]}
demo: {n_subjects: 3, n_runs: 2, grid_shape: [12, 12, 10], trials_per_condition_per_run: 3}
rois:
  - {name: ember, labels: [ember_L, ember_R]}
analyses:
  - name: shape
    kind: within
    classes: {round: [seen_round], square: [seen_square], star: [seen_star]}
    voxel_counts: [10, all]
    n_permutations: 10
group: {n_draws: 500}
EOF
}

run_workflow() {
    # run_workflow <copy> <label> <snakemake args...>
    local copy=$1 label=$2
    shift 2
    local started_s=$SECONDS
    log_step "$label run: snakemake $*"
    # The copy's own package, not the editable install of $REPO.
    if ! (cd "$copy" && PYTHONPATH="$copy/workflow" timeout --kill-after=30 "$WORKFLOW_TIMEOUT_S" \
            "$SNAKEMAKE" --config config_file=cluster_test_study.yaml "$@" >"$copy/snakemake.out" 2>&1); then
        tail -n 60 "$copy/snakemake.out" >&2
        fail "$label run failed or exceeded ${WORKFLOW_TIMEOUT_S} s (last lines above; full output $copy/snakemake.out)"
    fi
    log_step "$label run finished in $((SECONDS - started_s)) s"
}

grouping_arguments() {
    # Per-subject rules in one group: their jobs for a subject are connected,
    # so each subject becomes one group job. --cores caps a group's parallel
    # layers at the node's cores (without it, a group asks for the sum of its
    # parallel jobs' threads and can wait forever for a node that large: measured).
    case $GROUPING in
        none) GROUP_ARGS=() ;;
        per_subject)
            GROUP_ARGS=(--groups brain_mask=subject glm=subject roi_mask=subject roi_counts=subject
                        decode=subject decode_gather=subject --cores "$(nproc)") ;;
        *) fail "FOLDWISE_CLUSTER_GROUPING must be none or per_subject, got '$GROUPING'" ;;
    esac
}

check_jobs_ran_on_slurm() {
    # Every job the slurm run submitted must be in Slurm's own record of
    # finished jobs as COMPLETED; a run that quietly executed locally would
    # submit nothing.
    local out=$1 record=$2 submitted summary
    submitted=$(grep -c 'has been submitted with SLURM jobid' "$out" || true)
    [ "$submitted" -gt 0 ] || fail "the slurm run submitted no job to Slurm ($out)"
    summary=$("$REPO/.venv/bin/python" "$REPO/tests/cluster/slurm_job_record.py" "$record" "$submitted") \
        || fail "Slurm's job record disagrees with the run (message above)"
    log_step "$summary"
    # The plugin switches to sacct by itself when MinJobAge looks too short;
    # with no accounting database that run would hang, so insist on squeue.
    if grep -q "Falling back to 'sacct'" "$out"; then
        fail "the executor plugin fell back to sacct for job status ($out); check MinJobAge in $SLURM_CONF"
    fi
}

compare_manifests() {
    local slurm_manifest=$1/results/manifest.tsv local_manifest=$2/results/manifest.tsv rows
    [ -s "$slurm_manifest" ] || fail "the slurm run wrote no manifest at $slurm_manifest"
    [ -s "$local_manifest" ] || fail "the local run wrote no manifest at $local_manifest"
    rows=$(($(wc -l <"$slurm_manifest") - 1))
    # A near-empty manifest would match trivially: demand every stage's outputs.
    for stage in demo_dataset brain_mask glm roi_mask decode decode_gather group; do
        grep -q "	${stage}\[\\|	${stage}\$" "$slurm_manifest" \
            || fail "the slurm manifest lists no output of stage $stage"
    done
    if ! cmp -s "$slurm_manifest" "$local_manifest"; then
        diff "$slurm_manifest" "$local_manifest" | head -n 20 >&2
        fail "results/manifest.tsv differs between the slurm and the local run (first differences above)"
    fi
    log_step "manifests identical: $rows outputs with the same sha256 from slurm and local runs"
}

main() {
    require_root
    ensure_venv
    install_slurm_packages
    start_local_slurm "$WORK/slurm-state"

    # One snapshot for both runs: others may edit the tree while the test runs.
    copy_working_tree "$WORK/snapshot"
    write_small_study "$WORK/snapshot"
    cp -a "$WORK/snapshot" "$WORK/on-slurm"
    cp -a "$WORK/snapshot" "$WORK/on-local"
    grouping_arguments
    run_workflow "$WORK/on-slurm" "slurm (grouping: $GROUPING)" --profile config/profiles/slurm \
        --seconds-between-status-checks "$STATUS_INTERVAL_S" \
        --slurm-init-seconds-before-status-checks "$STATUS_INTERVAL_S" "${GROUP_ARGS[@]}"
    check_jobs_ran_on_slurm "$WORK/on-slurm/snakemake.out" "$WORK/slurm-state/jobs_completed.txt"

    run_workflow "$WORK/on-local" local --profile config/profiles/local --cores 2

    compare_manifests "$WORK/on-slurm" "$WORK/on-local"
}

main "$@"
