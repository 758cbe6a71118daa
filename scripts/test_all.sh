#!/usr/bin/env bash
# The whole test suite, from a fresh machine that has only the Rust
# toolchain, Python 3.11 and pip. Installs what it needs (a Python venv under
# .venv, Debian's chromium for the HTML check), then runs the Rust tests, the
# Python reference checks and the headless-browser check of the HTML report.
set -euo pipefail
cd "$(dirname "$0")/.."

echo "== cargo test"
cargo build --release --locked 2>/dev/null || cargo build --release
cargo test --release

echo "== python reference checks"
bash scripts/setup_python.sh
KLGAUGE_BIN="$PWD/target/release/klgauge" .venv/bin/python -m pytest scripts/tests -q -rs

if [ -f scripts/check_html.sh ]; then
  echo "== html report in a headless browser"
  bash scripts/check_html.sh
fi
echo "== all checks passed"
