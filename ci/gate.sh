#!/usr/bin/env bash
# loopvet as a merge gate: check the fleet, keep the report, publish the summary, and exit
# with loopvet's own code so the pipeline step fails exactly when a merge should wait.
#
#   bash ci/gate.sh [PATH...]          (records or folders; default designs/)
#
# Environment (all optional):
#   LOOPVET            how to run loopvet (default: loopvet, else python3 -m loopvet)
#   LOOPVET_OUT        report folder to keep as an artefact (default reports/latest)
#   LOOPVET_BASELINE   approved baseline (default reports/baseline.json, when it exists)
#   LOOPVET_HTML=0     skip the HTML report (JUnit XML and summary.md are still written)
#   LOOPVET_DRIFT=warn let exit 4 (drift against the approved baseline) pass with a warning
#
# Exit codes are loopvet check's: 0 pass, 1 a requirement not met, 2 usage or unusable
# baseline, 3 an invalid record, 4 drift (a metric degraded, or a record changed without a
# revision bump). summary.md is appended to $GITHUB_STEP_SUMMARY when that is set.
set -uo pipefail

out=${LOOPVET_OUT:-reports/latest}
if [ -n "${LOOPVET:-}" ]; then
  read -r -a run <<< "$LOOPVET"
elif command -v loopvet >/dev/null 2>&1; then
  run=(loopvet)
else
  run=(python3 -m loopvet)
fi
args=(check "$@" --out "$out")
if [ -n "${LOOPVET_BASELINE:-}" ]; then args+=(--baseline "$LOOPVET_BASELINE"); fi
if [ "${LOOPVET_HTML:-1}" = 0 ]; then args+=(--no-html); fi

"${run[@]}" "${args[@]}"
code=$?

if [ -n "${GITHUB_STEP_SUMMARY:-}" ] && [ -f "$out/summary.md" ]; then
  cat "$out/summary.md" >> "$GITHUB_STEP_SUMMARY"
fi
case $code in
  0) echo "loopvet gate: passed" >&2 ;;
  1) echo "loopvet gate: a requirement is not met; see $out/index.html" >&2 ;;
  2) echo "loopvet gate: usage error or unusable baseline (see the message above)" >&2 ;;
  3) echo "loopvet gate: a record is invalid; see $out/index.html" >&2 ;;
  4) if [ "${LOOPVET_DRIFT:-fail}" = warn ]; then
       echo "loopvet gate: drift against the approved baseline, allowed by LOOPVET_DRIFT=warn" >&2
       code=0
     else
       echo "loopvet gate: drift against the approved baseline; review it in $out/index.html," \
            "then run 'loopvet approve' in the pull request if it is intended" >&2
     fi ;;
esac
exit $code
