#!/bin/sh
# Audit the slice timing of a BIDS dataset in any CI: a JUnit XML report for the CI's test
# view and an HTML report to keep as an artifact. POSIX sh; needs Python 3.10 or newer.
#
#   sh slicetime-audit.sh [DATASET]          (default: the current folder)
#
# Environment (all optional):
#   SLICETIME_SPEC     what pip installs when no slicetime command is on PATH
#                      (default: slicetime-bids; a checkout's path works too)
#   SLICETIME_VENV     where that install goes (default: .slicetime-venv)
#   SLICETIME_REPORTS  folder for audit.xml and audit.html (default: <dataset>-slicetime-reports
#                      beside the dataset: slicetime writes no report inside a dataset)
#   SLICETIME_FAIL_ON  error, warning or never (default: error)
#   PYTHON             the Python that makes the environment (default: python3)
#
# Exit status: slicetime's own (0 clean, 1 a finding at or above SLICETIME_FAIL_ON,
# 2 bad usage or an unreadable path); the reports are written in every case.
set -u

dataset=${1:-.}
whole=$(cd "$dataset" && pwd) || exit 2
reports=${SLICETIME_REPORTS:-$whole-slicetime-reports}
fail_on=${SLICETIME_FAIL_ON:-error}

if command -v slicetime >/dev/null 2>&1 && [ -z "${SLICETIME_SPEC:-}" ]; then
    slicetime=slicetime
else
    venv=${SLICETIME_VENV:-.slicetime-venv}
    "${PYTHON:-python3}" -m venv "$venv" || exit 2
    "$venv/bin/python" -m pip install --quiet "${SLICETIME_SPEC:-slicetime-bids}" || exit 2
    slicetime=$venv/bin/slicetime
fi

mkdir -p "$reports" || exit 2
"$slicetime" audit "$dataset" --format junit --output "$reports/audit.xml" \
    --html "$reports/audit.html" --fail-on "$fail_on" --no-progress
status=$?
echo "slicetime: exit $status; reports: $reports/audit.xml (JUnit), $reports/audit.html"
exit "$status"
