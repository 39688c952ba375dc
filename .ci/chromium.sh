#!/bin/sh
# Install Debian's chromium when it is missing; tests/test_report.py renders the HTML
# report with it.  Tolerant of failure: without chromium that one test skips and says
# why, so this script always exits 0.
if command -v chromium >/dev/null 2>&1; then
    exit 0
fi
if [ "$(id -u)" -eq 0 ]; then
    SUDO=""
elif command -v sudo >/dev/null 2>&1; then
    SUDO="sudo -n"
else
    echo "chromium.sh: not root and no sudo; chromium not installed (the browser test will skip)" >&2
    exit 0
fi
if ! command -v apt-get >/dev/null 2>&1; then
    echo "chromium.sh: no apt-get here; chromium not installed (the browser test will skip)" >&2
    exit 0
fi
( $SUDO apt-get update && DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y chromium ) \
    || echo "chromium.sh: installing chromium failed (the browser test will skip)" >&2
exit 0
