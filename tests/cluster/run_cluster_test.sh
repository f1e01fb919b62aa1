#!/usr/bin/env bash
# The cluster test (CI step after `make test`; a few minutes). On a fresh Debian machine, as root:
#   1. installs what is missing from Debian's packages (slurmctld slurmd slurm-client munge postgresql) and
#      the cluster extra into .venv (pip install -e '.[cluster]');
#   2. starts a single-node SLURM cluster, PostgreSQL and an MLflow server on it, all on 127.0.0.1 under a
#      scratch folder (tests/cluster/services.sh);
#   3. runs tests/cluster (pytest): the tiny experiment through `shiftgrid run --profile slurm` into the
#      server, compared with a local SQLite run, and the rest (see tests/cluster/test_cluster.py);
#   4. stops everything it started and removes the scratch folder, also when a step fails.
# Exit status: pytest's. A piece the machine cannot run is named with the reason (NOT AVAILABLE: ...), and
# the tests needing it are reported as skipped with that reason; none is passed silently.
set -uo pipefail
cd "$(dirname "$0")/../.."
PY=.venv/bin/python
STARTED=$(date +%s)
SCRATCH=$(mktemp -d /tmp/shiftgrid-cluster.XXXXXX)
chmod 755 "$SCRATCH"  # munge and postgres users must reach their folders inside it
cleanup() { bash tests/cluster/services.sh stop "$SCRATCH"; rm -rf "$SCRATCH"; }
trap cleanup EXIT
say() { echo "[cluster test] $*"; }

# 1. Install. Failures are reported here and turn into skip reasons in step 2.
missing_packages=()
command -v slurmctld >/dev/null || missing_packages+=(slurmctld)
command -v slurmd >/dev/null || missing_packages+=(slurmd)
command -v sbatch >/dev/null || missing_packages+=(slurm-client)
command -v munged >/dev/null || missing_packages+=(munge)
ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1 || missing_packages+=(postgresql)
if [ ${#missing_packages[@]} -gt 0 ]; then
    if [ "$(id -u)" != 0 ] || ! command -v apt-get >/dev/null; then
        say "NOT INSTALLED: ${missing_packages[*]} (needs root and apt-get)"
    else
        say "installing from Debian's packages: ${missing_packages[*]}"
        (apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends \
            "${missing_packages[@]}" >"$SCRATCH/apt.log" 2>&1) \
            || say "NOT INSTALLED: ${missing_packages[*]}: $(tail -n 3 "$SCRATCH/apt.log" | tr '\n' ' ')"
        # Debian starts a freshly installed service where it can: the test runs its own, so stop those
        # (only the ones installed just now; the package names are the service names).
        for service in "${missing_packages[@]}"; do
            [ "$service" = slurm-client ] || { command -v service >/dev/null && service "$service" stop >/dev/null 2>&1; }
        done
    fi
fi
if ! "$PY" -m pip install --quiet -e '.[cluster]' >"$SCRATCH/pip.log" 2>&1; then
    say "NOT INSTALLED: the cluster extra: $(tail -n 3 "$SCRATCH/pip.log" | tr '\n' ' ')"
fi

# 2. Services.
bash tests/cluster/services.sh start "$SCRATCH"
# shellcheck disable=SC1091
source "$SCRATCH/env"
say "services ready after $(($(date +%s) - STARTED)) s"

# 3. Tests: -rs prints every skip with its reason; the runs inside have their own hard limits.
# Its own --basetemp: other pytest sessions on the machine prune the shared one.
timeout -s KILL 1500 "$PY" -m pytest -p no:cacheprovider --basetemp "$SCRATCH/pytest" -v -s -rs --durations=0 tests/cluster
status=$?
say "finished in $(($(date +%s) - STARTED)) s, pytest exit status $status"
exit $status
