#!/usr/bin/env bash
# Stop the daemons that tests/cluster/slurm_up.sh started, by the PIDs it recorded in
# $UNBIN_SLURM_STATE/pids (never by process names). A PID file whose process is gone, or whose
# PID now belongs to another process (start time differs), is only removed.
#
#   bash tests/cluster/slurm_down.sh            # stop, keep the state folder (faster next start)
#   bash tests/cluster/slurm_down.sh --purge    # stop, then delete the state folder
#
# Environment: UNBIN_SLURM_STATE (default /tmp/unbin-slurm), UNBIN_SLURM_STOP_WAIT (seconds
# per daemon before SIGKILL, default 20).
set -euo pipefail

STATE="${UNBIN_SLURM_STATE:-/tmp/unbin-slurm}"
PIDS="$STATE/pids"
STOP_WAIT="${UNBIN_SLURM_STOP_WAIT:-20}"
PURGE=0
case "${1:-}" in
"") ;;
--purge) PURGE=1 ;;
*)
    echo "usage: $0 [--purge]" >&2
    exit 2
    ;;
esac

say() { printf '[slurm_down] %s\n' "$*" >&2; }
# After the "(comm)" field of /proc/PID/stat: $1 is the state, $20 the start time in ticks.
proc_field() { sed 's/.*) //' "/proc/$1/stat" 2>/dev/null | awk -v f="$2" '{print $f}'; }
# True while PID $1 is still the process started at $2 and not a zombie (an exited daemon
# stays a zombie until PID 1 reaps it).
same_process() {
    [[ -d "/proc/$1" && "$(proc_field "$1" 20)" == "$2" && "$(proc_field "$1" 1)" != Z ]]
}

if [[ ! -d "$PIDS" ]]; then
    say "no PID folder at $PIDS: nothing to stop"
    ((PURGE)) && rm -rf "$STATE"
    exit 0
fi

# Cancel jobs still queued or running, so no job step outlives the cluster.
ctld_pid="" ctld_start=""
[[ -f "$PIDS/slurmctld.pid" ]] && read -r ctld_pid ctld_start _ <"$PIDS/slurmctld.pid"
if [[ "$ctld_pid" =~ ^[0-9]+$ ]] && same_process "$ctld_pid" "$ctld_start"; then
    jobs_left="$(timeout 10 squeue -h -o %i 2>/dev/null || true)"
    if [[ -n "$jobs_left" ]]; then
        say "cancelling jobs: $(echo "$jobs_left" | paste -sd' ')"
        # shellcheck disable=SC2086 # one job id per word
        timeout 10 scancel $jobs_left || true
        for _ in $(seq 1 50); do
            [[ -z "$(timeout 5 squeue -h -o %i 2>/dev/null || true)" ]] && break
            sleep 0.2
        done
    fi
fi

failed=0
# Reverse start order: compute node, controller, accounting, database, authentication.
# Any other PID file found there is stopped last.
shopt -s nullglob
order=()
for name in slurmd slurmctld slurmdbd mariadb munged; do
    [[ -f "$PIDS/$name.pid" ]] && order+=("$PIDS/$name.pid")
done
for f in "$PIDS"/*.pid; do
    [[ " ${order[*]} " == *" $f "* ]] || order+=("$f")
done

for f in "${order[@]}"; do
    name="$(basename "$f" .pid)"
    pid="" start=""
    read -r pid start _ <"$f" || true
    if [[ ! "$pid" =~ ^[0-9]+$ ]] || ! same_process "$pid" "$start"; then
        say "$name: not running (stale PID file removed)"
        rm -f "$f"
        continue
    fi
    t_stop=$SECONDS
    kill -TERM "$pid" 2>/dev/null || true
    deadline=$((SECONDS + STOP_WAIT))
    while same_process "$pid" "$start" && ((SECONDS < deadline)); do sleep 0.2; done
    if same_process "$pid" "$start"; then
        say "$name (pid $pid) ignored SIGTERM for ${STOP_WAIT}s: sending SIGKILL"
        kill -KILL "$pid" 2>/dev/null || true
        for _ in 1 2 3 4 5 6 7 8 9 10; do
            same_process "$pid" "$start" || break
            sleep 0.2
        done
    fi
    if same_process "$pid" "$start"; then
        say "$name (pid $pid) is still running: PID file kept"
        failed=1
    else
        say "stopped $name (pid $pid) in $((SECONDS - t_stop))s"
        rm -f "$f"
    fi
done

if ((failed)); then
    say "ERROR: some daemons could not be stopped"
    exit 1
fi
if ((PURGE)); then
    rm -rf "$STATE"
    say "removed $STATE"
fi
say "all daemons started by slurm_up.sh are stopped"
