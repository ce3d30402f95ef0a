#!/bin/sh
# The container's entrypoint.
#   serve [ARGS...]   start steps, then `evenhand serve ARGS...` (the API):
#                     1. `evenhand migrate` (unless EVENHAND_MIGRATE_ON_START=false): a failed
#                        migration stops the container before it serves anything;
#                     2. an empty PROMETHEUS_MULTIPROC_DIR (the workers' metric files).
#   jobs|log|audit|keys|policy|migrate|... [ARGS...]   `evenhand` with these arguments, no
#                     start steps (the job runner waits for the API, which migrates).
#   anything else     run as given (e.g. `sh`).
set -eu

if [ "$#" -eq 0 ]; then
    set -- serve
fi

case "$1" in
    serve)
        shift
        if [ "${EVENHAND_MIGRATE_ON_START:-true}" != "false" ]; then
            echo "evenhand-entrypoint: migrating the database" >&2
            evenhand migrate
        fi
        if [ -n "${PROMETHEUS_MULTIPROC_DIR:-}" ]; then
            mkdir -p "$PROMETHEUS_MULTIPROC_DIR"
            find "$PROMETHEUS_MULTIPROC_DIR" -mindepth 1 -maxdepth 1 -name '*.db' -delete
        fi
        echo "evenhand-entrypoint: starting the API" >&2
        exec evenhand serve "$@"
        ;;
    -*|jobs|log|audit|keys|policy|migrate|report|warnings|schema|derive|demo|demo-data)
        exec evenhand "$@"
        ;;
    *)
        exec "$@"
        ;;
esac
