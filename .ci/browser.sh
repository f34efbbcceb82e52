#!/usr/bin/env bash
# Install Debian's chromium (and one font family, so the screenshot shows text) for the
# report's browser test, tests/test_report_browser.py, unless a chromium is already on
# PATH. Needs apt-get (as root, or through sudo); elsewhere it says so and the browser
# test skips with its reason.
set -euo pipefail

if command -v chromium >/dev/null 2>&1 || command -v chromium-browser >/dev/null 2>&1; then
    exit 0
fi
if ! command -v apt-get >/dev/null 2>&1; then
    echo ".ci/browser.sh: no apt-get here; the browser test will be skipped" >&2
    exit 0
fi
SUDO=""
if [ "$(id -u)" -ne 0 ]; then
    SUDO="sudo"
fi
$SUDO apt-get update -qq
$SUDO env DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends chromium fonts-liberation
chromium --version
