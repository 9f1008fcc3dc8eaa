#!/usr/bin/env bash
# A CI job step: wait for a calibration to finish, keep its posterior and report as job
# artifacts, and fail the job unless it converged.
#
# Needs the honing command line on PATH (pip install honing) and, in the job's environment:
#   HONING_URL, HONING_TOKEN   where the server is and the calibration's token
#   HONING_ID                  the calibration to wait for
# Optional: HONING_WAIT_SECONDS (default 3600), ARTIFACTS (default ./calibration-artifacts).
#
# A converged calibration still gives estimates conditional on the model and the data: the
# job that consumes them should compare against independent measurements.
set -uo pipefail

: "${HONING_URL:?set HONING_URL}" "${HONING_TOKEN:?set HONING_TOKEN}" "${HONING_ID:?set HONING_ID}"
artifacts=${ARTIFACTS:-calibration-artifacts}
mkdir -p "$artifacts"

honing status "$HONING_ID" --wait --timeout "${HONING_WAIT_SECONDS:-3600}" --interval 10
rc=$?

# Keep whatever exists, converged or not: it helps to see why a calibration stalled.
honing posterior "$HONING_ID" >"$artifacts/posterior.txt" || true
honing posterior "$HONING_ID" --json >"$artifacts/posterior.json" || true
honing runs "$HONING_ID" -o "$artifacts/runs.csv" || true
honing report "$HONING_ID" -o "$artifacts/report.html" || true

case $rc in
    0)
        echo "calibration $HONING_ID converged; artifacts in $artifacts"
        exit 0
        ;;
    3) echo "calibration $HONING_ID used its run budget without converging" >&2 ;;
    4) echo "calibration $HONING_ID still running after ${HONING_WAIT_SECONDS:-3600} s" >&2 ;;
    5) echo "calibration $HONING_ID failed on the server" >&2 ;;
    *) echo "could not read the status of calibration $HONING_ID (exit $rc)" >&2 ;;
esac
exit 1
