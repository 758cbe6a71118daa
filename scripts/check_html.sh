#!/usr/bin/env bash
# Renders an HTML report in a real headless browser and checks that it works
# as one self-contained file: the page loads, its self-check script ran, no
# resource was fetched and nothing failed to load, and every plot has data
# marks in it.
#
#   scripts/check_html.sh                 # runs `klgauge demo` into a temporary directory and checks its page
#   scripts/check_html.sh REPORT.html     # checks an existing report
#   SCREENSHOT=out.png scripts/check_html.sh   # also saves a screenshot of the top of the page
#
# KLGAUGE_BIN selects the binary (default: target/release/klgauge, built if
# missing). Chromium is installed with apt-get when it is not found.
set -euo pipefail

fail() { echo "check_html: FAIL: $*" >&2; exit 1; }

page=""
if [ $# -ge 1 ]; then
    [ -f "$1" ] || fail "$1: no such file"
    page="$(cd "$(dirname "$1")" && pwd)/$(basename "$1")"
fi
here="$(cd "$(dirname "$0")/.." && pwd)"
cd "$here"

find_browser() {
    for b in chromium chromium-browser google-chrome; do
        if command -v "$b" >/dev/null 2>&1; then command -v "$b"; return 0; fi
    done
    return 1
}

browser="$(find_browser || true)"
if [ -z "$browser" ]; then
    echo "check_html: chromium not found, installing it with apt-get" >&2
    sudo=""
    if [ "$(id -u)" != 0 ]; then sudo="sudo"; fi
    $sudo apt-get update -qq
    DEBIAN_FRONTEND=noninteractive $sudo apt-get install -y -qq chromium >/dev/null
    browser="$(find_browser)" || fail "chromium could not be installed"
fi

work="$(mktemp -d)"
trap 'rm -rf "$work"' EXIT

if [ -z "$page" ]; then
    bin="${KLGAUGE_BIN:-target/release/klgauge}"
    if [ ! -x "$bin" ]; then
        cargo build --release -j2 >&2
    fi
    "$bin" demo --out "$work/demo" >"$work/demo.txt" || fail "klgauge demo exited with an error"
    page="$work/demo/report.html"
fi
[ -s "$page" ] || fail "$page is empty"

# 1. Static: nothing in the file points outside it.
if grep -qiE 'https?://|src=|<link|@import|url\(' "$page"; then
    grep -oiE '.{0,40}(https?://|src=|<link|@import|url\().{0,40}' "$page" | head -5 >&2
    fail "$page refers to something outside itself"
fi

# 2. In the browser, with every network name unresolvable, so that any fetch
#    would fail and be counted by the page's own error listener.
flags=(--headless --no-sandbox --disable-gpu --disable-background-networking
       --disable-component-update --disable-sync --no-first-run --disable-extensions
       --host-resolver-rules="MAP * ~NOTFOUND" --proxy-server="127.0.0.1:9"
       --user-data-dir="$work/profile" --virtual-time-budget=5000)
"$browser" "${flags[@]}" --dump-dom "file://$page" >"$work/dom.html" 2>"$work/browser.log" \
    || { tail -5 "$work/browser.log" >&2; fail "the browser did not render $page"; }
[ -s "$work/dom.html" ] || fail "the browser produced an empty DOM"

body="$(grep -o '<body[^>]*>' "$work/dom.html" | head -1)"
attr() { echo "$body" | sed -n "s/.* $1=\"\([^\"]*\)\".*/\1/p"; }
[ "$(attr data-check)" = "done" ] || fail "the page's check script did not run (body: $body)"
[ "$(attr data-resources)" = "0" ] || fail "the page fetched $(attr data-resources) resources"
[ "$(attr data-errors)" = "0" ] || fail "$(attr data-errors) load or script errors"
plots="$(attr data-plots)"
marks="$(attr data-marks)"
[ "${plots:-0}" -ge 3 ] || fail "only ${plots:-0} plots rendered"
[ "${marks:-0}" -ge 100 ] || fail "only ${marks:-0} SVG marks rendered"

# 3. Every plot holds data marks, not only its frame and grid.
empty="$(awk 'BEGIN{RS="<svg "} /^class="plot/ { n = gsub(/class="(bar|cumline|tailline|band|meanline|est[^"]*|pt)"/, "&"); if (n == 0) { split($0, a, "aria-label=\""); split(a[2], b, "\""); print b[1] } }' "$work/dom.html")"
[ -z "$empty" ] || fail "plots without data: $empty"
svg_open="$(grep -o '<svg' "$work/dom.html" | wc -l)"
svg_close="$(grep -o '</svg>' "$work/dom.html" | wc -l)"
[ "$svg_open" = "$svg_close" ] || fail "unbalanced svg tags: $svg_open open, $svg_close closed"

if [ -n "${SCREENSHOT:-}" ]; then
    "$browser" "${flags[@]}" --hide-scrollbars --window-size="${SCREENSHOT_SIZE:-1280,2400}" \
        --screenshot="$work/shot.png" "file://$page" >/dev/null 2>&1 || fail "screenshot failed"
    cp "$work/shot.png" "$SCREENSHOT"
    echo "check_html: screenshot written to $SCREENSHOT" >&2
fi

echo "check_html: ok: $plots plots, $marks SVG marks, $svg_open svg elements, no resource fetched, no error ($page)"
