#!/usr/bin/env bash
# Install Debian's chromium for the report's browser test (tests/test_report_browser.py).
# Idempotent: returns at once when /usr/bin/chromium is already there.
set -euo pipefail
if [ -x /usr/bin/chromium ]; then
    echo "chromium already installed: $(/usr/bin/chromium --version 2>/dev/null || echo unknown version)"
    exit 0
fi
SUDO=""
if [ "$(id -u)" -ne 0 ]; then SUDO="sudo"; fi
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -qq
$SUDO apt-get install -y -qq --no-install-recommends chromium fonts-dejavu-core > /dev/null
echo "installed: $(/usr/bin/chromium --version 2>/dev/null || echo chromium)"
