#!/usr/bin/env bash
# Installs Debian's chromium for the browser tests when it is missing (placeholder; see issue 8).
exit 0
