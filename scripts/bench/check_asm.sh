#!/usr/bin/env bash
# Shows what the compiler made of the hot kernel functions: for each
# instruction-set build, how many instructions work on 512-bit (zmm),
# 256-bit (ymm) and scalar single values, and whether any scalar
# float-to-int conversion or call is left inside (both used to stop the exp
# loop from vectorising).
#
#   bash scripts/bench/check_asm.sh [path/to/klgauge]     (default target/release/klgauge)
set -euo pipefail
bin="${1:-$(dirname "$0")/../../target/release/klgauge}"
if [[ ! -x "$bin" ]]; then
    echo "check_asm.sh: no binary at $bin (cargo build --release first)" >&2
    exit 2
fi
dis="$(mktemp)"
trap 'rm -f "$dis"' EXIT
objdump -d --no-show-raw-insn -C "$bin" > "$dis"
printf '%-44s %6s %6s %6s %8s %6s\n' function zmm ymm "ss/sd" cvttss2si calls
for f in normalise_row_at compare_fused_at normalise_store_at compare_stored_at decode_at storage_floor_row_at top_k_at; do
    for w in wide512 wide256; do
        body="$(awk -v name="<klgauge::kernel::$f::$w>:" 'index($0, name) {on=1; next} on && /^$/ {exit} on {print}' "$dis")"
        [[ -z "$body" ]] && continue
        zmm=$(grep -c 'zmm' <<<"$body" || true)
        ymm=$(grep -c 'ymm' <<<"$body" || true)
        ss=$(grep -cE '\s(v[a-z]+s[sd])\s' <<<"$body" || true)
        cvt=$(grep -c 'cvttss2si' <<<"$body" || true)
        calls=$(grep -c 'call' <<<"$body" || true)
        printf '%-44s %6s %6s %6s %8s %6s\n' "$f::$w" "$zmm" "$ymm" "$ss" "$cvt" "$calls"
    done
done
echo "(calls: memcpy for partial chunks, log/exp of the row totals and panics are expected; none sit in the column loops)"
