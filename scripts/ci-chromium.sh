#!/usr/bin/env bash
# Installs Chromium (the Debian package chromium) for the browser tests of
# daemon/web and daemon when no Chromium is on the machine. Silent and
# immediate when one is there; apt-get runs only when none is. Never fails
# the build: when it cannot install, the browser tests skip and say why.
# Used by .ci/run before the tests:  scripts/ci-chromium.sh || true
set -u
for b in chromium chromium-browser google-chrome; do
	if command -v "$b" >/dev/null 2>&1; then
		exit 0
	fi
done
SUDO=
if [ "$(id -u)" -ne 0 ]; then
	if command -v sudo >/dev/null 2>&1 && sudo -n true 2>/dev/null; then
		SUDO="sudo -n"
	else
		echo "ci-chromium: no chromium, and no root to install it; the browser tests will skip" >&2
		exit 0
	fi
fi
if command -v apt-get >/dev/null 2>&1; then
	if $SUDO apt-get -qq update >/dev/null && DEBIAN_FRONTEND=noninteractive $SUDO apt-get -qq install -y chromium >/dev/null; then
		echo "ci-chromium: installed chromium"
		exit 0
	fi
fi
echo "ci-chromium: could not install chromium; the browser tests will skip" >&2
exit 0
