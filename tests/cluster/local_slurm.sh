# shellcheck shell=bash
# A throwaway single-node Slurm cluster on localhost, for tests only.
# Sourced by run_slurm_test.sh; needs root (it writes /etc/slurm/slurm.conf
# and starts daemons). Every daemon started here is remembered by PID and
# stopped by stop_local_slurm, nothing else is touched.
#
#   source tests/cluster/local_slurm.sh
#   install_slurm_packages; start_local_slurm "$STATE_DIR"; ...; stop_local_slurm

SLURM_CONF=/etc/slurm/slurm.conf   # Debian's slurm-wlm 22.05 reads it only here (measured)
SLURM_CONF_MARKER="# written by foldwise tests/cluster/local_slurm.sh"
MUNGE_SOCKET_DIR=/run/munge
STARTED_PIDS=()                    # pids of the daemons this shell started

log_step() { printf '[cluster-test %(%H:%M:%S)T] %s\n' -1 "$*"; }

fail() {
    printf '[cluster-test] FAILED: %s\n' "$*" >&2
    exit 1
}

install_slurm_packages() {
    local missing=()
    command -v slurmctld >/dev/null 2>&1 || missing+=(slurm-wlm)
    command -v munged >/dev/null 2>&1 || missing+=(munge)
    if [ "${#missing[@]}" -eq 0 ]; then
        log_step "slurm-wlm and munge already installed"
        return
    fi
    log_step "installing ${missing[*]} from Debian"
    apt-get update -qq || fail "apt-get update failed; is the Debian mirror reachable?"
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "${missing[@]}" >/dev/null \
        || fail "apt-get install ${missing[*]} failed"
}

machine_memory_mb() {
    # slurmd's own measurement, so the configured RealMemory never exceeds
    # what slurmd detects (a node claiming more memory is refused).
    local detected
    detected=$(slurmd -C 2>/dev/null | grep -o 'RealMemory=[0-9]*' | cut -d= -f2)
    [ -n "$detected" ] || detected=$(( $(awk '/MemTotal/ {print $2}' /proc/meminfo) / 1024 ))
    echo "$detected"
}

refuse_foreign_slurm_conf() {
    if [ -f "$SLURM_CONF" ] && ! grep -qF "$SLURM_CONF_MARKER" "$SLURM_CONF"; then
        fail "$SLURM_CONF exists and was not written by this test; refusing to overwrite a real cluster's config. Run the test on a throwaway machine (CI) or move the file away."
    fi
}

write_slurm_conf() {
    local state_dir=$1 cpus=$2 memory_mb=$3
    refuse_foreign_slurm_conf
    mkdir -p /etc/slurm
    cat >"$SLURM_CONF" <<EOF
$SLURM_CONF_MARKER
# A single test node on localhost; each setting's reason is beside it.
ClusterName=foldwisetest
# Controller and compute node are this machine.
SlurmctldHost=localhost
# The daemons run as the (root) test user: no slurm-owned state dirs needed.
SlurmUser=root
# Debian's default authentication; munged is started by the test.
AuthType=auth/munge
# State, spool, pid and log files live in the test's temp folder, so every run starts clean.
StateSaveLocation=$state_dir/slurmctld
SlurmdSpoolDir=$state_dir/slurmd
SlurmctldPidFile=$state_dir/slurmctld.pid
SlurmdPidFile=$state_dir/slurmd.pid
SlurmctldLogFile=$state_dir/slurmctld.log
SlurmdLogFile=$state_dir/slurmd.log
# No cgroup setup on a test VM/container: track job processes by parent pid.
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
# No accounting database (no slurmdbd): sacct has nothing to ask, so the
# executor plugin must query job states with squeue.
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
# One line per finished job (state, start, end) in a plain file: the test's
# record of what Slurm ran, with no database.
JobCompType=jobcomp/filetxt
JobCompLoc=$state_dir/jobs_completed.txt
# Finished jobs stay visible to squeue for 300 s; the plugin's squeue status
# needs them to outlive its check interval (it falls back to sacct when
# MinJobAge < 3 x the initial status interval).
MinJobAge=300
# Schedule cores and memory as consumables, so 1-thread jobs share the node.
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
# A node that registers with a valid config is put back into service.
ReturnToService=2
MpiDefault=none
# CPUs and RealMemory (MB) are the machine's own (slurmd -C).
NodeName=localhost NodeAddr=127.0.0.1 CPUs=$cpus RealMemory=$memory_mb State=UNKNOWN
PartitionName=test Nodes=localhost Default=YES MaxTime=INFINITE State=UP
EOF
}

