#!/usr/bin/env bash
# Install headless Chromium (Debian package) for tests/report_browser.rs, only when missing.
set -euo pipefail
if [ -x /usr/bin/chromium ]; then
    exit 0
fi
SUDO=""
if [ "$(id -u)" != 0 ] && command -v sudo >/dev/null 2>&1; then
    SUDO="sudo"
fi
export DEBIAN_FRONTEND=noninteractive
$SUDO apt-get update -q
$SUDO apt-get install -y -q --no-install-recommends chromium
