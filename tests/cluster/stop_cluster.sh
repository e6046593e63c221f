#!/usr/bin/env bash
# stop_cluster.sh - stop the daemons started by start_cluster.sh, by PID
# (from their pid files; the process name is checked before signalling) and
# remove the configs it wrote. Order: jobs are cancelled, then slurmd,
# slurmctld, slurmdbd, mariadbd, munged. Safe to run when nothing is running.
# Packages stay installed (a second start skips apt-get).
#
# Why the config must go: while /etc/slurm/slurm.conf exists but no slurmctld
# answers, every `scontrol show config` waits ~10 s - and the snakemake slurm
# executor plugin runs it when it is loaded, i.e. in EVERY snakemake call on
# this machine, local runs and dry runs included.
#
# Environment: HOLDFAST_SLURM_BASE as for start_cluster.sh.
set -u
BASE=${HOLDFAST_SLURM_BASE:-/tmp/holdfast-slurm}
export PATH="/usr/local/sbin:/usr/local/bin:/usr/sbin:/usr/bin:/sbin:/bin:${PATH:-}"
while IFS= read -r name; do unset "$name"; done < <(compgen -e | grep -E '^(SLURM|SBATCH|SRUN|SQUEUE|SACCT)_' || true)

log() { echo "[stop_cluster $(date +%T)] $*"; }
# running PID NAME : PID is a live (non-zombie) process named NAME
running() {
    local st
    [ "$(cat /proc/"$1"/comm 2>/dev/null)" = "$2" ] || return 1
    st=$(awk '{print $3}' /proc/"$1"/stat 2>/dev/null) || return 1
    [ -n "$st" ] && [ "$st" != Z ] && [ "$st" != X ]
}

# stop_pid NAME PIDFILE : TERM, wait up to 30 s, then KILL
stop_pid() {
    local name=$1 pidfile=$2 pid i
    if [ ! -s "$pidfile" ]; then return 0; fi
    pid=$(cat "$pidfile" 2>/dev/null)
    if ! [[ "$pid" =~ ^[0-9]+$ ]] || ! running "$pid" "$name"; then
        log "$name: not running (stale pid file)"; rm -f "$pidfile"; return 0
    fi
    kill -TERM "$pid" 2>/dev/null
    for ((i = 0; i < 120; i++)); do
        running "$pid" "$name" || break
        sleep 0.25
    done
    if running "$pid" "$name"; then
        log "$name ($pid) ignored TERM, sending KILL"; kill -KILL "$pid" 2>/dev/null
    fi
    rm -f "$pidfile"
    log "$name ($pid) stopped"
}

ctld_pid=$(cat "$BASE/run/slurmctld.pid" 2>/dev/null || true)
if [[ "$ctld_pid" =~ ^[0-9]+$ ]] && running "$ctld_pid" slurmctld; then
    jobs=$(timeout 10 squeue -h -o %i </dev/null 2>/dev/null | tr '\n' ' ')
    if [ -n "${jobs// /}" ]; then
        log "cancelling jobs: $jobs"
        # shellcheck disable=SC2086  # one word per job id
        timeout 10 scancel $jobs </dev/null 2>/dev/null || true
        for ((i = 0; i < 40; i++)); do
            [ -z "$(timeout 10 squeue -h -t R,CG,PD -o %i </dev/null 2>/dev/null)" ] && break
            sleep 0.25
        done
    fi
fi

stop_pid slurmd    "$BASE/run/slurmd.pid"
stop_pid slurmctld "$BASE/run/slurmctld.pid"
stop_pid slurmdbd  "$BASE/run/slurmdbd.pid"
stop_pid mariadbd  /run/mysqld/mysqld.pid
stop_pid munged    /run/munge/munged.pid

for f in /etc/slurm/slurm.conf /etc/slurm/slurmdbd.conf /etc/slurm/slurm.conf.new; do
    if [ -f "$f" ] && head -n 1 "$f" | grep -q '^# written by start_cluster.sh'; then
        rm -f "$f"
    fi
done
# Saved controller state would resurrect old jobs on the next start (which also uses -c).
rm -rf "$BASE/state" "$BASE/run"
log "stopped; logs kept in $BASE/log"
exit 0
