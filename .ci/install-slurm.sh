#!/usr/bin/env bash
# Install the Debian packages that tests/slurm_cluster.py runs: a one-node SLURM
# (controller, compute daemon, accounting daemon, client commands), munge for
# authentication and MariaDB for the accounting database.
#
# Idempotent: exits 0 at once when every package is installed. Quiet: prints one
# line, or the tail of apt's output when the install fails. Needs root.
# Used by .ci/run before the tests.
set -euo pipefail

packages=(munge slurmctld slurmd slurm-client slurmdbd mariadb-server)

missing=()
for pkg in "${packages[@]}"; do
    status=$(dpkg-query -W -f='${db:Status-Status}' "$pkg" 2>/dev/null || true)
    [ "$status" = installed ] || missing+=("$pkg")
done
if [ "${#missing[@]}" -eq 0 ]; then
    echo "install-slurm: already installed: ${packages[*]}"
    exit 0
fi
if [ "$(id -u)" -ne 0 ]; then
    echo "install-slurm: must run as root to install: ${missing[*]}" >&2
    exit 1
fi

export DEBIAN_FRONTEND=noninteractive
# The harness starts its own daemons; keep the packages' maintainer scripts from
# starting system-wide munged/mariadbd/slurm* (a policy-rc.d that says no), unless
# the machine already has such a policy.
policy=/usr/sbin/policy-rc.d
cleanup=()
if [ ! -e "$policy" ]; then
    printf '#!/bin/sh\nexit 101\n' >"$policy"
    chmod 755 "$policy"
    cleanup+=("$policy")
fi
log=$(mktemp)
cleanup+=("$log")
trap 'rm -f "${cleanup[@]}"' EXIT

start=$SECONDS
if ! {
    timeout 900 apt-get update -qq &&
        timeout 1200 apt-get install -y -qq --no-install-recommends -o Dpkg::Use-Pty=0 \
            "${missing[@]}"
} >"$log" 2>&1; then
    echo "install-slurm: apt-get failed installing ${missing[*]}; last lines:" >&2
    tail -n 40 "$log" >&2
    exit 1
fi
echo "install-slurm: installed ${missing[*]} in $((SECONDS - start)) s"
