#!/usr/bin/env bash
# The C API end to end: the C example firmware (capi/example) in the emulator.
#
#  1. build the static library for the Cortex-M4F (firmware profile) and the C example with
#     arm-none-eabi-gcc, against the committed header;
#  2. run it in qemu-system-arm (mps2-an386) with the demo's blob in slot A and the demo's readings
#     loaded, as firmware-example/e2e.sh runs the Rust firmware;
#  3. check that its d² bits, alarm timeline, pin changes and final LEDs are identical to
#     `ellipsoid replay` of the same blob and readings (node-tool compare, as for the Rust firmware),
#     and that a blob with one bit flipped is refused (fault line on, nothing scored);
#  4. look for panic machinery reachable from the exported functions in the C image;
#  5. report the image's flash (and the library's share) and the cost of a score.
#
#   capi/e2e.sh [DEMO_DIR]    DEMO_DIR: an `ellipsoid demo` output (model.blob, readings.csv);
#                             without it the script makes one.
# Any failed check ends the script with a non-zero status. The figures go to target/e2e-capi/figures.txt
# and into README.md's "From C" section.
set -euo pipefail
cd "$(dirname "$0")/.."

say() { printf '== capi: %s\n' "$*"; }
fail() { printf 'capi e2e: FAILED: %s\n' "$*" >&2; exit 1; }

for tool in arm-none-eabi-gcc arm-none-eabi-objdump qemu-system-arm; do
  command -v "$tool" >/dev/null || fail "$tool is missing (apt-get install gcc-arm-none-eabi binutils-arm-none-eabi qemu-system-arm)"
done

W=target/e2e-capi
rm -rf "$W"
mkdir -p "$W"

say "host tools and the demo's data"
cargo build -q --release -p ellipsoid-tests --bin node-tool
cargo build -q --release -p ellipsoid-trainer
TOOL=target/release/node-tool
ELLIPSOID=target/release/ellipsoid
DEMO=${1:-}
if [ -z "$DEMO" ]; then
  DEMO="$W/demo"
  $ELLIPSOID demo --out "$DEMO" --quiet
fi
BLOB="$DEMO/model.blob"
READINGS="$DEMO/readings.csv"
[ -s "$BLOB" ] && [ -s "$READINGS" ] || fail "no $BLOB or $READINGS"
$TOOL table --input "$READINGS" --model "$BLOB" --out "$W/readings.bin"
$TOOL damage --input "$BLOB" --mode flip --out "$W/flipped.blob"
$ELLIPSOID replay --model "$BLOB" --input "$READINGS" --out "$W/replay.csv"

say "1. the static library (thumbv7em-none-eabihf, firmware profile) and the C image"
t0=$(date +%s)
cargo build -q -p ellipsoid-capi --profile firmware --target thumbv7em-none-eabihf
LIB=target/thumbv7em-none-eabihf/firmware/libellipsoid_capi.a
CFLAGS=(-mcpu=cortex-m4 -mthumb -mfloat-abi=hard -mfpu=fpv4-sp-d16 -std=c99 -O2 -g
  -ffreestanding -ffunction-sections -fdata-sections -Wall -Wextra -Werror -Icapi/include)
ELF="$W/c-example.elf"
# Every function the header declares is kept in the image (-u), also those the example never
# calls, so that the panic check below covers the whole API.
API=$(grep -vE '^\s*(//|/\*|\*)' capi/include/ellipsoid.h | grep -oE 'ellipsoid_[a-z_]+\(' | tr -d '(' | sort -u)
[ "$(echo "$API" | wc -l)" -ge 10 ] || fail "found only $(echo "$API" | wc -l) functions in the header"
KEEP=()
for f in $API; do KEEP+=("-Wl,-u,$f"); done
arm-none-eabi-gcc "${CFLAGS[@]}" -nostdlib -Tcapi/example/link.ld -Wl,--gc-sections -Wl,--no-warn-execstack \
  "${KEEP[@]}" -Wl,-Map="$W/c-example.map" capi/example/startup.c capi/example/main.c "$LIB" -lgcc -o "$ELF"
