#!/usr/bin/env bash
# Start a throwaway single-node SLURM cluster with accounting on this machine, so that the
# workflow can be run through the Snakemake SLURM executor for real (see README.md here).
#
#   sudo bash tests/cluster/slurm_up.sh          # progress on stderr
#   eval "$(bash tests/cluster/slurm_up.sh)"     # stdout: export lines for account/partition
#
# Installs the Debian packages if missing, writes /etc/slurm/slurm.conf and slurmdbd.conf,
# starts munged (unless one already answers), MariaDB (socket only), slurmdbd, slurmctld and
# slurmd in the foreground of their own sessions, records each PID it started under
# $UNBIN_SLURM_STATE/pids, registers cluster/account/user and waits for the node to be idle.
# Everything listens on loopback only. Stop with tests/cluster/slurm_down.sh.
#
# Environment (all optional):
#   UNBIN_SLURM_STATE      state folder (default /tmp/unbin-slurm)
#   UNBIN_SLURM_ACCOUNT    account to create (default unbin)
#   UNBIN_SLURM_PARTITION  partition to create (default unbin)
#   UNBIN_SLURM_WAIT       seconds to wait for each daemon / the idle node (default 60)
#   UNBIN_SLURM_KEEP_ON_FAIL=1  leave started daemons running when start-up fails (debugging)
set -euo pipefail

HERE="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
STATE="${UNBIN_SLURM_STATE:-/tmp/unbin-slurm}"
ACCOUNT="${UNBIN_SLURM_ACCOUNT:-unbin}"
PARTITION="${UNBIN_SLURM_PARTITION:-unbin}"
CLUSTER="unbin"
WAIT="${UNBIN_SLURM_WAIT:-60}"
PIDS="$STATE/pids"
LOGS="$STATE/log"
MYSQL_DIR="$STATE/mariadb"
DB_SOCKET="$MYSQL_DIR/run/mariadb.sock"
DB_NAME="unbin_slurm_acct"
DB_USER="unbin_slurm"
SLURM_CONF_FILE="/etc/slurm/slurm.conf" # the default path: the plugin's job step unsets SLURM_CONF
SLURMDBD_CONF_FILE="/etc/slurm/slurmdbd.conf"
MARKER="# written by unbin tests/cluster/slurm_up.sh"
PACKAGES=(munge slurmctld slurmd slurm-client slurmdbd mariadb-server)
T0=$SECONDS

say() { printf '[slurm_up %3ds] %s\n' "$((SECONDS - T0))" "$*" >&2; }
die() {
    printf '[slurm_up] ERROR: %s\n' "$*" >&2
    exit 1
}

# --- PID bookkeeping: "<pid> <start time in clock ticks>" guards against PID reuse ---------
# After the "(comm)" field of /proc/PID/stat: $1 is the state, $20 the start time in ticks.
proc_field() { sed 's/.*) //' "/proc/$1/stat" 2>/dev/null | awk -v f="$2" '{print $f}'; }
proc_start() { proc_field "$1" 20; }
pidfile_alive() { # $1 = pid file; true if the process it names is still the one we started
    local pid start
    [[ -r "$1" ]] || return 1
    read -r pid start _ <"$1" || return 1
    # An exited daemon stays a zombie until it is reaped: count that as gone.
    [[ -n "$pid" && -d "/proc/$pid" && "$(proc_start "$pid")" == "$start" &&
        "$(proc_field "$pid" 1)" != Z ]]
}

wait_for() { # $1 = description, $2 = seconds, rest = command that succeeds when ready
    local what=$1 limit=$2 deadline
    shift 2
    deadline=$((SECONDS + limit))
    until "$@" >/dev/null 2>&1; do
        ((SECONDS < deadline)) || return 1
        sleep 0.25
    done
    say "$what ready"
}

show_log() { # $1 = log file
    [[ -f "$1" ]] || return 0
    printf -- '--- last lines of %s ---\n' "$1" >&2
    tail -n 20 "$1" >&2
}

