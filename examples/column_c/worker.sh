#!/usr/bin/env bash
# A honing worker with no Python: curl speaks HTTP, jq reads and writes JSON, and the C column
# model (column.c, built next to this script) evaluates each leased point.
#
#   HONING_URL=http://127.0.0.1:8750 ./worker.sh SPEC.json
#       creates a calibration from SPEC.json, prints "<id> <token>" on stdout, then works on it
#   HONING_URL=... HONING_ID=<id> HONING_TOKEN=<token> ./worker.sh
#       works on an existing calibration
#
# Exits 0 once the calibration converged, 3 when its run budget is used up, 5 if it failed,
# 1 on an error (the server's problem title and detail on stderr). COLUMN_MODEL names the
# model binary (default: ./column beside this script, else column.c built with cc for this run).
set -euo pipefail

here=$(cd "$(dirname "$0")" && pwd)
url=${HONING_URL:-http://127.0.0.1:8750}
model=${COLUMN_MODEL:-$here/column}
name=${HONING_WORKER:-curl-$(hostname)-$$}
token=${HONING_TOKEN:-}
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT

if [ ! -x "$model" ]; then
    model=$tmp/column
    cc -O2 -o "$model" "$here/column.c" -lm
fi

# call METHOD PATH [BODY|@FILE]: the answer goes to $tmp/body and its headers to $tmp/headers.
# Connection errors, 429 and 5xx are retried (honouring Retry-After); other errors end the
# script with the problem document's title and detail.
call() {
    local method=$1 path=$2 data=${3:-} code wait tries=0
    local args=(-sS -X "$method" -D "$tmp/headers" -o "$tmp/body" -w '%{http_code}'
        -H 'Accept: application/json')
    if [ -n "$token" ]; then args+=(-H "Authorization: Bearer $token"); fi
    if [ -n "$data" ]; then args+=(-H 'Content-Type: application/json' --data-binary "$data"); fi
    while true; do
        code=$(curl "${args[@]}" "$url$path" 2>"$tmp/curl.err") || code=000
        case $code in
            2??) return 0 ;;
            000 | 429 | 5??)
                tries=$((tries + 1))
                if [ "$tries" -gt 30 ]; then
                    echo "worker.sh: giving up on $method $path (HTTP $code $(cat "$tmp/curl.err"))" >&2
                    exit 1
                fi
                wait=$(retry_after)
                sleep "${wait:-2}"
                ;;
            *)
                echo "worker.sh: $(jq -r '"\(.title) (\(.status)): \(.detail)"' "$tmp/body" 2>/dev/null ||
                    echo "HTTP $code")" >&2
                exit 1
                ;;
        esac
    done
}

retry_after() {
    tr -d '\r' <"$tmp/headers" 2>/dev/null | awk -F': *' 'tolower($1) == "retry-after" { print $2 }'
}

if [ -z "${HONING_ID:-}" ]; then
    spec=${1:?usage: worker.sh SPEC.json (or set HONING_ID and HONING_TOKEN)}
    call POST /v1/calibrations "@$spec"
    id=$(jq -r .id "$tmp/body")
    token=$(jq -r .token "$tmp/body")
    echo "$id $token"
else
    id=$HONING_ID
    : "${token:?set HONING_TOKEN with HONING_ID}"
fi

lease=$(jq -nc --arg w "$name" '{count: 1, worker: $w, lease_seconds: 600}')
done_runs=0
failed_runs=0
while true; do
    call POST "/v1/calibrations/$id/runs" "$lease"
    if [ "$(jq '.runs | length' "$tmp/body")" -eq 0 ]; then
        status=$(jq -r .status "$tmp/body")
        case $status in
            converged) code=0 ;;
            budget_exhausted) code=3 ;;
            failed) code=5 ;;
            *)
                wait=$(retry_after)
                sleep "${wait:-1}"
                continue
                ;;
        esac
        echo "worker.sh: $status after $done_runs runs done, $failed_runs failed" >&2
        exit "$code"
    fi
    run_id=$(jq -r '.runs[0].run_id' "$tmp/body")
    read -r velocity dispersivity retardation decay < <(jq -r \
        '.runs[0].parameters | "\(.velocity) \(.dispersivity) \(.retardation) \(.decay)"' "$tmp/body")
    if "$model" "$velocity" "$dispersivity" "$retardation" "$decay" >"$tmp/outputs.json" 2>"$tmp/stderr"; then
        jq -c '{outputs: .}' "$tmp/outputs.json" >"$tmp/result.json"
        done_runs=$((done_runs + 1))
    else
        rc=$?
        jq -nc --arg e "column exited with status $rc: $(tail -c 2000 "$tmp/stderr")" \
            '{error: $e}' >"$tmp/result.json"
        failed_runs=$((failed_runs + 1))
    fi
    call PUT "/v1/calibrations/$id/runs/$run_id" "@$tmp/result.json"
done
