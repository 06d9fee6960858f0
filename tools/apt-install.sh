#!/usr/bin/env bash
# Install Debian packages non-interactively (used by the Makefile's install-* targets).
set -euo pipefail
export DEBIAN_FRONTEND=noninteractive
SUDO=""
if [ "$(id -u)" != 0 ]; then SUDO=sudo; fi
if [ -z "$(find /var/lib/apt/lists -maxdepth 1 -name '*Packages*' -mmin -1440 2>/dev/null | head -1)" ]; then
  $SUDO apt-get -o DPkg::Lock::Timeout=900 update -qq
fi
$SUDO apt-get -o DPkg::Lock::Timeout=900 install -y -qq --no-install-recommends "$@" >/dev/null
