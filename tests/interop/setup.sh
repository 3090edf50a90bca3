#!/usr/bin/env bash
# Stand up an independent TAP server (Debian's DaCHS on PostgreSQL + pgSphere) on 127.0.0.1
# for tests/interop.  Idempotent: a second run reuses the packages, the database, the imported
# table and a server that already answers.  Needs root (apt-get, su).  Stop it with stop.sh.
#
# It never takes over a DaCHS it did not install: an installation found without this script's
# marker is left exactly as it is (no configuration written, no restart), and the script exits
# with status 3, saying why; scripts/test then skips the interop tests with that reason.
# `setup.sh --check` only says whose installation is there (ours, foreign, absent) and changes
# nothing.
#
# Environment: JOBDESK_INTEROP_PORT (default 8791).  Prints the TAP URL on its last line.
set -euo pipefail

HERE="$(cd "$(dirname "$0")" && pwd)"
PORT="${JOBDESK_INTEROP_PORT:-8791}"
TAP_URL="http://127.0.0.1:${PORT}/tap"
RD_SRC="$HERE/rd/q.rd"
RD_DIR=/var/gavo/inputs/driftcat
STATE_DIR="${JOBDESK_INTEROP_STATE:-/tmp/jobdesk-interop}"   # what we started, for stop.sh
export DEBIAN_FRONTEND=noninteractive
# Written when this script installs DaCHS (or finds the configuration it wrote itself): the
# proof that the installation is ours to configure and restart.
MARKER="${JOBDESK_INTEROP_MARKER:-/var/lib/jobdesk-interop/installed-by-setup.sh}"
GAVO_RC="${JOBDESK_INTEROP_GAVO_RC:-/etc/gavo.rc}"
OUR_HEADER="# written by jobdesk tests/interop/setup.sh"

log() { echo "[interop setup +${SECONDS}s] $*" >&2; }
die() { echo "[interop setup] FAILED: $*" >&2; exit 1; }

# --- 0. whose DaCHS is this? ------------------------------------------------------------------
dachs_installed() {
    [[ -f "$GAVO_RC" ]] || { dpkg -s gavodachs2-server 2>/dev/null | grep -q '^Status: install ok installed'; }
}
ownership() {   # ours | foreign | absent
    if [[ -f "$MARKER" ]]; then echo ours
    elif [[ -f "$GAVO_RC" ]] && [[ "$(head -1 "$GAVO_RC")" == "$OUR_HEADER" ]]; then echo ours
    elif dachs_installed; then echo foreign
    else echo absent
    fi
}
owner="$(ownership)"
if [[ "${1:-}" == "--check" ]]; then
    echo "$owner"
    exit 0
fi
if [[ "$owner" == foreign ]]; then
    echo "[interop setup] SKIPPED: a DaCHS installation not made by this script is on this machine" \
         "(no $MARKER, and $GAVO_RC was not written by it); it is left untouched. Run the interop" \
         "tests on a machine without DaCHS, or point them at that server yourself with" \
         "JOBDESK_INTEROP_PORT if it serves the test table." >&2
    exit 3
fi
mark_ours() { mkdir -p "$(dirname "$MARKER")" && echo "installed by jobdesk tests/interop/setup.sh" > "$MARKER"; }
[[ "$owner" == ours ]] && [[ ! -f "$MARKER" ]] && mark_ours

mkdir -p "$STATE_DIR"

# --- DaCHS configuration, written before the package is installed: its post-install step may
#     try to start the server, and must then already bind to loopback on our port.
write_gavo_rc() {
    local want
    want="$(cat <<EOF
# written by jobdesk tests/interop/setup.sh
[web]
bindAddress: 127.0.0.1
serverPort: ${PORT}
serverURL: http://127.0.0.1:${PORT}
sitename: jobdesk interop test server
[async]
maxTAPRunning: 3
defaultExecTime: 600
EOF
)"
    if [[ ! -f "$GAVO_RC" ]] || [[ "$(cat "$GAVO_RC")" != "$want" ]]; then
        printf '%s\n' "$want" > "$GAVO_RC"
        log "wrote $GAVO_RC (port $PORT)"
        return 0
    fi
    return 1
}

apt_updated=0
apt_install() {
    if [[ $apt_updated == 0 ]]; then
        log "apt-get update"
        apt-get update -q >/dev/null
        apt_updated=1
    fi
    log "apt-get install $*"
    apt-get install -y -q --no-install-recommends "$@" >"$STATE_DIR/apt.log" 2>&1
}

pg_cluster() {   # "<version> <name>" of the first PostgreSQL cluster
    pg_lsclusters -h 2>/dev/null | awk 'NR==1 {print $1, $2}'
}

start_postgres() {
    local ver name
    read -r ver name <<<"$(pg_cluster)"
    [[ -n "${ver:-}" ]] || die "no PostgreSQL cluster found (pg_lsclusters is empty)"
    if pg_lsclusters -h | awk -v v="$ver" -v n="$name" '$1==v && $2==n {print $4}' | grep -q online; then
        return 0
    fi
    # A kill -9 leaves postmaster.pid behind; pg_ctl copes when its process is gone, but a
    # pid reused by another process would block the start, so drop it when no postgres owns it.
    local pidfile="/var/lib/postgresql/$ver/$name/postmaster.pid"
    if [[ -f "$pidfile" ]]; then
        local pid; pid="$(head -1 "$pidfile")"
        if ! ps -p "$pid" -o comm= 2>/dev/null | grep -q postgres; then
            log "removing stale $pidfile"
            rm -f "$pidfile"
        fi
    fi
    log "starting PostgreSQL $ver/$name"
    pg_ctlcluster "$ver" "$name" start
    echo "$ver $name" > "$STATE_DIR/started-postgres"
}

