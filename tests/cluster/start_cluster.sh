#!/usr/bin/env bash
# start_cluster.sh - bring up a REAL single-node SLURM cluster on this machine
# (Debian/Ubuntu, root, no systemd needed) and wait until its node is idle.
# Used by tests/test_cluster.py; stop it again with tests/cluster/stop_cluster.sh.
#
#   munged -> [mariadbd -> slurmdbd] -> slurmctld -> slurmd
#
# Idempotent: packages already installed are not reinstalled; daemons whose
# pid file names a live process of the right name are not restarted.
# Non-interactive: never reads stdin (apt-get -y, DEBIAN_FRONTEND=noninteractive).
#
# Environment (all optional). None of these start with SLURM_: srun and sbatch
# read SLURM_*/SBATCH_* variables as options (SLURM_PARTITION, ...).
#   HOLDFAST_SLURM_BASE       state/log/pid directory   (default /tmp/holdfast-slurm)
#   HOLDFAST_SLURM_DBD        0 = no accounting database (default): Snakemake must use
#                                 --slurm-status-command squeue (MinJobAge=3600 keeps
#                                 finished jobs visible to squeue for an hour)
#                             1 = slurmdbd + MariaDB, so that `sacct` works (slower to
#                                 install and start)
#   HOLDFAST_SLURM_ACCOUNT    account created in slurmdbd for root (default x; DBD=1 only)
#   HOLDFAST_SLURM_PARTITION  partition name            (default debug)
#   HOLDFAST_SLURM_CPUS       CPUs the node offers (default: nproc, at least 4). More than
#                             the machine has (SlurmdParameters=config_overrides) lets a
#                             small machine run four single-threaded jobs at once, so that
#                             a workflow's short jobs need fewer scheduling rounds.
#   HOLDFAST_SLURM_TIMEOUT    seconds to wait for each daemon (default 120)
#
# Exit status: 0 = cluster up and an srun smoke test passed; 1 = failure (the daemon
# logs are printed); 2 = this machine cannot run it (not root, no apt-get/dpkg, or
# apt-get cannot install the packages, e.g. offline, or a SLURM config of another
# origin is in /etc/slurm). Two callers must not run it at once: tests/test_cluster.py
# holds a lock from start to stop.
set -euo pipefail

BASE=${HOLDFAST_SLURM_BASE:-/tmp/holdfast-slurm}
WITH_DBD=${HOLDFAST_SLURM_DBD:-0}
ACCOUNT=${HOLDFAST_SLURM_ACCOUNT:-x}
PARTITION=${HOLDFAST_SLURM_PARTITION:-debug}
TIMEOUT=${HOLDFAST_SLURM_TIMEOUT:-120}
CLUSTER=localcluster
DB_PASS=slurmdbpass          # local-only test database, bound to 127.0.0.1
export DEBIAN_FRONTEND=noninteractive
export PATH="/usr/local/sbin:/usr/local/bin:/usr/sbin:/usr/bin:/sbin:/bin:${PATH:-}"
# our own srun/scontrol calls must not pick up options from a caller's environment
while IFS= read -r name; do unset "$name"; done < <(compgen -e | grep -E '^(SLURM|SBATCH|SRUN|SQUEUE|SACCT)_' || true)

log() { echo "[start_cluster $(date +%T)] $*"; }
die() { echo "[start_cluster $(date +%T)] ERROR: $*" >&2; exit 1; }
unsupported() { echo "[start_cluster $(date +%T)] UNSUPPORTED: $*" >&2; exit 2; }

[ "$(id -u)" = 0 ] || unsupported "must run as root (uid is $(id -u))"
if ! command -v apt-get >/dev/null || ! command -v dpkg-query >/dev/null; then
    unsupported "needs apt-get and dpkg-query (Debian or Ubuntu)"
fi
T_START=$SECONDS