start_daemon() { # $1 = name, $2 = expected binary (for the check), rest = foreground command
    local name=$1 exe pid start
    exe="$(readlink -f "$2")" # Debian links some daemons through alternatives (slurmctld-wlm)
    shift 2
    # setsid: the daemon leaves our session, so signals to the caller's group don't reach it.
    # A background child is never a process-group leader, so setsid execs in place and $!
    # is the daemon's own PID.
    setsid "$@" </dev/null >>"$LOGS/$name.out" 2>&1 &
    pid=$!
    start="$(proc_start "$pid")"
    [[ -n "$start" ]] || {
        show_log "$LOGS/$name.out"
        die "$name exited at once (pid $pid)"
    }
    echo "$pid $start $name" >"$PIDS/$name.pid"
    # Until the wrappers (setsid, env, setpriv) have exec'd, the PID still runs them.
    local real="" i
    for ((i = 0; i < 40; i++)); do
        pidfile_alive "$PIDS/$name.pid" || break
        real="$(readlink "/proc/$pid/exe" 2>/dev/null || true)"
        [[ "$real" == "$exe" ]] && break
        sleep 0.05
    done
    if ! pidfile_alive "$PIDS/$name.pid"; then
        show_log "$LOGS/$name.out"
        die "$name exited right after start; see $LOGS/"
    fi
    [[ "$real" == "$exe" ]] ||
        die "$name: PID $pid runs '$real', expected '$exe' (refusing to record a wrong PID)"
    say "started $name (pid $pid)"
}

port_free() { ! ss -Hltn "sport = :$1" 2>/dev/null | grep -q .; }

on_exit() {
    local rc=$?
    if ((rc != 0)) && [[ "${STARTED_ANY:-0}" == 1 && "${UNBIN_SLURM_KEEP_ON_FAIL:-0}" != 1 ]]; then
        echo "[slurm_up] start-up failed: stopping the daemons this run started" >&2
        bash "$HERE/slurm_down.sh" >&2 || true
    fi
}

# --- 0. preconditions ---------------------------------------------------------------------
[[ $EUID -eq 0 ]] || die "must run as root (it installs packages and writes /etc/slurm)"
[[ "$ACCOUNT" =~ ^[a-z][a-z0-9_]*$ ]] || die "UNBIN_SLURM_ACCOUNT='$ACCOUNT': use [a-z][a-z0-9_]*"
[[ "$PARTITION" =~ ^[a-z][a-z0-9_]*$ ]] || die "UNBIN_SLURM_PARTITION='$PARTITION': use [a-z][a-z0-9_]*"
NODE="$(hostname -s)"
[[ -n "$NODE" ]] || die "hostname -s is empty"
# The daemons bind to the address the host name resolves to (NoInAddrAny): it must be loopback.
HOST_ADDR="$(getent ahostsv4 "$(hostname)" | awk 'NR == 1 {print $1}')"
[[ "$HOST_ADDR" == 127.* ]] || die "host name '$(hostname)' resolves to '${HOST_ADDR:-nothing}'," \
    "not a loopback address; the daemons would listen there. Map it to 127.0.0.1 in /etc/hosts."

mkdir -p "$PIDS" "$LOGS"