t1=$(date +%s)
echo "library and image built in $((t1 - t0)) s"
arm-none-eabi-size -A "$ELF" | tee "$W/size.txt"

run() {
  local name=$1
  shift
  if ! timeout 120 qemu-system-arm -cpu cortex-m4 -machine mps2-an386 -nographic \
      -semihosting-config enable=on,target=native -icount shift=0 -kernel "$ELF" "$@" \
      >"$W/$name.log" 2>"$W/$name.err"; then
    tail -n 20 "$W/$name.log" "$W/$name.err" >&2 || true
    fail "the emulator run '$name' did not exit cleanly"
  fi
}
load() { echo "-device loader,file=$1,addr=$2,force-raw=on"; }

say "2-3. the demo in the emulator: the C image against replay"
# shellcheck disable=SC2046
run demo $(load "$BLOB" 0x00100000) $(load "$W/readings.bin" 0x00200000)
$TOOL compare --device "$W/demo.log" --replay "$W/replay.csv" --readings "$READINGS" --slot A \
  | sed 's/^/C example: /' | tee "$W/compared.txt"

say "3. the comparison can fail: one d² bit changed in the C image's log must be refused"
awk '!done && $1 == "r" && match($0, /d2=[0-9a-f]+/) {
  hex = "0123456789abcdef"; i = index(hex, substr($0, RSTART + 10, 1)) - 1
  j = (i % 2 == 0) ? i + 1 : i - 1
  $0 = substr($0, 1, RSTART + 9) substr(hex, j + 1, 1) substr($0, RSTART + 11); done = 1
} { print }' "$W/demo.log" >"$W/tampered.log"
cmp -s "$W/demo.log" "$W/tampered.log" && fail "the tampered log is unchanged"
if $TOOL compare --device "$W/tampered.log" --replay "$W/replay.csv" --readings "$READINGS" \
    --slot A >"$W/tampered.out" 2>&1; then
  fail "compare accepted a log with a changed d² bit"
fi
grep -q "d2 bits device" "$W/tampered.out" || fail "compare refused the tampered log for another reason"
echo "refused, as it must be: $(grep -m1 MISMATCH "$W/tampered.out")"

say "3. a blob with one bit flipped: refused, fault line on, nothing scored"
# shellcheck disable=SC2046
run flipped $(load "$W/flipped.blob" 0x00100000) $(load "$W/readings.bin" 0x00200000)
grep -q "slot A unusable: crc" "$W/flipped.log" || fail "the C image did not report the CRC failure"
# The Rust firmware's `node-tool no-model` wants two slots; the C example has one, so the same
# rules are checked here: no model, nothing scored, fault line on at boot, alarm off, LEDs 10.
for want in "model none" "not scoring: no valid model" "pin fault on level=high at=boot" \
    "pin alarm off level=low at=boot" "leds=10"; do
  grep -qx "$want" "$W/flipped.log" || fail "the C image with a flipped blob did not report '$want'"
done
! grep -q '^r ' "$W/flipped.log" || fail "the C image scored readings without a model"
echo "C example, slot A bit-flipped: refused (crc), fault line on, alarm off, nothing scored" | tee -a "$W/compared.txt"

say "4. panic machinery on the paths of the exported functions"
# The roots: every function the header declares, each of which must be in the image.
ROOTS=$(echo "$API" | paste -sd, -)
for f in $API; do
  arm-none-eabi-nm --defined-only "$ELF" | awk -v f="$f" '$2 == "T" && $3 == f { ok = 1 } END { exit !ok }' \
    || fail "$f is not in the image"
done
$TOOL reach --elf "$ELF" --roots "$ROOTS" | tee "$W/reach.txt"

