#!/usr/bin/env bash
# System packages the test suite needs beyond Python's own. Installs them with
# apt-get when they are missing and we may (root, Debian/Ubuntu); otherwise says
# what is missing and lets the tests that need it skip with that reason.
set -euo pipefail

# chromium + chromium-driver: tests/test_service_browser.py drives the review page headless with Selenium.
# strace: tests/test_durability.py traces real commands to check the order of fsync and rename.
needed=(chromium chromium-driver strace)

missing=()
for pkg in "${needed[@]:-}"; do
    [ -z "$pkg" ] && continue
    dpkg -s "$pkg" >/dev/null 2>&1 || missing+=("$pkg")
done
if [ ${#missing[@]} -eq 0 ]; then
    exit 0
fi
if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
    apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq --no-install-recommends "${missing[@]}"
else
    echo "system-deps: missing ${missing[*]}; tests that need them will be skipped" >&2
fi
