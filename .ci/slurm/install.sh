#!/usr/bin/env bash
# Install Debian's SLURM and munge packages for the throw-away test cluster (run as root).
# Services are not started by the package scripts: a temporary policy-rc.d forbids it, and
# .ci/slurm/start.sh runs every daemon in the foreground of a shell it owns instead.
set -euo pipefail

packages=(slurm-wlm slurmctld slurmd slurm-client munge)

if command -v slurmctld >/dev/null && command -v slurmd >/dev/null \
    && command -v sbatch >/dev/null && command -v munged >/dev/null; then
    echo "slurm: already installed ($(slurmctld -V))"
    exit 0
fi
if [ "$(id -u)" -ne 0 ]; then
    echo "slurm: installing packages needs root" >&2
    exit 1
fi

policy=/usr/sbin/policy-rc.d
made_policy=0
if [ ! -e "$policy" ]; then
    printf '#!/bin/sh\nexit 101\n' > "$policy"
    chmod 755 "$policy"
    made_policy=1
fi
cleanup() { if [ "$made_policy" = 1 ]; then rm -f "$policy"; fi; }
trap cleanup EXIT

export DEBIAN_FRONTEND=noninteractive
# Other installs may hold the dpkg lock for a while on a shared machine: wait for it.
apt_opts=(-o DPkg::Lock::Timeout=600 -o Dpkg::Use-Pty=0 -q)
apt-get "${apt_opts[@]}" update
apt-get "${apt_opts[@]}" install -y --no-install-recommends "${packages[@]}"
echo "slurm: installed ($(slurmctld -V))"