ensure_munge_key() {
    if [ ! -s /etc/munge/munge.key ]; then
        log_step "creating a munge key"
        mkdir -p /etc/munge
        dd if=/dev/urandom of=/etc/munge/munge.key bs=1024 count=1 status=none
    fi
    chown munge:munge /etc/munge /etc/munge/munge.key
    chmod 0700 /etc/munge
    chmod 0400 /etc/munge/munge.key
}

remember_pid() { STARTED_PIDS+=("$1"); }

start_munged() {
    local state_dir=$1
    mkdir -p "$MUNGE_SOCKET_DIR" /var/lib/munge /var/log/munge
    chown munge:munge "$MUNGE_SOCKET_DIR" /var/lib/munge /var/log/munge
    chmod 0755 "$MUNGE_SOCKET_DIR"
    if munge -n </dev/null >/dev/null 2>&1; then
        fail "a munged is already running on $MUNGE_SOCKET_DIR; this test starts its own daemons on a clean machine"
    fi
    # setpriv execs munged directly, so \$! is munged's own pid.
    setpriv --reuid=munge --regid=munge --init-groups munged --foreground >"$state_dir/munged.out" 2>&1 &
    remember_pid $!
    wait_until "munged answers" 20 munge_answers
}

munge_answers() { munge -n </dev/null 2>/dev/null | unmunge >/dev/null 2>&1; }

start_slurm_daemons() {
    local state_dir=$1
    mkdir -p "$state_dir/slurmctld" "$state_dir/slurmd"
    if pgrep -x slurmctld >/dev/null || pgrep -x slurmd >/dev/null; then
        fail "slurmctld or slurmd is already running; this test starts its own daemons on a clean machine"
    fi
    slurmctld -D -i >"$state_dir/slurmctld.out" 2>&1 &
    remember_pid $!
    # -N: the node's name in slurm.conf, whatever this machine's hostname is.
    slurmd -D -N localhost >"$state_dir/slurmd.out" 2>&1 &
    remember_pid $!
}

node_is_idle() { sinfo --noheader --nodes=localhost --format=%T 2>/dev/null | grep -qx idle; }

wait_until() {
    local what=$1 timeout_s=$2 check=$3 waited_s=0
    until "$check"; do
        [ "$waited_s" -ge "$timeout_s" ] && return 1
        sleep 1
        waited_s=$((waited_s + 1))
    done
    log_step "$what (after ${waited_s} s)"
}

start_local_slurm() {
    local state_dir=$1
    local cpus memory_mb
    cpus=$(nproc)
    memory_mb=$(machine_memory_mb)
    mkdir -p "$state_dir"
    log_step "writing $SLURM_CONF: 1 node, CPUs=$cpus, RealMemory=${memory_mb} MB, state in $state_dir"
    write_slurm_conf "$state_dir" "$cpus" "$memory_mb"
    ensure_munge_key
    start_munged "$state_dir" || fail "munged did not answer within 20 s"
    start_slurm_daemons "$state_dir"
    if ! wait_until "node localhost is idle" 60 node_is_idle; then
        sinfo --long --Node >&2 || true
        tail -n 30 "$state_dir"/slurmctld.log "$state_dir"/slurmd.log >&2 || true
        fail "the Slurm node did not become idle within 60 s (logs above)"
    fi
}

stop_local_slurm() {
    local pid
    # Jobs left by a failed run would outlive slurmd; the cluster is ours alone.
    [ "${#STARTED_PIDS[@]}" -gt 0 ] && scancel --quiet --user="$(id -un)" 2>/dev/null || true
    # Newest first: slurmd, slurmctld, then munged they authenticate with.
    for ((i = ${#STARTED_PIDS[@]} - 1; i >= 0; i--)); do
        pid=${STARTED_PIDS[i]}
        kill -TERM "$pid" 2>/dev/null && wait "$pid" 2>/dev/null
    done
    STARTED_PIDS=()
    remove_own_slurm_conf
}

remove_own_slurm_conf() {
    # The slurm executor plugin runs `scontrol show config` whenever snakemake
    # starts; with a slurm.conf naming a stopped controller, scontrol retries
    # for about 10 s (measured), so every later snakemake run would wait that long.
    if [ -f "$SLURM_CONF" ] && grep -qF "$SLURM_CONF_MARKER" "$SLURM_CONF"; then
        rm -f "$SLURM_CONF"
    fi
}