# ---------------------------------------------------------------- helpers
# alive PIDFILE COMM : pid file names a live (non-zombie) process named COMM
alive() {
    local pid st
    [ -s "$1" ] || return 1
    pid=$(cat "$1" 2>/dev/null) || return 1
    [[ "$pid" =~ ^[0-9]+$ ]] || return 1
    [ "$(cat /proc/"$pid"/comm 2>/dev/null)" = "$2" ] || return 1
    st=$(awk '{print $3}' /proc/"$pid"/stat 2>/dev/null) || return 1
    [ -n "$st" ] && [ "$st" != Z ] && [ "$st" != X ]
}
# wait_for WHAT CMD... : retry CMD (each try capped at 10 s) until $TIMEOUT
wait_for() {
    local what=$1; shift
    local end=$((SECONDS + TIMEOUT))
    while ((SECONDS < end)); do
        if timeout 10 "$@" </dev/null >/dev/null 2>&1; then return 0; fi
        sleep 0.25
    done
    die "timed out after ${TIMEOUT}s waiting for $what (logs in $BASE/log)"
}
# shellcheck disable=SC2329  # invoked by on_exit
dumplogs() {
    for f in "$BASE"/log/*; do
        [ -f "$f" ] || continue
        echo "----- $f (last 20 lines)" >&2; tail -n 20 "$f" >&2
    done
}
created_policy=0
# shellcheck disable=SC2329  # invoked by the trap
on_exit() {
    local rc=$?
    [ "$created_policy" = 1 ] && rm -f /usr/sbin/policy-rc.d
    [ "$rc" = 1 ] && dumplogs
    exit "$rc"
}
trap on_exit EXIT

mkdir -p "$BASE"/state/ctld "$BASE"/state/d "$BASE"/log "$BASE"/run

# ---------------------------------------------------------------- packages
PKGS="munge slurmctld slurmd slurm-client"
[ "$WITH_DBD" = 1 ] && PKGS="$PKGS slurmdbd mariadb-server"
missing=""
for p in $PKGS; do
    st=$(dpkg-query -W -f='${Status}' "$p" 2>/dev/null || true)
    [ "$st" = "install ok installed" ] || missing="$missing $p"
done
if [ -n "$missing" ]; then
    log "apt-get install:$missing"
    # policy-rc.d: package scripts must not start daemons (we start our own)
    if [ ! -e /usr/sbin/policy-rc.d ]; then
        printf '#!/bin/sh\nexit 101\n' > /usr/sbin/policy-rc.d; chmod 755 /usr/sbin/policy-rc.d
        created_policy=1
    fi
    rc=0
    # shellcheck disable=SC2086  # word splitting of the package list is intended
    {
        apt-get -o DPkg::Lock::Timeout=120 update -qq \
        && apt-get -o DPkg::Lock::Timeout=120 install -y -qq --no-install-recommends \
            -o Dpkg::Options::=--force-confdef -o Dpkg::Options::=--force-confold $missing
    } </dev/null >"$BASE/log/apt.log" 2>&1 || rc=$?
    [ "$created_policy" = 1 ] && rm -f /usr/sbin/policy-rc.d && created_policy=0
    if [ "$rc" != 0 ]; then
        tail -n 30 "$BASE/log/apt.log" >&2
        unsupported "apt-get could not install$missing (exit $rc; log in $BASE/log/apt.log)"
    fi
    log "packages installed in $((SECONDS - T_START))s"
fi

HOST=$(hostname -s)
NPROC=$(nproc)
NCPU=${HOLDFAST_SLURM_CPUS:-$((NPROC > 4 ? NPROC : 4))}
MEM_AVAIL_MB=$(awk '/^MemAvailable:/ {print int($2/1024)}' /proc/meminfo)
REALMEM=$((MEM_AVAIL_MB * 8 / 10))          # below free memory
# node topology from slurmd -C when it agrees with nproc (avoids a log note)
TOPO=""
HWLINE=$(timeout 20 slurmd -C 2>/dev/null </dev/null | head -n 1 || true)
if [[ "$HWLINE" =~ CPUs=([0-9]+)\ (Boards=[0-9]+\ SocketsPerBoard=[0-9]+\ CoresPerSocket=[0-9]+\ ThreadsPerCore=[0-9]+) ]] \
    && [ "${BASH_REMATCH[1]}" = "$NCPU" ]; then
    TOPO=" ${BASH_REMATCH[2]}"
fi
OVERRIDES=""
[ "$NCPU" -gt "$NPROC" ] && OVERRIDES="SlurmdParameters=config_overrides"   # more CPUs than the machine has

# ---------------------------------------------------------------- configs
# /etc/slurm/slurm.conf is REQUIRED (not SLURM_CONF): the snakemake slurm
# jobstep plugin strips all SLURM_* variables before its inner `srun`.
# The first line marks the file as ours: stop_cluster.sh removes only such files.
mkdir -p /etc/slurm
if [ -f /etc/slurm/slurm.conf ] && ! head -n 1 /etc/slurm/slurm.conf | grep -q '^# written by start_cluster.sh'; then
    unsupported "/etc/slurm/slurm.conf exists and was not written by this script; not overwriting it"
fi
cat > /etc/slurm/slurm.conf.new <<EOF
# written by start_cluster.sh (holdfast tests); removed by stop_cluster.sh
ClusterName=$CLUSTER
SlurmctldHost=$HOST(127.0.0.1)
SlurmUser=root
AuthType=auth/munge
CredType=cred/munge
MpiDefault=none
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
DefMemPerCPU=1000
SchedulerType=sched/backfill
ReturnToService=2
MinJobAge=3600
MailProg=/bin/true
StateSaveLocation=$BASE/state/ctld
SlurmdSpoolDir=$BASE/state/d
SlurmctldPidFile=$BASE/run/slurmctld.pid
SlurmdPidFile=$BASE/run/slurmd.pid
SlurmctldLogFile=$BASE/log/slurmctld.log
SlurmdLogFile=$BASE/log/slurmd.log
SlurmctldDebug=info
SlurmdDebug=info
JobCompType=jobcomp/filetxt
JobCompLoc=$BASE/log/jobcomp.txt
$OVERRIDES
EOF
if [ "$WITH_DBD" = 1 ]; then
    cat >> /etc/slurm/slurm.conf.new <<EOF
AccountingStorageType=accounting_storage/slurmdbd
AccountingStorageHost=localhost
JobAcctGatherType=jobacct_gather/linux
JobAcctGatherFrequency=30
EOF
else
    cat >> /etc/slurm/slurm.conf.new <<EOF
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
EOF
fi
cat >> /etc/slurm/slurm.conf.new <<EOF
NodeName=$HOST NodeAddr=127.0.0.1 CPUs=$NCPU$TOPO RealMemory=$REALMEM State=UNKNOWN
PartitionName=$PARTITION Nodes=ALL Default=YES MaxTime=INFINITE State=UP
EOF
mv -f /etc/slurm/slurm.conf.new /etc/slurm/slurm.conf

# ---------------------------------------------------------------- munge
if [ ! -s /etc/munge/munge.key ]; then
    mkdir -p /etc/munge
    mungekey --create --force >/dev/null 2>&1 \
        || dd if=/dev/urandom of=/etc/munge/munge.key bs=1024 count=1 status=none
fi
chown munge:munge /etc/munge/munge.key; chmod 400 /etc/munge/munge.key
install -d -o munge -g munge -m 0755 /run/munge
install -d -o munge -g munge -m 0700 /var/log/munge /var/lib/munge
if ! alive /run/munge/munged.pid munged; then
    log "starting munged"
    rm -f /run/munge/munged.pid
    runuser -u munge -- /usr/sbin/munged </dev/null >>"$BASE/log/munged.out" 2>&1
fi
wait_for munged sh -c 'munge -n | unmunge'

# ---------------------------------------------------------------- mariadb + slurmdbd
if [ "$WITH_DBD" = 1 ]; then
    [ -d /var/lib/mysql/mysql ] || mariadb-install-db --user=mysql \
        --datadir=/var/lib/mysql </dev/null >"$BASE/log/mariadb-install.out" 2>&1
    install -d -o mysql -g root -m 0755 /run/mysqld
    if ! alive /run/mysqld/mysqld.pid mariadbd; then
        log "starting mariadbd"
        setsid /usr/sbin/mariadbd --user=mysql --datadir=/var/lib/mysql \
            --pid-file=/run/mysqld/mysqld.pid --socket=/run/mysqld/mysqld.sock \
            --bind-address=127.0.0.1 --log-error="$BASE/log/mariadb.err" \
            --innodb-buffer-pool-size=256M --innodb-lock-wait-timeout=900 \
            </dev/null >/dev/null 2>&1 &
    fi
    wait_for mariadb mariadb -uroot -e 'SELECT 1'
    mariadb -uroot -e "CREATE DATABASE IF NOT EXISTS slurm_acct_db;
        CREATE USER IF NOT EXISTS 'slurm'@'localhost' IDENTIFIED BY '$DB_PASS';
        GRANT ALL ON slurm_acct_db.* TO 'slurm'@'localhost'; FLUSH PRIVILEGES;" </dev/null
    cat > /etc/slurm/slurmdbd.conf <<EOF
# written by start_cluster.sh (holdfast tests); removed by stop_cluster.sh
AuthType=auth/munge
DbdHost=localhost
DbdPort=6819
SlurmUser=root
DebugLevel=info
LogFile=$BASE/log/slurmdbd.log
PidFile=$BASE/run/slurmdbd.pid
StorageType=accounting_storage/mysql
StorageHost=localhost
StorageLoc=slurm_acct_db
StorageUser=slurm
StoragePass=$DB_PASS
EOF
    chmod 600 /etc/slurm/slurmdbd.conf
    if ! alive "$BASE/run/slurmdbd.pid" slurmdbd; then
        log "starting slurmdbd"
        slurmdbd </dev/null >>"$BASE/log/slurmdbd.out" 2>&1
    fi
    wait_for "slurmdbd port 6819" bash -c 'exec 3<>/dev/tcp/127.0.0.1/6819'
fi

# ---------------------------------------------------------------- slurmctld + slurmd
# Cold start uses -c (clear saved job state): jobs left "running" by a
# killed slurmctld would otherwise hold the node until their time limit.
if ! alive "$BASE/run/slurmctld.pid" slurmctld; then
    log "starting slurmctld"
    slurmctld -c </dev/null >>"$BASE/log/slurmctld.out" 2>&1
else
    timeout 20 scontrol reconfigure </dev/null >/dev/null 2>&1 || true
fi
wait_for slurmctld scontrol ping
if ! alive "$BASE/run/slurmd.pid" slurmd; then
    log "starting slurmd"
    slurmd -c -N "$HOST" </dev/null >>"$BASE/log/slurmd.out" 2>&1
fi

node_state() { timeout 10 sinfo -h -n "$HOST" -o %t 2>/dev/null </dev/null; }
node_idle() { [ "$(node_state)" = idle ]; }
wait_idle() {
    local end=$((SECONDS + TIMEOUT)) i=0
    while ((SECONDS < end)); do
        node_idle && return 0
        # a node left down/drained by an earlier unclean stop: bring it back
        if ((++i % 20 == 0)); then
            case "$(node_state)" in
                down*|drain*|drng*) timeout 10 scontrol update NodeName="$HOST" State=RESUME \
                    </dev/null >/dev/null 2>&1 || true ;;
            esac
        fi
        sleep 0.25
    done
    die "node $HOST not idle: $(timeout 10 sinfo -h -N -o '%N %t %E' 2>&1 </dev/null)"
}
wait_idle

# ---------------------------------------------------------------- accounting objects
if [ "$WITH_DBD" = 1 ]; then
    wait_for "cluster $CLUSTER registered in slurmdbd" \
        bash -c "sacctmgr -n -P list cluster format=cluster | grep -qx $CLUSTER"
    accts=$(timeout 20 sacctmgr -n -P list account "$ACCOUNT" format=account </dev/null)
    if ! grep -qx "$ACCOUNT" <<<"$accts"; then
        timeout 20 sacctmgr -i add account "$ACCOUNT" Description=test Organization=test </dev/null >/dev/null
    fi
    accts=$(timeout 20 sacctmgr -n -P -s list user root format=account </dev/null)
    if ! grep -qx "$ACCOUNT" <<<"$accts"; then
        timeout 20 sacctmgr -i add user root Account="$ACCOUNT" </dev/null >/dev/null
    fi
    timeout 20 sacct -n -X -S now-1minute </dev/null >/dev/null || die "sacct does not work"
fi

# ---------------------------------------------------------------- smoke test
timeout 60 srun -N1 -n1 -t 1 true </dev/null || die "srun smoke test failed"
wait_idle
log "cluster up in $((SECONDS - T_START))s: $(timeout 10 sinfo -h -o '%P %a %D %t %N' </dev/null)" \
    "(accounting: $([ "$WITH_DBD" = 1 ] && echo slurmdbd || echo none))"
exit 0
