#!/usr/bin/env bash
# Stop what tests/interop/setup.sh started (DaCHS, and PostgreSQL if setup started it); safe to
# run when nothing was started.  Never fails: it runs from an exit trap.
STATE_DIR="${JOBDESK_INTEROP_STATE:-/tmp/jobdesk-interop}"
log() { echo "[interop stop] $*" >&2; }

if [[ -f "$STATE_DIR/started-dachs" ]]; then
    log "stopping DaCHS"
    (cd /tmp && timeout 30 dachs serve stop) >/dev/null 2>&1 || log "dachs serve stop failed"
    rm -f "$STATE_DIR/started-dachs"
fi
if [[ -f "$STATE_DIR/started-postgres" ]]; then
    read -r ver name < "$STATE_DIR/started-postgres"
    log "stopping PostgreSQL $ver/$name"
    timeout 60 pg_ctlcluster "$ver" "$name" stop >/dev/null 2>&1 || log "pg_ctlcluster stop failed"
    rm -f "$STATE_DIR/started-postgres"
fi
exit 0
