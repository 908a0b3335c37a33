#!/usr/bin/env bash
# Install headless Chromium (Debian package) for tests/report_browser.rs, only when missing.
set -euo pipefail
if [ -x /usr/bin/chromium ]; then
    exit 0
fi
export DEBIAN_FRONTEND=noninteractive
apt-get update -q
apt-get install -y -q --no-install-recommends chromium
