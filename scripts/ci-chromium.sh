#!/usr/bin/env bash
# Installs Chromium (the Debian package chromium) for the browser tests of
# daemon/web when no Chromium is on the machine. Never fails the build: when
# it cannot install, the browser tests skip and say why.
# Use from .ci/run before the tests:  scripts/ci-chromium.sh || true
set -u
for b in chromium chromium-browser google-chrome; do
	if command -v "$b" >/dev/null 2>&1; then
		echo "ci-chromium: found $(command -v "$b")"
		exit 0
	fi
done
if [ "$(id -u)" -ne 0 ] && command -v sudo >/dev/null 2>&1; then
	SUDO=sudo
else
	SUDO=
fi
if command -v apt-get >/dev/null 2>&1; then
	if $SUDO apt-get update && DEBIAN_FRONTEND=noninteractive $SUDO apt-get install -y chromium; then
		echo "ci-chromium: installed chromium"
		exit 0
	fi
fi
echo "ci-chromium: could not install chromium; the browser tests of daemon/web will skip" >&2
exit 0
