#!/usr/bin/env bash
# Stop the daemons that .ci/slurm/start.sh started, by the PIDs it recorded, and nothing else.
#
#   .ci/slurm/stop.sh [STATE_DIR]         (default /tmp/allolaw-slurm)
set -uo pipefail

dir=$(realpath -m "${1:-/tmp/allolaw-slurm}")
if [ ! -s "$dir/pids" ]; then
    echo "slurm: no PIDs recorded in $dir/pids; nothing to stop"
    exit 0
fi

# Running and not a zombie (an ended daemon whose parent has not collected it yet).
alive() { [ -e "/proc/$1" ] && ! grep -q '^[^)]*) Z' "/proc/$1/stat" 2>/dev/null; }

# Stop in reverse start order (slurmd, slurmctld, munged); skip a PID that now names another
# program (the daemon already ended and the number was reused).
tac "$dir/pids" | while read -r name pid; do
    if [ "$(cat "/proc/$pid/comm" 2>/dev/null)" != "$name" ]; then
        echo "slurm: $name (PID $pid) not running"
        continue
    fi
    kill -TERM "$pid"
    for _ in $(seq 100); do alive "$pid" || break; sleep 0.1; done
    if alive "$pid"; then
        echo "slurm: $name (PID $pid) ignored SIGTERM for 10 s; sending SIGKILL"
        kill -KILL "$pid"
    fi
    echo "slurm: stopped $name (PID $pid)"
done
: > "$dir/pids"
if [ "$(readlink /etc/slurm/slurm.conf 2>/dev/null)" = "$dir/slurm.conf" ]; then
    rm -f /etc/slurm/slurm.conf
    echo "slurm: removed the /etc/slurm/slurm.conf link"
fi
