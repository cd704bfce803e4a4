#!/usr/bin/env bash
# Start a throw-away single-node SLURM cluster on localhost (run as root, after install.sh).
#
#   .ci/slurm/start.sh [STATE_DIR]        (default /tmp/allolaw-slurm)
#
# Every daemon (munged, slurmctld, slurmd) runs in the foreground of a background shell; its PID
# goes to STATE_DIR/pids, which .ci/slurm/stop.sh reads to stop exactly these processes. No
# systemd, no cgroups, no accounting database: job status comes from squeue, which forgets a
# job MinJobAge seconds after it ends. The SLURM plugin polls at most every 180 s, and the
# tests ask `scontrol show job` about every job of a batch afterwards, so MinJobAge is 3600. The config is linked to
# /etc/slurm/slurm.conf, where every client looks (Snakemake's job steps drop SLURM_CONF from
# their environment, so that variable alone would not do); stop.sh removes the link. A real
# /etc/slurm/slurm.conf is never replaced: start.sh refuses to run instead.
set -euo pipefail

dir=$(realpath -m "${1:-/tmp/allolaw-slurm}")
node=$(hostname -s)
partition=${ALLOLAW_SLURM_PARTITION:-allolaw}

if [ -s "$dir/pids" ]; then
    while read -r name pid; do
        if kill -0 "$pid" 2>/dev/null; then
            echo "slurm: $name (PID $pid) from an earlier start is still running; run stop.sh $dir" >&2
            exit 1
        fi
    done < "$dir/pids"
fi
conf_link=/etc/slurm/slurm.conf
if [ -e "$conf_link" ] || [ -L "$conf_link" ]; then
    if [ "$(readlink "$conf_link")" != "$dir/slurm.conf" ]; then
        echo "slurm: $conf_link exists and is not this test cluster's; not touching it" >&2
        exit 1
    fi
fi
for bin in munged slurmctld slurmd sinfo; do
    command -v "$bin" >/dev/null || { echo "slurm: $bin missing; run .ci/slurm/install.sh" >&2; exit 1; }
done

mkdir -p "$dir"/{state,spool,log}
: > "$dir/pids"

# Node line from the hardware slurmd sees, with 90 % of its memory offered to jobs.
read -r cpus boards sockets cores tpc mem < <(slurmd -C | head -1 | sed -E \
    's/.*CPUs=([0-9]+) Boards=([0-9]+) SocketsPerBoard=([0-9]+) CoresPerSocket=([0-9]+) ThreadsPerCore=([0-9]+) RealMemory=([0-9]+).*/\1 \2 \3 \4 \5 \6/')
mem=$(( mem * 9 / 10 ))

cat > "$dir/slurm.conf" <<CONF
# Written by .ci/slurm/start.sh: one node, localhost, no accounting, no cgroups.
ClusterName=allolaw-ci
SlurmctldHost=$node(127.0.0.1)
SlurmUser=root
SlurmdUser=root
SlurmctldPort=6817
SlurmdPort=6818
AuthType=auth/munge
CredType=cred/munge
StateSaveLocation=$dir/state
SlurmdSpoolDir=$dir/spool
SlurmctldPidFile=$dir/slurmctld.pid
SlurmdPidFile=$dir/slurmd.pid
SlurmctldLogFile=$dir/log/slurmctld.log
SlurmdLogFile=$dir/log/slurmd.log
ProctrackType=proctrack/linuxproc
TaskPlugin=task/none
JobAcctGatherType=jobacct_gather/none
AccountingStorageType=accounting_storage/none
JobCompType=jobcomp/none
SchedulerType=sched/backfill
SelectType=select/cons_tres
SelectTypeParameters=CR_Core_Memory
DefMemPerCPU=1000
MinJobAge=3600
MailProg=/bin/true
ReturnToService=2
SlurmctldTimeout=30
SlurmdTimeout=30
NodeName=$node NodeAddr=127.0.0.1 CPUs=$cpus Boards=$boards SocketsPerBoard=$sockets CoresPerSocket=$cores ThreadsPerCore=$tpc RealMemory=$mem State=UNKNOWN
PartitionName=$partition Nodes=$node Default=YES MaxTime=INFINITE State=UP
CONF
mkdir -p /etc/slurm
ln -sfn "$dir/slurm.conf" "$conf_link"

# munge: the package made the key; the socket folder is ours to create (no systemd here).
install -d -o munge -g munge -m 0755 /run/munge
install -d -o munge -g munge -m 0700 /var/lib/munge /var/log/munge
setpriv --reuid munge --regid munge --init-groups \
    munged -F --log-file="$dir/log/munged.log" > "$dir/log/munged.out" 2>&1 < /dev/null &
echo "munged $!" >> "$dir/pids"
for _ in $(seq 50); do [ -S /run/munge/munge.socket.2 ] && break; sleep 0.1; done
munge -n | unmunge > /dev/null

slurmctld -D -f "$dir/slurm.conf" > "$dir/log/slurmctld.out" 2>&1 < /dev/null &
echo "slurmctld $!" >> "$dir/pids"
slurmd -D -N "$node" -f "$dir/slurm.conf" > "$dir/log/slurmd.out" 2>&1 < /dev/null &
echo "slurmd $!" >> "$dir/pids"

# Ready when the node reports plain `idle` (a trailing `*` means not responding yet).
for _ in $(seq 60); do
    state=$(sinfo -h -N -n "$node" -o %t 2>/dev/null || true)
    if [ "$state" = idle ]; then
        echo "slurm: node $node idle in partition $partition; config $conf_link -> $dir/slurm.conf"
        exit 0
    fi
    sleep 1
done
echo "slurm: node $node not idle after 60 s (state '${state:-?}'); logs in $dir/log" >&2
exit 1
