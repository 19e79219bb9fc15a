#!/usr/bin/env bash
# Installs everything the test suite needs, then nothing else:
#   - fairgauge with its test extras (pytest, scikit-learn, textstat, playwright, hypothesis);
#   - Debian's chromium for the browser tests (Playwright's own browser download is not used);
#   - Debian's postgresql for the database tests (they start and stop their own throwaway server);
#   - axe-core from npm, for the accessibility checks (into ./node_modules, not saved anywhere else).
set -euo pipefail
cd "$(dirname "$0")/.."
SUDO=""
if [ "$(id -u)" != 0 ]; then SUDO="sudo"; fi
pip install -e ".[test]"
missing=()
command -v chromium >/dev/null 2>&1 || missing+=(chromium)
command -v npm >/dev/null 2>&1 || missing+=(npm)
ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1 || missing+=(postgresql)
if [ ${#missing[@]} -gt 0 ]; then
  $SUDO apt-get update
  $SUDO apt-get install -y --no-install-recommends "${missing[@]}"
fi
if [ ! -f node_modules/axe-core/axe.min.js ]; then
  npm install --no-save --no-package-lock --no-audit --no-fund axe-core@4.10
fi