# --- 1. packages: PostgreSQL first (DaCHS's post-install needs a running database) ---------
# Debian 12's pgSphere 1.1.1 cannot be created on PostgreSQL 15.19 or later ("commutator
# operator @> is already the commutator of operator <@", measured here with 15.20 from the
# security suite), and installing DaCHS would pull that upgrade in. Keep PostgreSQL at the
# release suite's version (15.18, what this machine image carries).
cat > /etc/apt/preferences.d/jobdesk-interop-postgresql <<'PIN'
Package: postgresql-15 postgresql-client-15
Pin: release l=Debian-Security
Pin-Priority: -1
PIN
mark_ours   # from here on the installation is this script's (absent before, or ours already)
if write_gavo_rc; then touch "$STATE_DIR/config-changed"; fi
if ! command -v pg_ctlcluster >/dev/null || [[ -z "$(pg_cluster)" ]]; then
    apt_install postgresql
fi
start_postgres

pgver="$(pg_cluster | awk '{print $1}')"
if ! dpkg -s gavodachs2-server >/dev/null 2>&1 \
        || ! dpkg -s gavodachs2-server | grep -q '^Status: install ok installed'; then
    if ! apt_install "postgresql-${pgver}-pgsphere" gavodachs2-server; then
        log "package configuration failed (see $STATE_DIR/apt.log); finishing it by hand"
        start_postgres
        dpkg --configure -a >>"$STATE_DIR/apt.log" 2>&1 || die "dpkg --configure -a failed; see $STATE_DIR/apt.log"
    fi
fi
command -v dachs >/dev/null || die "dachs is not installed"

# --- 2. DaCHS's own database state (the post-install runs 'dachs init'; it cannot be re-run) --
psql_gavo() { su postgres -c "psql -XtAq -d gavo -c \"$1\"" 2>/dev/null; }
if [[ "$(psql_gavo "select 1 from pg_namespace where nspname='dc'")" != "1" ]]; then
    log "DaCHS database missing: creating it"
    su postgres -c "createdb --encoding=UTF-8 --template template0 gavo" 2>/dev/null || true
    su postgres -c "createuser -s dachsroot" 2>/dev/null || true
    mkdir -p /var/gavo && chown dachsroot /var/gavo
    (cd /tmp && su dachsroot -c "dachs init") || die "dachs init failed"
fi
if ! dachs --version | grep -Eq 'Schema \(([0-9]+)/\1\)'; then
    log "dachs upgrade (schema behind the software)"
    (cd /tmp && su dachsroot -c "dachs upgrade") || die "dachs upgrade failed"
fi

# --- 3. the invented table: import when the descriptor changed or the table is not complete --
reimported=0
rd_sum="$(sha256sum "$RD_SRC" | cut -d' ' -f1)"
have_rows="$(psql_gavo "select count(*) from driftcat.objects" || true)"
if [[ "$(cat "$RD_DIR/.imported.sha256" 2>/dev/null)" != "$rd_sum" || "$have_rows" != "20000" ]]; then
    log "importing the invented catalogue (dachs imp)"
    mkdir -p "$RD_DIR"
    cp "$RD_SRC" "$RD_DIR/q.rd"
    chown -R dachsroot:gavo "$RD_DIR"
    (cd "$RD_DIR" && su dachsroot -c "dachs imp q") >"$STATE_DIR/import.log" 2>&1 \
        || { cat "$STATE_DIR/import.log" >&2; die "dachs imp failed"; }
    [[ "$(psql_gavo "select count(*) from driftcat.objects")" == "20000" ]] \
        || die "import finished but driftcat.objects does not hold 20000 rows"
    echo "$rd_sum" > "$RD_DIR/.imported.sha256"
    reimported=1
fi

# --- 4. the server --------------------------------------------------------------------------
available() { curl -sf --max-time 5 "$TAP_URL/availability" 2>/dev/null | grep -q '<avl:available>true'; }

if available && [[ $reimported == 0 ]] && [[ ! -f "$STATE_DIR/config-changed" ]]; then
    log "DaCHS already serving $TAP_URL"
else
    pidfile=/var/gavo/state/web.pid
    if [[ -f "$pidfile" ]]; then
        pid="$(cat "$pidfile" 2>/dev/null || true)"
        if [[ -n "$pid" ]] && ps -p "$pid" -o args= 2>/dev/null | grep -q 'dachs'; then
            log "stopping the running DaCHS (pid $pid) to pick up new data or settings"
            (cd /tmp && dachs serve stop) || kill "$pid" || true
            for _ in $(seq 1 50); do ps -p "$pid" >/dev/null 2>&1 || break; sleep 0.2; done
        fi
        # stale after a kill -9: DaCHS refuses to start while the file names a live pid
        if [[ -f "$pidfile" ]] && ! ps -p "$(cat "$pidfile" 2>/dev/null || echo 0)" -o args= 2>/dev/null | grep -q dachs; then
            log "removing stale $pidfile"
            rm -f "$pidfile"
        fi
    fi
    log "starting DaCHS on 127.0.0.1:$PORT"
    (cd /tmp && dachs serve start) >"$STATE_DIR/serve.log" 2>&1 || { cat "$STATE_DIR/serve.log" >&2; die "dachs serve start failed"; }
    touch "$STATE_DIR/started-dachs"
    rm -f "$STATE_DIR/config-changed"
    for _ in $(seq 1 120); do available && break; sleep 0.5; done
    available || { tail -30 /var/gavo/logs/dcErrors 2>/dev/null >&2 || true; die "DaCHS did not answer at $TAP_URL/availability within 60 s"; }
fi
log "ready"
echo "$TAP_URL"
