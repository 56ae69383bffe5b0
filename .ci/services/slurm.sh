#!/usr/bin/env bash
# A single-node SLURM cluster on this machine (Debian's slurm-wlm and munge), for the cluster-sweep test.
#
#   .ci/services/slurm.sh start    # installs the packages if missing, starts munged, slurmctld, slurmd
#   .ci/services/slurm.sh stop     # stops what start started
#   .ci/services/slurm.sh status
#
# Needs root (the daemons switch users and own system folders). Config, state and logs live under
# $COREACH_SERVICES_DIR/slurm (default /tmp/coreach-services/slurm); nothing is written to /etc/slurm: the
# tools find the config through SLURM_CONF, which `start` writes to $COREACH_SERVICES_DIR/slurm.env.
# One node (this host, 127.0.0.1) with every CPU, one partition `debug`; accounting and job accounting
# are off, so submitit's calls to sacct fail with a harmless warning. Both commands are safe to repeat.
set -euo pipefail

STATE="${COREACH_SERVICES_DIR:-/tmp/coreach-services}"
S="$STATE/slurm"
CONF="$S/slurm.conf"
ENV_FILE="$STATE/slurm.env"

log() { echo "[slurm] $*" >&2; }
die() { log "error: $*"; exit 1; }

free_port() {
    python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])'
}

alive() { [ -f "$1" ] && kill -0 "$(cat "$1")" 2>/dev/null; }

install_packages() {
    command -v slurmctld >/dev/null && command -v slurmd >/dev/null && command -v munged >/dev/null && return 0
    log "installing slurm-wlm and munge (Debian packages)"
    export DEBIAN_FRONTEND=noninteractive
    apt-get update -qq >/dev/null
    apt-get install -y -qq slurm-wlm munge >/dev/null
}

start_munge() {
    if munge -n 2>/dev/null | unmunge >/dev/null 2>&1; then
        log "munged already answering"
        return 0
    fi
    if [ ! -s /etc/munge/munge.key ]; then
        mkdir -p /etc/munge
        runuser -u munge -- mungekey --create --keyfile /etc/munge/munge.key 2>/dev/null ||
            { dd if=/dev/urandom of=/etc/munge/munge.key bs=1 count=1024 2>/dev/null &&
                chown munge: /etc/munge/munge.key && chmod 400 /etc/munge/munge.key; }
    fi
    mkdir -p /run/munge /var/lib/munge /var/log/munge
    chown munge: /run/munge /var/lib/munge /var/log/munge
    chmod 755 /run/munge
    runuser -u munge -- munged --force
    for _ in $(seq 1 40); do
        if munge -n 2>/dev/null | unmunge >/dev/null 2>&1; then
            cp /run/munge/munged.pid "$S/munged.pid" 2>/dev/null || true
            log "munged started"
            return 0
        fi
        sleep 0.25
    done
    die "munged did not answer (see /var/log/munge/munged.log)"
}

write_conf() {
    local host cpus mem_mb
    host="$(hostname -s)"
    cpus="$(nproc)"
    # a little under the machine's memory: slurmd drains a node that reports less than configured
    mem_mb="$(awk '/MemTotal/ {print int($2 / 1024 * 0.9)}' /proc/meminfo)"
    cat >"$CONF.tmp" <<EOF
ClusterName=coreach-ci
SlurmctldHost=$host(127.0.0.1)
SlurmctldPort=$(free_port)
SlurmdPort=$(free_port)
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CredType=cred/munge
MpiDefault=none
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SwitchType=switch/none
SelectType=select/cons_tres
SelectTypeParameters=CR_CPU
SchedulerType=sched/backfill
AccountingStorageType=accounting_storage/none
JobAcctGatherType=jobacct_gather/none
JobCompType=jobcomp/none
ReturnToService=2
SlurmctldTimeout=30
SlurmdTimeout=30
InactiveLimit=0
MinJobAge=60
KillWait=10
StateSaveLocation=$S/state
SlurmdSpoolDir=$S/spool
SlurmctldPidFile=$S/slurmctld.pid
SlurmdPidFile=$S/slurmd.pid
SlurmctldLogFile=$S/slurmctld.log
SlurmdLogFile=$S/slurmd.log
NodeName=$host NodeAddr=127.0.0.1 CPUs=$cpus RealMemory=$mem_mb State=UNKNOWN
PartitionName=debug Nodes=$host Default=YES MaxTime=INFINITE State=UP
EOF
    mv "$CONF.tmp" "$CONF"
}

write_env() {
    echo "export SLURM_CONF=$CONF" >"$ENV_FILE.tmp"
    mv "$ENV_FILE.tmp" "$ENV_FILE"
}

slurm_works() {
    SLURM_CONF="$CONF" timeout 20 srun -N1 -n1 -t 1 hostname >/dev/null 2>&1
}

start() {
    [ "$(id -u)" = 0 ] || die "needs root (daemons and munge's folders)"
    mkdir -p "$S"
    install_packages
    if alive "$S/slurmctld.pid" && alive "$S/slurmd.pid" && slurm_works; then
        write_env
        log "already running"
        return 0
    fi
    stop_daemons
    rm -rf "$S/state" "$S/spool" "$S"/*.log
    mkdir -p "$S/state" "$S/spool"
    start_munge
    write_conf
    # -c: a clean start, no saved jobs; -f: our config, not /etc/slurm
    slurmctld -c -f "$CONF" || { tail -20 "$S/slurmctld.log" >&2 || true; die "slurmctld did not start"; }
    slurmd -c -f "$CONF" || { tail -20 "$S/slurmd.log" >&2 || true; die "slurmd did not start"; }
    local i
    for i in $(seq 1 120); do
        if slurm_works; then
            write_env
            log "srun works after $i tries (SLURM_CONF=$CONF)"
            return 0
        fi
        # a node that came up DOWN (e.g. after an unclean stop) is returned to service
        SLURM_CONF="$CONF" scontrol update nodename="$(hostname -s)" state=resume >/dev/null 2>&1 || true
        sleep 1
    done
    SLURM_CONF="$CONF" sinfo -N -l >&2 || true
    tail -20 "$S/slurmctld.log" "$S/slurmd.log" >&2 || true
    die "srun did not work within 120 s"
}

stop_pidfile() {
    local file="$1" name="$2" pid
    alive "$file" || { rm -f "$file"; return 0; }
    pid="$(cat "$file")"
    kill -TERM "$pid" 2>/dev/null || true
    for _ in $(seq 1 40); do kill -0 "$pid" 2>/dev/null || break; sleep 0.25; done
    kill -KILL "$pid" 2>/dev/null || true
    rm -f "$file"
    log "$name stopped"
}

stop_daemons() {
    stop_pidfile "$S/slurmd.pid" slurmd
    stop_pidfile "$S/slurmctld.pid" slurmctld
}

stop() {
    rm -f "$ENV_FILE"
    stop_daemons
    # munged only if this script started it
    stop_pidfile "$S/munged.pid" munged
}

case "${1:-}" in
    start) start ;;
    stop) stop ;;
    status)
        alive "$S/slurmctld.pid" && echo "slurmctld: running" || echo "slurmctld: stopped"
        alive "$S/slurmd.pid" && echo "slurmd: running" || echo "slurmd: stopped"
        slurm_works && echo "srun: works" || echo "srun: fails"
        ;;
    *)
        echo "usage: $0 start|stop|status" >&2
        exit 2
        ;;
esac
