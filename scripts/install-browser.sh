#!/usr/bin/env bash
# Installs Debian's chromium for the browser tests (tests/e2e) when it is missing and this
# machine allows it: as root, or through sudo without a password, with apt. Never downloads a
# browser from anywhere else. Quiet, and a fast no-op when chromium is already there.
#
# When chromium cannot be installed this says why and exits 0: the browser tests then skip
# with that reason, except under CI=true, where they fail (CI must run them).
set -u

BROWSER="${LABBOOK_CHROMIUM:-/usr/bin/chromium}"

if [ -x "$BROWSER" ]; then
  exit 0
fi

say() {
  echo "install-browser: $*" >&2
}

if ! command -v apt-get >/dev/null 2>&1; then
  say "no $BROWSER and no apt-get here; install Debian's 'chromium' package (or set"
  say "LABBOOK_CHROMIUM to a Chromium binary) to run the browser tests. They skip until then."
  exit 0
fi

if [ "$(id -u)" = "0" ]; then
  AS_ROOT=()
elif command -v sudo >/dev/null 2>&1 && sudo -n true >/dev/null 2>&1; then
  AS_ROOT=(sudo -n)
else
  say "no $BROWSER, and installing it needs root: run 'sudo apt-get install chromium'"
  say "to run the browser tests. They skip until then."
  exit 0
fi

export DEBIAN_FRONTEND=noninteractive
install() {
  "${AS_ROOT[@]}" apt-get install -y -qq --no-install-recommends chromium >/dev/null 2>&1
}

# An empty or stale package list is the usual reason the package is "not found".
if ! install; then
  "${AS_ROOT[@]}" apt-get update -qq >/dev/null 2>&1 || true
  if ! install; then
    say "apt-get could not install 'chromium'; the browser tests skip until it is installed."
    exit 0
  fi
fi

if [ -x "$BROWSER" ]; then
  say "installed Debian's chromium for the browser tests."
else
  say "the 'chromium' package is installed but $BROWSER is missing; the browser tests skip."
fi
exit 0