say "5. figures"
# Flash: .text + .rodata + .data (the vector table is in .vectors). The library's share is the
# size of every symbol that is not defined by the example's own two C files.
sec() { awk -v s="$1" '$1 == s { print $2 + 0 }' "$W/size.txt"; }
flash=$(($(sec .vectors) + $(sec .text) + $(sec .rodata) + $(sec .data) + $(sec .ARM.exidx)))
arm-none-eabi-gcc "${CFLAGS[@]}" -c capi/example/startup.c -o "$W/startup.o"
arm-none-eabi-gcc "${CFLAGS[@]}" -c capi/example/main.c -o "$W/main.o"
arm-none-eabi-nm --defined-only "$W/startup.o" "$W/main.o" | awk 'NF == 3 { print $3 }' | sort -u >"$W/c-symbols.txt"
arm-none-eabi-nm -S --size-sort -t d "$ELF" | awk 'NF == 4 && $3 ~ /^[TtRrDd]$/ { print $4, $2 + 0 }' \
  | sort >"$W/symbol-sizes.txt"
lib_flash=$(join -v 1 "$W/symbol-sizes.txt" "$W/c-symbols.txt" | awk '{ n += $2 } END { print n + 0 }')
api_sizes=$(awk '$1 ~ /^ellipsoid_/ { printf "%s %d, ", $1, $2 }' "$W/symbol-sizes.txt")
cat "$W/demo.log" | grep -E '^(calibrate|cost) ' | tee "$W/cost.txt"
cost=$(awk '/^cost / { for (i = 2; i <= NF; i++) if ($i ~ /^instr_per_score=/) { sub(/.*=/, "", $i); print $i } }' "$W/cost.txt")
overhead=$(awk '/^cost / { for (i = 2; i <= NF; i++) if ($i ~ /^loop_overhead=/) { sub(/.*=/, "", $i); print $i } }' "$W/cost.txt")
[ -n "$cost" ] || fail "the C image reported no cost per score"
stack_boot=$(awk -F= '/^stack boot_bytes=/ { print $2 }' "$W/demo.log")
stack_run=$(awk -F= '/^stack run_bytes=/ { print $2 }' "$W/demo.log")
[ -n "$stack_boot" ] && [ -n "$stack_run" ] || fail "the C image reported no stack use"
{
  echo "C example image (arm-none-eabi-gcc -O2, library: firmware profile, N = 5): flash $flash bytes" \
    "(.text $(sec .text), .rodata $(sec .rodata), .data $(sec .data)), RAM .bss $(sec .bss) bytes," \
    "every exported function kept; not from the example's C files (the library, with its compiler" \
    "helpers): $lib_flash bytes"
  echo "exported functions, bytes: ${api_sizes%, }"
  echo "RAM of the decoded model: ellipsoid_model_storage_t, $(( 8 * 5 * 5 + 16 * 5 + 64 )) bytes (ELLIPSOID_MODEL_BYTES(5));" \
    "stack peak from the top (stack painting): boot and decode $stack_boot bytes, scoring the demo" \
    "(explain, alarm machine and report included) $stack_run bytes"
  echo "cost per score through ellipsoid_score on the demo model (N = 5): $cost instructions," \
    "of which loop and call $overhead (SysTick, -icount shift=0)"
  cat "$W/compared.txt" "$W/reach.txt"
} | tee "$W/figures.txt"

# The figures into the README's "From C" section, between its markers (a whole new file, then
# renamed over the old one, so an interrupted run leaves the README as it was).
grep -q '^<!-- capi-figures:begin' README.md && grep -q '^<!-- capi-figures:end' README.md \
  || fail "README.md has no capi-figures markers"
awk -v figures="$W/figures.txt" '
  /^<!-- capi-figures:begin/ { print; while ((getline l < figures) > 0) print "- " l; skip = 1; next }
  /^<!-- capi-figures:end/ { skip = 0 }
  !skip { print }
' README.md >"$W/README.md.new"
mv "$W/README.md.new" README.md
say "passed"
