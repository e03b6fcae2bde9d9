#!/usr/bin/env bash
# Installs Debian's SLURM, munge, slurmdbd and MariaDB packages where they are missing, for the slow tier's single-node
# cluster (tests/slurm_cluster.py). Needs root and apt-get; exits non-zero with one line otherwise.
# Nothing is started or enabled here: the test fixture runs its own private daemons.
set -euo pipefail
need=()
# slurmdbd and MariaDB: job accounting, which sacct (and so submitit's job states) reads.
for pair in slurmctld:slurmctld slurmd:slurmd sinfo:slurm-client munged:munge slurmdbd:slurmdbd \
            mariadbd:mariadb-server; do
  command -v "${pair%%:*}" >/dev/null 2>&1 || need+=("${pair#*:}")
done
[ ${#need[@]} -eq 0 ] && exit 0
if [ "$(id -u)" != 0 ]; then echo "setup_slurm: need root to install ${need[*]}" >&2; exit 1; fi
command -v apt-get >/dev/null || { echo "setup_slurm: no apt-get to install ${need[*]}" >&2; exit 1; }
export DEBIAN_FRONTEND=noninteractive
# policy-rc.d 101: the packages' postinst must not start system-wide daemons; the tests start their own.
policy=/usr/sbin/policy-rc.d
made_policy=0
if [ ! -e "$policy" ]; then printf '#!/bin/sh\nexit 101\n' >"$policy"; chmod +x "$policy"; made_policy=1; fi
trap '[ $made_policy = 1 ] && rm -f "$policy"' EXIT
# Refresh the package lists only when one of the packages is not known to them yet.
for pkg in "${need[@]}"; do apt-cache show "$pkg" >/dev/null 2>&1 || { apt-get update -qq; break; }; done
apt-get install -y -qq --no-install-recommends "${need[@]}" >/dev/null
