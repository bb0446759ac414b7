#!/bin/sh
# Take a headless Chromium screenshot of a sweep report, to check that it
# renders and that its plots are visible.
#
#   scripts/screenshot-report.sh REPORT.html [OUT.png] [WIDTH,HEIGHT]
#
# Needs Debian's chromium package (apt-get install -y chromium). The
# browser runs with a throw-away profile and no network services.
set -eu
report=${1:?usage: $0 REPORT.html [OUT.png] [WIDTH,HEIGHT]}
out=${2:-report.png}
size=${3:-1200,2400}
browser=$(command -v chromium || command -v chromium-browser || true)
if [ -z "$browser" ]; then
	echo "chromium not found: apt-get install -y chromium" >&2
	exit 1
fi
abs=$(cd "$(dirname "$report")" && pwd)/$(basename "$report")
profile=$(mktemp -d)
trap 'rm -rf "$profile"' EXIT
timeout 120 "$browser" --headless --no-sandbox --disable-gpu --disable-quic --no-first-run \
	--disable-background-networking --disable-component-update --disable-sync \
	--user-data-dir="$profile" --hide-scrollbars --screenshot="$out" --window-size="$size" \
	"file://$abs" 2>/dev/null
test -s "$out"
echo "$out"