# --- 1. already up? ----------------------------------------------------------------------
shopt -s nullglob
existing=("$PIDS"/*.pid)
if ((${#existing[@]} > 0)); then
    all_alive=1
    for f in "${existing[@]}"; do pidfile_alive "$f" || all_alive=0; done
    if ((all_alive)) && sinfo -h -p "$PARTITION" -o %T 2>/dev/null | grep -Eq '^(idle|mixed|allocated|completing)'; then
        say "already up (daemons recorded in $PIDS are running); nothing to do"
        printf 'export UNBIN_SLURM_ACCOUNT=%s\nexport UNBIN_SLURM_PARTITION=%s\n' "$ACCOUNT" "$PARTITION"
        exit 0
    fi
    say "found a partial cluster from an earlier run: stopping it first"
    bash "$HERE/slurm_down.sh" >&2 || die "could not stop the earlier daemons; see above"
fi

# --- 2. packages -------------------------------------------------------------------------
missing=()
for p in "${PACKAGES[@]}"; do
    dpkg-query -W -f='${Status}' "$p" 2>/dev/null | grep -q 'install ok installed' || missing+=("$p")
done
if ((${#missing[@]} > 0)); then
    say "installing ${PACKAGES[*]} (missing: ${missing[*]})"
    # Keep the packages' maintainer scripts from starting services we would not track.
    policy_created=0
    if [[ ! -e /usr/sbin/policy-rc.d ]]; then
        printf '#!/bin/sh\nexit 101\n' >/usr/sbin/policy-rc.d
        chmod 755 /usr/sbin/policy-rc.d
        policy_created=1
    fi
    export DEBIAN_FRONTEND=noninteractive
    apt_ok=1
    apt-get update -qq >"$LOGS/apt.log" 2>&1 &&
        apt-get install -y -qq --no-install-recommends "${PACKAGES[@]}" >>"$LOGS/apt.log" 2>&1 ||
        apt_ok=0
    ((policy_created)) && rm -f /usr/sbin/policy-rc.d
    ((apt_ok)) || {
        show_log "$LOGS/apt.log"
        die "apt-get failed; full log in $LOGS/apt.log"
    }
    say "packages installed"
fi
for b in munged slurmctld slurmd slurmdbd sacctmgr sinfo mariadbd mariadb-install-db mariadb; do
    command -v "$b" >/dev/null || die "'$b' not found after installing ${PACKAGES[*]}"
done

trap on_exit EXIT

for port in 6817 6818 6819; do
    port_free "$port" || die "TCP port $port is already in use by a process this script did not start" \
        "(another SLURM?); stop it first"
done

# --- 3. configuration --------------------------------------------------------------------
CPUS="$(nproc)"
# RealMemory: what slurmd measures minus 1 GB; announcing more than is there drains the node.
MEM_SEEN="$(slurmd -C 2>/dev/null | sed -n 's/.*RealMemory=\([0-9]*\).*/\1/p' | head -n1)"
[[ "$MEM_SEEN" =~ ^[0-9]+$ ]] || die "could not read RealMemory from 'slurmd -C'"
MEM=$((MEM_SEEN > 2048 ? MEM_SEEN - 1024 : MEM_SEEN / 2))

mkdir -p /etc/slurm "$STATE/slurmctld" "$STATE/slurmd" "$STATE/run"
for f in "$SLURM_CONF_FILE" "$SLURMDBD_CONF_FILE"; do
    if [[ -f "$f" ]] && ! grep -qF "$MARKER" "$f"; then
        cp -p "$f" "$f.before-unbin"
        say "kept the existing $f as $f.before-unbin"
    fi
done

umask 077
DB_PASS_FILE="$STATE/db-password"
[[ -s "$DB_PASS_FILE" ]] || head -c 18 /dev/urandom | base64 | tr -dc 'A-Za-z0-9' >"$DB_PASS_FILE"
DB_PASS="$(cat "$DB_PASS_FILE")"
umask 022

cat >"$SLURM_CONF_FILE" <<EOF
$MARKER -- single node, loopback only
ClusterName=$CLUSTER
SlurmctldHost=$NODE(127.0.0.1)
SlurmctldPort=6817
SlurmdPort=6818
SlurmUser=root
SlurmdUser=root
AuthType=auth/munge
CommunicationParameters=NoCtldInAddrAny,NoInAddrAny
StateSaveLocation=$STATE/slurmctld
SlurmdSpoolDir=$STATE/slurmd
SlurmctldPidFile=$STATE/run/slurmctld.pid
SlurmdPidFile=$STATE/run/slurmd.pid
SlurmctldLogFile=$LOGS/slurmctld.log
SlurmdLogFile=$LOGS/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
SchedulerType=sched/backfill
EnforcePartLimits=ALL
ReturnToService=2
MinJobAge=300
MpiDefault=none
MailProg=/bin/true
JobAcctGatherType=jobacct_gather/none
JobCompType=jobcomp/none
AccountingStorageType=accounting_storage/slurmdbd
AccountingStorageHost=127.0.0.1
AccountingStoragePort=6819
AccountingStorageEnforce=associations
NodeName=$NODE NodeAddr=127.0.0.1 NodeHostname=$NODE CPUs=$CPUS RealMemory=$MEM State=UNKNOWN
PartitionName=$PARTITION Nodes=$NODE Default=YES MaxTime=INFINITE State=UP
EOF
chmod 644 "$SLURM_CONF_FILE"

(
    umask 077
    cat >"$SLURMDBD_CONF_FILE" <<EOF
$MARKER -- holds a password: mode 600
AuthType=auth/munge
CommunicationParameters=NoInAddrAny
DbdAddr=127.0.0.1
DbdHost=$NODE
DbdPort=6819
SlurmUser=root
LogFile=$LOGS/slurmdbd.log
PidFile=$STATE/run/slurmdbd.pid
StorageType=accounting_storage/mysql
StorageHost=localhost
StorageLoc=$DB_NAME
StorageUser=$DB_USER
StoragePass=$DB_PASS
EOF
)
chmod 600 "$SLURMDBD_CONF_FILE"
say "wrote $SLURM_CONF_FILE ($CPUS CPUs, RealMemory=$MEM MB) and $SLURMDBD_CONF_FILE"

# --- 4. munge ----------------------------------------------------------------------------
KEY=/etc/munge/munge.key
if [[ ! -s "$KEY" ]]; then
    mungekey --create --keyfile="$KEY" 2>/dev/null ||
        dd if=/dev/urandom of="$KEY" bs=1 count=1024 status=none
fi
chown munge:munge "$KEY"
chmod 0400 "$KEY"
install -d -o munge -g munge -m 0755 /run/munge
install -d -o munge -g munge -m 0700 /var/lib/munge /var/log/munge
if munge -n 2>/dev/null | unmunge >/dev/null 2>&1; then
    say "munged already answers on /run/munge/munge.socket.2: using it (not started here)"
else
    STARTED_ANY=1
    start_daemon munged "$(command -v munged)" \
        setpriv --reuid=munge --regid=munge --init-groups "$(command -v munged)" --foreground
    wait_for "munged" "$WAIT" bash -c 'munge -n | unmunge' || {
        show_log /var/log/munge/munged.log
        die "munged did not answer within ${WAIT}s"
    }
fi

# --- 5. MariaDB: unix socket only, its own data folder -----------------------------------
install -d -o mysql -g mysql -m 0755 "$MYSQL_DIR"
install -d -o mysql -g mysql -m 0750 "$MYSQL_DIR/data" "$MYSQL_DIR/log"
install -d -o mysql -g mysql -m 0755 "$MYSQL_DIR/run"
if [[ ! -d "$MYSQL_DIR/data/mysql" ]]; then
    say "initialising MariaDB data folder"
    mariadb-install-db --no-defaults --user=mysql --datadir="$MYSQL_DIR/data" \
        --auth-root-authentication-method=socket --skip-test-db >"$LOGS/mariadb-install.log" 2>&1 || {
        show_log "$LOGS/mariadb-install.log"
        rm -rf "$MYSQL_DIR/data"
        die "mariadb-install-db failed"
    }
fi
STARTED_ANY=1
start_daemon mariadb "$(command -v mariadbd)" "$(command -v mariadbd)" --no-defaults --user=mysql \
    --datadir="$MYSQL_DIR/data" --socket="$DB_SOCKET" --pid-file="$MYSQL_DIR/run/mariadbd.pid" \
    --log-error="$MYSQL_DIR/log/error.log" --skip-networking --skip-name-resolve \
    --innodb-lock-wait-timeout=900 --innodb-buffer-pool-size=128M
wait_for "MariaDB" "$WAIT" mariadb-admin --no-defaults --socket="$DB_SOCKET" -u root ping || {
    show_log "$MYSQL_DIR/log/error.log"
    die "MariaDB did not answer on $DB_SOCKET within ${WAIT}s"
}
mariadb --no-defaults --socket="$DB_SOCKET" -u root <<EOF || die "could not create the accounting database/user in MariaDB"
CREATE DATABASE IF NOT EXISTS $DB_NAME;
CREATE USER IF NOT EXISTS '$DB_USER'@'localhost' IDENTIFIED BY '$DB_PASS';
ALTER USER '$DB_USER'@'localhost' IDENTIFIED BY '$DB_PASS';
GRANT ALL PRIVILEGES ON $DB_NAME.* TO '$DB_USER'@'localhost';
FLUSH PRIVILEGES;
EOF

# --- 6. slurmdbd, then the accounting records --------------------------------------------
# MYSQL_UNIX_PORT points the MariaDB client library inside slurmdbd at our socket.
start_daemon slurmdbd "$(command -v slurmdbd)" \
    env MYSQL_UNIX_PORT="$DB_SOCKET" "$(command -v slurmdbd)" -D
wait_for "slurmdbd" "$WAIT" sacctmgr -n show cluster || {
    show_log "$LOGS/slurmdbd.log"
    die "slurmdbd did not answer within ${WAIT}s"
}
sacct_has() { [[ -n "$(sacctmgr -n -P show "$@" 2>/dev/null)" ]]; }
sacct_has cluster where name="$CLUSTER" format=cluster ||
    sacctmgr -i add cluster "$CLUSTER" >/dev/null || die "sacctmgr could not add cluster $CLUSTER"
sacct_has account where name="$ACCOUNT" format=account ||
    sacctmgr -i add account "$ACCOUNT" cluster="$CLUSTER" description="unbin test account" \
        organization=unbin >/dev/null || die "sacctmgr could not add account $ACCOUNT"
sacct_has association where user=root account="$ACCOUNT" cluster="$CLUSTER" format=user ||
    sacctmgr -i add user root account="$ACCOUNT" cluster="$CLUSTER" >/dev/null ||
    die "sacctmgr could not add user root to account $ACCOUNT"
say "accounting: cluster $CLUSTER, account $ACCOUNT, user root"

# --- 7. slurmctld and slurmd -------------------------------------------------------------
start_daemon slurmctld "$(command -v slurmctld)" "$(command -v slurmctld)" -D -i
wait_for "slurmctld" "$WAIT" scontrol ping || {
    show_log "$LOGS/slurmctld.log"
    die "slurmctld did not answer within ${WAIT}s"
}
start_daemon slurmd "$(command -v slurmd)" "$(command -v slurmd)" -D
node_idle() { [[ "$(sinfo -h -n "$NODE" -p "$PARTITION" -o %T 2>/dev/null)" == idle ]]; }
wait_for "node $NODE idle" "$WAIT" node_idle || {
    sinfo -R >&2 || true
    show_log "$LOGS/slurmd.log"
    show_log "$LOGS/slurmctld.log"
    die "node $NODE not idle within ${WAIT}s (state: $(sinfo -h -n "$NODE" -o %T 2>/dev/null || echo unknown))"
}

# Nothing we started may listen outside loopback.
ours="$(cat "$PIDS"/*.pid | awk '{print $1}' | paste -sd'|')"
if exposed="$(ss -Hltnup 2>/dev/null | grep -E "pid=($ours)," | awk '{print $5}' |
    grep -vE '^(127\.[0-9.]+|\[::1\]):[0-9]+$')"; then
    die "a daemon listens outside loopback: $exposed"
fi

trap - EXIT
say "cluster up: partition $PARTITION, account $ACCOUNT, node $NODE ($CPUS CPUs, $MEM MB); state in $STATE"
printf 'export UNBIN_SLURM_ACCOUNT=%s\nexport UNBIN_SLURM_PARTITION=%s\n' "$ACCOUNT" "$PARTITION"
