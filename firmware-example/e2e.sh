#!/usr/bin/env bash
# The firmware's end-to-end check in the emulator, and the figures of firmware-example/README.md.
#
#  1. fit the demo model with the trainer and write its blob (and a second model, sequence 2);
#  2. build the firmware with the firmware profile (Cortex-M4F on mps2-an386, Cortex-M0 on microbit);
#  3. run it in qemu-system-arm (mps2-an386) with the blob in slot A and the demo's readings loaded;
#  4. check that the device's d² is bit-identical to `ellipsoid replay`, and its alarm timeline,
#     pin changes and final LED levels identical; the same for a model bank (format version 2:
#     modes, a window and drift), whose mode and drift flag must be identical too;
#  5. run it with slot A corrupted and a valid model in B (B must be used), with a torn A and a newer
#     B, and with both slots corrupt (fault line on, nothing scored);
#  6. look for panic machinery on the decode and score paths of the firmware image;
#  7. measure the cost of a score for N = 4, 8, 16 and write the figures into the README;
#  M0. the same on the emulated micro:bit (Cortex-M0, 16 KiB RAM, readings over semihosting): the
#     demo bit-identical to replay, the slot cases, a slot programmed from `ellipsoid export`'s
#     Intel HEX, the slot rules (sequence wrap-around, ties, fall-back from an unconfirmed model),
#     the pinned scores, the panic check (and that it catches a planted panic), software-float
#     cost per score, and its figures in the READMEs.
#
# Any failed check ends the script with a non-zero status. Nearly all its time is building (the
# release trainer, the host tool, three firmware images); the emulator runs take seconds.
set -euo pipefail
cd "$(dirname "$0")/.."

say() { printf '== %s\n' "$*"; }
fail() { printf 'e2e: FAILED: %s\n' "$*" >&2; exit 1; }

say "tools"
if ! command -v qemu-system-arm >/dev/null || ! command -v arm-none-eabi-objdump >/dev/null; then
  sudo=""
  if [ "$(id -u)" != 0 ] && command -v sudo >/dev/null; then sudo="sudo"; fi
  $sudo apt-get update
  $sudo apt-get install -y qemu-system-arm binutils-arm-none-eabi
fi
rustup target add thumbv7em-none-eabihf thumbv6m-none-eabi
qemu-system-arm --version | head -n 1

W=target/e2e
rm -rf "$W"
mkdir -p "$W"

say "host tools"
cargo build -q --release -p ellipsoid-tests --bin node-tool
TOOL=target/release/node-tool

say "1. the demo model"
cargo build -q --release -p ellipsoid-trainer
ELLIPSOID=target/release/ellipsoid
$ELLIPSOID demo --out "$W/demo" --quiet
[ -s "$W/demo/baseline.csv" ] || fail "the demo wrote no baseline.csv to fit a second model from"
# A second model of the same machine, with a higher sequence number, for slot B. A fixed training
# time keeps its bytes (and so every device log) the same from run to run.
$ELLIPSOID fit "$W/demo/baseline.csv" --out "$W/model-b.blob" --sequence 2 --trained-at 1772452800
replay() { $ELLIPSOID replay --model "$1" --input "$2" --out "$3"; }
BLOB_B="$W/model-b.blob"
BLOB_A="$W/demo/model.blob"
READINGS="$W/demo/readings.csv"
[ -s "$BLOB_A" ] || fail "no $BLOB_A"
[ -s "$READINGS" ] || fail "no $READINGS"
$TOOL table --input "$READINGS" --model "$BLOB_A" --out "$W/readings.bin"
$TOOL damage --input "$BLOB_A" --mode flip --out "$W/a-flipped.blob"
$TOOL damage --input "$BLOB_A" --mode torn --out "$W/a-torn.blob"
$TOOL damage --input "$BLOB_B" --mode torn --out "$W/b-torn.blob"
replay "$BLOB_A" "$READINGS" "$W/replay-a.csv"
replay "$BLOB_B" "$READINGS" "$W/replay-b.csv"
# --- fixed point on the node: the demo baseline fitted for parts without an FPU (header flag bit 1) ---
BLOB_FX="$W/model-fixed.blob"
$ELLIPSOID fit "$W/demo/baseline.csv" --no-fpu --out "$BLOB_FX" --sequence 3 --trained-at 1772452800 \
  >"$W/fit-fixed.txt"
grep "^Fixed point (--no-fpu)" "$W/fit-fixed.txt"
$TOOL damage --input "$BLOB_FX" --mode flip --out "$W/fixed-flipped.blob"
replay "$BLOB_FX" "$READINGS" "$W/replay-fixed.csv"
# --- end of fixed point ---
# --- model bank (format version 2): two modes, a window of 4 readings, drift ---
# The trainer's own bank: two nearest modes found by EM on the demo's baseline, a window of 4
# readings, drift with a half-life of 600 readings and a bound of 0.5 baseline standard
# deviations (tight, so that the run reaches it and the drift event and flag are checked).
BLOB_BANK="$W/model-bank.blob"
$ELLIPSOID fit "$W/demo/baseline.csv" --modes 2 --window 2 --drift-half-life 600 --drift-bound 0.5 \
  --out "$BLOB_BANK" --sequence 4 --trained-at 1772452800 >"$W/fit-bank.txt"
grep -q "^Blob: version 2," "$W/fit-bank.txt" || fail "fit --modes 2 --window 2 --drift-half-life did not write a bank"
replay "$BLOB_BANK" "$READINGS" "$W/replay-bank.csv"
$TOOL table --input "$READINGS" --model "$BLOB_BANK" --out "$W/readings-bank.bin"
cmp -s "$W/readings.bin" "$W/readings-bank.bin" || fail "the bank's reading table differs from the single model's"
# The core's Tracker run straight on the table the device is given, beside the trainer's replay.
FEATURES=$(head -n 1 "$READINGS" | tr ',' '\n' | grep -vx 'timestamp\|label' | paste -sd, -)
$TOOL track --model "$BLOB_BANK" --table "$W/readings.bin" --features "$FEATURES" --out "$W/track-bank.csv"
# --- end of the model bank ---

say "2. the firmware, release"
FW="cargo build -q --profile firmware -p ellipsoid-firmware-example"
# --- flash-resident model: an N = 8 node image for the flash per function group (built first:
# the builds below rebuild the node for its usual N = 5) ---
ELLIPSOID_NODE_N=8 $FW --features mps2-an386 --target thumbv7em-none-eabihf --bin ellipsoid-node
cp target/thumbv7em-none-eabihf/firmware/ellipsoid-node "$W/ellipsoid-node-n8"
# --- end of the N = 8 image ---
$FW --features mps2-an386 --target thumbv7em-none-eabihf
$FW --no-default-features --features microbit --target thumbv6m-none-eabi
ELF=target/thumbv7em-none-eabihf/firmware/ellipsoid-node
COST_ELF=target/thumbv7em-none-eabihf/firmware/score-cost
ELF_M0=target/thumbv6m-none-eabi/firmware/ellipsoid-node
COST_ELF_M0=target/thumbv6m-none-eabi/firmware/score-cost
arm-none-eabi-size "$ELF" "$ELF_M0"

sym() { arm-none-eabi-nm "$ELF" | awk -v s="$1" '$3 == s { print "0x" $1 }'; }
SLOT_A=$(sym _model_a_start)
SLOT_B=$(sym _model_b_start)
TABLE=$(sym _readings_start)
[ -n "$SLOT_A" ] && [ -n "$SLOT_B" ] && [ -n "$TABLE" ] || fail "slot symbols missing from $ELF"
echo "slot A at $SLOT_A, slot B at $SLOT_B, readings at $TABLE"

# run NAME IMAGE [loader args...]: the device's output goes to $W/NAME.log; a non-zero exit fails.
run() {
  local name=$1 image=$2
  shift 2
  if ! timeout 120 qemu-system-arm -cpu cortex-m4 -machine mps2-an386 -nographic \
      -semihosting-config enable=on,target=native -icount shift=0 -kernel "$image" "$@" \
      >"$W/$name.log" 2>"$W/$name.err"; then
    tail -n 20 "$W/$name.log" "$W/$name.err" >&2 || true
    fail "the emulator run '$name' did not exit cleanly"
  fi
}
load() { echo "-device loader,file=$1,addr=$2,force-raw=on"; }

say "3-4. slot A, the demo's readings: device against replay"
# shellcheck disable=SC2046
run slot-a "$ELF" $(load "$BLOB_A" "$SLOT_A") $(load "$W/readings.bin" "$TABLE")
$TOOL compare --device "$W/slot-a.log" --replay "$W/replay-a.csv" --readings "$READINGS" \
  --slot A | sed 's/^/slot A valid, B empty: /' | tee "$W/compared.txt"

say "4. the comparison can fail: one d² bit changed in the device's log must be refused"
awk '!done && $1 == "r" && match($0, /d2=[0-9a-f]+/) {
  hex = "0123456789abcdef"; i = index(hex, substr($0, RSTART + 10, 1)) - 1
  j = (i % 2 == 0) ? i + 1 : i - 1
  $0 = substr($0, 1, RSTART + 9) substr(hex, j + 1, 1) substr($0, RSTART + 11); done = 1
} { print }' "$W/slot-a.log" >"$W/tampered.log"
cmp -s "$W/slot-a.log" "$W/tampered.log" && fail "the tampered log is unchanged"
if $TOOL compare --device "$W/tampered.log" --replay "$W/replay-a.csv" --readings "$READINGS" \
    --slot A >"$W/tampered.out" 2>&1; then
  fail "compare accepted a log with a changed d² bit"
fi
grep -q "d2 bits device" "$W/tampered.out" || fail "compare refused the tampered log for another reason"
echo "refused, as it must be: $(grep -m1 MISMATCH "$W/tampered.out")"

# --- fixed point on the node (AN386): the integer path, bit-identical to replay ---
say "4f. a fixed-point blob in slot A: device against replay, and a flipped bit refused"
# shellcheck disable=SC2046
run fixed-a "$ELF" $(load "$BLOB_FX" "$SLOT_A") $(load "$W/readings.bin" "$TABLE")
grep -q "^model slot=A .* arith=fixed$" "$W/fixed-a.log" || fail "the node did not take slot A as a fixed-point model"
$TOOL compare --device "$W/fixed-a.log" --replay "$W/replay-fixed.csv" --readings "$READINGS" \
  --slot A | sed 's/^/fixed point (--no-fpu) in slot A, B empty: /' | tee -a "$W/compared.txt"
awk '!done && $1 == "r" && match($0, /d2=[0-9a-f]+/) {
  hex = "0123456789abcdef"; i = index(hex, substr($0, RSTART + 10, 1)) - 1
  j = (i % 2 == 0) ? i + 1 : i - 1
  $0 = substr($0, 1, RSTART + 9) substr(hex, j + 1, 1) substr($0, RSTART + 11); done = 1
} { print }' "$W/fixed-a.log" >"$W/fixed-tampered.log"
cmp -s "$W/fixed-a.log" "$W/fixed-tampered.log" && fail "the tampered fixed-point log is unchanged"
if $TOOL compare --device "$W/fixed-tampered.log" --replay "$W/replay-fixed.csv" --readings "$READINGS" \
    --slot A >"$W/fixed-tampered.out" 2>&1; then
  fail "compare accepted a fixed-point log with a changed d² bit"
fi
grep -q "d2 bits device" "$W/fixed-tampered.out" || fail "compare refused the tampered fixed-point log for another reason"
echo "refused, as it must be: $(grep -m1 MISMATCH "$W/fixed-tampered.out")"
# One bit flipped in the fixed-point blob: the slot is refused and the f32 model in B is used.
# shellcheck disable=SC2046
run fixed-flipped "$ELF" $(load "$W/fixed-flipped.blob" "$SLOT_A") $(load "$BLOB_B" "$SLOT_B") \
  $(load "$W/readings.bin" "$TABLE")
grep -q "^slot A unusable: CRC mismatch" "$W/fixed-flipped.log" || fail "the flipped fixed-point blob was not refused"
$TOOL compare --device "$W/fixed-flipped.log" --replay "$W/replay-b.csv" --readings "$READINGS" \
  --slot B --unusable A | sed 's/^/fixed point in slot A with one bit flipped, f32 B valid: /' | tee -a "$W/compared.txt"
# --- end of fixed point on the node (AN386) ---

# --- model bank on the node (AN386): modes, window and drift, bit-identical to the host ---
say "4b. a model bank in slot A: mode, d², alarm, fault and drift against the host"
# shellcheck disable=SC2046
run bank-a "$ELF" $(load "$BLOB_BANK" "$SLOT_A") $(load "$W/readings.bin" "$TABLE")
grep -q "^model slot=A .* modes=2 select=nearest window=2 differences=0 drift=1$" "$W/bank-a.log" \
  || fail "the node did not take slot A as the bank"
grep -q " event=drift " "$W/bank-a.log" || fail "the bank's run reached no drift bound"
grep -q " event=raised" "$W/bank-a.log" || fail "the bank's run raised no alarm, so the alarm path was not compared"
$TOOL compare --device "$W/bank-a.log" --replay "$W/replay-bank.csv" --readings "$READINGS" \
  --slot A | sed 's/^/model bank (fit --modes 2 --window 2 --drift-half-life 600) in slot A, B empty: /' \
  | tee -a "$W/compared.txt"
$TOOL compare --device "$W/bank-a.log" --replay "$W/track-bank.csv" --readings "$READINGS" --slot A \
  | sed 's/^/the same run against the core Tracker on the device table (node-tool track): /'

# The comparison can fail: one reading's mode changed, and the drift flag cleared on one reading.
awk '!done && $1 == "r" && / mode=0 / { sub(/ mode=0 /, " mode=1 "); done = 1 } { print }' \
  "$W/bank-a.log" >"$W/bank-mode-tampered.log"
awk '!done && $1 == "r" && / drift=1/ { sub(/ drift=1/, " drift=0"); done = 1 } { print }' \
  "$W/bank-a.log" >"$W/bank-drift-tampered.log"
for t in mode drift; do
  cmp -s "$W/bank-a.log" "$W/bank-$t-tampered.log" && fail "the $t-tampered bank log is unchanged"
  if $TOOL compare --device "$W/bank-$t-tampered.log" --replay "$W/replay-bank.csv" --readings "$READINGS" \
      --slot A >"$W/bank-$t-tampered.out" 2>&1; then
    fail "compare accepted a bank log with a changed $t"
  fi
  grep -q "mode/drift device" "$W/bank-$t-tampered.out" || fail "compare refused the $t-tampered log for another reason"
  echo "refused, as it must be: $(grep -m1 MISMATCH "$W/bank-$t-tampered.out")"
done
# --- end of the model bank on the node (AN386) ---

say "5. slot A corrupt, B valid: B must be used"
# shellcheck disable=SC2046
run a-flipped "$ELF" $(load "$W/a-flipped.blob" "$SLOT_A") $(load "$BLOB_B" "$SLOT_B") \
  $(load "$W/readings.bin" "$TABLE")
$TOOL compare --device "$W/a-flipped.log" --replay "$W/replay-b.csv" --readings "$READINGS" \
  --slot B --unusable A | sed 's/^/slot A with one bit flipped, B valid: /' | tee -a "$W/compared.txt"
grep -q "slot A unusable: CRC mismatch" "$W/a-flipped.log" || fail "slot A's CRC failure not reported"

say "5. slot A torn, B valid"
# shellcheck disable=SC2046
run a-torn "$ELF" $(load "$W/a-torn.blob" "$SLOT_A") $(load "$BLOB_B" "$SLOT_B") \
  $(load "$W/readings.bin" "$TABLE")
$TOOL compare --device "$W/a-torn.log" --replay "$W/replay-b.csv" --readings "$READINGS" \
  --slot B --unusable A | sed 's/^/slot A torn (second half erased), B valid: /' | tee -a "$W/compared.txt"

say "5. both slots valid: the higher sequence (B) wins"
# shellcheck disable=SC2046
run both "$ELF" $(load "$BLOB_A" "$SLOT_A") $(load "$BLOB_B" "$SLOT_B") \
  $(load "$W/readings.bin" "$TABLE")
$TOOL compare --device "$W/both.log" --replay "$W/replay-b.csv" --readings "$READINGS" \
  --slot B | sed 's/^/A (sequence 1) and B (sequence 2) both valid: /' | tee -a "$W/compared.txt"

say "5. both slots corrupt: fault line, no scoring"
# shellcheck disable=SC2046
run none "$ELF" $(load "$W/a-flipped.blob" "$SLOT_A") $(load "$W/b-torn.blob" "$SLOT_B") \
  $(load "$W/readings.bin" "$TABLE")
$TOOL no-model --device "$W/none.log" | sed 's/^/A bit-flipped, B torn: /' | tee -a "$W/compared.txt"

# --- pinned scores (tests/golden/golden-n5.pins) -------------------------------------------------
# The device, with the golden N = 5 model in slot A, scores the pinned readings; its d² bits and
# faults must be the ones the file pins, as the host test tests/tests/golden_scores.rs requires of
# the core. The replay comparisons above cannot see a change made to host and device together
# (another summation order, say); this one can. And it can fail: one changed pin must be refused.
say "pinned scores: the golden N = 5 model and its readings"
PINS=tests/golden/golden-n5.pins
$TOOL pins-load --pins "$PINS" --blob "$W/golden-n5.blob" --table "$W/golden-n5.bin"
# shellcheck disable=SC2046
run pins "$ELF" $(load "$W/golden-n5.blob" "$SLOT_A") $(load "$W/golden-n5.bin" "$TABLE")
$TOOL pins-compare --pins "$PINS" --device "$W/pins.log"
awk '!done && /^r / && match($0, /d2=[0-9a-f]+/) {
  c = substr($0, RSTART + 10, 1); $0 = substr($0, 1, RSTART + 9) (c == "0" ? "1" : "0") substr($0, RSTART + 11)
  done = 1
} { print }' "$PINS" >"$W/pins-tampered.pins"
cmp -s "$PINS" "$W/pins-tampered.pins" && fail "the tampered pins file is unchanged"
if $TOOL pins-compare --pins "$W/pins-tampered.pins" --device "$W/pins.log" >"$W/pins-tampered.out" 2>&1; then
  fail "pins-compare accepted a device log against a changed pin"
fi
echo "refused, as it must be: $(grep -m1 MISMATCH "$W/pins-tampered.out")"
# --- end of pinned scores ---------------------------------------------------------------------

say "6. panic machinery on the decode and score paths"
$TOOL reach --elf "$ELF" --roots slots::load,node::score,node::explain,node::alarm_update,node::track \
  | tee "$W/reach.txt"

# --- flash-resident model: the stack guard, flash per function group ----------------------------
# The stack sits at the bottom of RAM above an MPU guard (boards/mps2_an386/memory.x): the
# `stack-guard` image recurses until the stack runs out, and the run must end in the HardFault
# handler's report (a data access violation in the guard, CFSR bits DACCVIOL and MSTKERR), with the
# .bss canary unchanged on every level it reported, and a failure status.
say "stack guard: an overflow must fault, not corrupt"
if timeout 60 qemu-system-arm -cpu cortex-m4 -machine mps2-an386 -nographic \
    -semihosting-config enable=on,target=native -icount shift=0 \
    -kernel target/thumbv7em-none-eabihf/firmware/stack-guard >"$W/stack-guard.log" 2>"$W/stack-guard.err"; then
  fail "the stack-guard run ended with success: the overflow did not fault"
fi
tail -n 2 "$W/stack-guard.log"
grep -q '^fault hard cfsr=0x000000[0-9a-f][0-9a-f] ' "$W/stack-guard.log" || fail "no HardFault report from the stack guard"
cfsr=$(sed -n 's/^fault hard cfsr=\(0x[0-9a-f]*\).*/\1/p' "$W/stack-guard.log")
(( (cfsr & 0x12) == 0x12 )) || fail "the fault is not a stacking access violation (CFSR $cfsr)"
grep -q '^level ' "$W/stack-guard.log" || fail "the stack-guard image reported no level"
if grep '^level ' "$W/stack-guard.log" | grep -qv 'canary=0xc0ffee00$'; then
  fail "the .bss canary changed while the stack grew"
fi
echo "stack guard: overflow faulted (CFSR $cfsr) after $(grep -c '^level ' "$W/stack-guard.log") reports, canary intact"
say "flash per function group, N = 8"
$TOOL flash-groups --elf "$W/ellipsoid-node-n8" --out "$W/flash-groups.txt"
# --- end of the flash-resident model's checks -----------------------------------------------------

say "7. cost per score, and the figures"
run cost "$COST_ELF"
cat "$W/cost.log"
$TOOL figures --elf "$ELF" --elf-m0 "$ELF_M0" --cost "$W/cost.log" --device "$W/slot-a.log" \
  --compared "$W/compared.txt" --reach "$W/reach.txt" --readme firmware-example/README.md \
  --flash-groups "$W/flash-groups.txt"
# The top README reports the same figures, from the same data.
$TOOL figures --elf "$ELF" --elf-m0 "$ELF_M0" --cost "$W/cost.log" --device "$W/slot-a.log" \
  --compared "$W/compared.txt" --reach "$W/reach.txt" --readme README.md \
  --flash-groups "$W/flash-groups.txt"
# --- Cortex-M0: the emulated micro:bit (nRF51822, 16 KiB RAM; board file src/board/microbit.rs) --
# The same checks on the M0 image. Its flash cannot hold the demo's reading table, so the image
# reads it from a host file over semihosting, named by the command line's first argument.
say "M0. the micro:bit image: slots, readings over semihosting"
sym_m0() { arm-none-eabi-nm "$ELF_M0" | awk -v s="$1" '$3 == s { print "0x" $1 }'; }
M0_A=$(sym_m0 _model_a_start)
M0_B=$(sym_m0 _model_b_start)
[ -n "$M0_A" ] && [ -n "$M0_B" ] || fail "slot symbols missing from $ELF_M0"
echo "slot A at $M0_A, slot B at $M0_B"
# run_m0 NAME IMAGE READINGS [loader args...]: like run, on the micro:bit, READINGS the table file
# ('-' for none); the exit status is left in $W/NAME.status for the caller to judge.
run_m0() {
  local name=$1 image=$2 readings=$3 status=0
  shift 3
  timeout 120 qemu-system-arm -machine microbit -nographic \
    -semihosting-config "enable=on,target=native,arg=ellipsoid-node,arg=$readings" \
    -icount shift=0 -kernel "$image" "$@" >"$W/$name.log" 2>"$W/$name.err" || status=$?
  echo "$status" >"$W/$name.status"
}
must_pass_m0() {
  if [ "$(cat "$W/$1.status")" != 0 ]; then
    tail -n 20 "$W/$1.log" "$W/$1.err" >&2 || true
    fail "the micro:bit run '$1' did not exit cleanly"
  fi
}
: >"$W/compared-m0.txt"
# shellcheck disable=SC2046
run_m0 m0-slot-a "$ELF_M0" "$W/readings.bin" $(load "$BLOB_A" "$M0_A")
must_pass_m0 m0-slot-a
$TOOL compare --device "$W/m0-slot-a.log" --replay "$W/replay-a.csv" --readings "$READINGS" \
  --slot A | sed 's/^/M0, slot A valid, B empty: /' | tee -a "$W/compared-m0.txt"
# --- fixed point on the node (M0): no FPU, so the integer path is the one this part should run ---
# shellcheck disable=SC2046
run_m0 m0-fixed-a "$ELF_M0" "$W/readings.bin" $(load "$BLOB_FX" "$M0_A")
must_pass_m0 m0-fixed-a
grep -q "^model slot=A .* arith=fixed$" "$W/m0-fixed-a.log" || fail "M0: the node did not take slot A as a fixed-point model"
$TOOL compare --device "$W/m0-fixed-a.log" --replay "$W/replay-fixed.csv" --readings "$READINGS" \
  --slot A | sed 's/^/M0, fixed point (--no-fpu) in slot A, B empty: /' | tee -a "$W/compared-m0.txt"
awk '!done && $1 == "r" && match($0, /d2=[0-9a-f]+/) {
  hex = "0123456789abcdef"; i = index(hex, substr($0, RSTART + 10, 1)) - 1
  j = (i % 2 == 0) ? i + 1 : i - 1
  $0 = substr($0, 1, RSTART + 9) substr(hex, j + 1, 1) substr($0, RSTART + 11); done = 1
} { print }' "$W/m0-fixed-a.log" >"$W/m0-fixed-tampered.log"
cmp -s "$W/m0-fixed-a.log" "$W/m0-fixed-tampered.log" && fail "M0: the tampered fixed-point log is unchanged"
if $TOOL compare --device "$W/m0-fixed-tampered.log" --replay "$W/replay-fixed.csv" --readings "$READINGS" \
    --slot A >"$W/m0-fixed-tampered.out" 2>&1; then
  fail "M0: compare accepted a fixed-point log with a changed d² bit"
fi
grep -q "d2 bits device" "$W/m0-fixed-tampered.out" || fail "M0: compare refused the tampered fixed-point log for another reason"
echo "refused, as it must be: $(grep -m1 MISMATCH "$W/m0-fixed-tampered.out")"
# shellcheck disable=SC2046
run_m0 m0-fixed-flipped "$ELF_M0" "$W/readings.bin" $(load "$W/fixed-flipped.blob" "$M0_A") $(load "$BLOB_B" "$M0_B")
must_pass_m0 m0-fixed-flipped
grep -q "^slot A unusable: CRC mismatch" "$W/m0-fixed-flipped.log" || fail "M0: the flipped fixed-point blob was not refused"
$TOOL compare --device "$W/m0-fixed-flipped.log" --replay "$W/replay-b.csv" --readings "$READINGS" \
  --slot B --unusable A | sed 's/^/M0, fixed point in slot A with one bit flipped, f32 B valid: /' | tee -a "$W/compared-m0.txt"
# --- end of fixed point on the node (M0) ---
# --- model bank on the node (M0): the same bank, bit-identical to the host in software float ---
# shellcheck disable=SC2046
run_m0 m0-bank-a "$ELF_M0" "$W/readings.bin" $(load "$BLOB_BANK" "$M0_A")
must_pass_m0 m0-bank-a
$TOOL compare --device "$W/m0-bank-a.log" --replay "$W/replay-bank.csv" --readings "$READINGS" \
  --slot A | sed 's/^/M0, model bank (fit --modes 2 --window 2 --drift-half-life 600) in slot A, B empty: /' \
  | tee -a "$W/compared-m0.txt"
# --- end of the model bank on the node (M0) ---
# The same blob programmed as a flash programmer would: `ellipsoid export` writes Intel HEX at the
# micro:bit's slot B, and the emulator's loader reads the HEX file (its addresses, not ours).
$ELLIPSOID export "$BLOB_A" --format ihex --board microbit --slot B --out "$W/model-a-slot-b.hex"
run_m0 m0-hex-b "$ELF_M0" "$W/readings.bin" -device "loader,file=$W/model-a-slot-b.hex"
must_pass_m0 m0-hex-b
$TOOL compare --device "$W/m0-hex-b.log" --replay "$W/replay-a.csv" --readings "$READINGS" \
  --slot B --unusable A | sed 's/^/M0, slot B programmed from `ellipsoid export --format ihex`: /' | tee -a "$W/compared-m0.txt"
# shellcheck disable=SC2046
run_m0 m0-a-flipped "$ELF_M0" "$W/readings.bin" $(load "$W/a-flipped.blob" "$M0_A") $(load "$BLOB_B" "$M0_B")
must_pass_m0 m0-a-flipped
$TOOL compare --device "$W/m0-a-flipped.log" --replay "$W/replay-b.csv" --readings "$READINGS" \
  --slot B --unusable A | sed 's/^/M0, slot A with one bit flipped, B valid: /' | tee -a "$W/compared-m0.txt"
grep -q "slot A unusable: CRC mismatch" "$W/m0-a-flipped.log" || fail "M0: slot A's CRC failure not reported"
# shellcheck disable=SC2046
run_m0 m0-a-torn "$ELF_M0" "$W/readings.bin" $(load "$W/a-torn.blob" "$M0_A") $(load "$BLOB_B" "$M0_B")
must_pass_m0 m0-a-torn
$TOOL compare --device "$W/m0-a-torn.log" --replay "$W/replay-b.csv" --readings "$READINGS" \
  --slot B --unusable A | sed 's/^/M0, slot A torn, B valid: /' | tee -a "$W/compared-m0.txt"
# shellcheck disable=SC2046
run_m0 m0-both "$ELF_M0" "$W/readings.bin" $(load "$BLOB_A" "$M0_A") $(load "$BLOB_B" "$M0_B")
must_pass_m0 m0-both
$TOOL compare --device "$W/m0-both.log" --replay "$W/replay-b.csv" --readings "$READINGS" \
  --slot B | sed 's/^/M0, A (sequence 1) and B (sequence 2) both valid: /' | tee -a "$W/compared-m0.txt"
# shellcheck disable=SC2046
run_m0 m0-none "$ELF_M0" "$W/readings.bin" $(load "$W/a-flipped.blob" "$M0_A") $(load "$W/b-torn.blob" "$M0_B")
must_pass_m0 m0-none
$TOOL no-model --device "$W/m0-none.log" | sed 's/^/M0, A bit-flipped, B torn: /' | tee -a "$W/compared-m0.txt"
# Slot images as a programmer leaves them on erased flash (the blob, then 0xFF, then the
# confirmation word: erased, or the mark), for the slot rules (src/slots.rs).
img() { $TOOL slot-image --input "$1" --out "$W/$2" "${@:3}" >/dev/null; }
img "$BLOB_A" a-seq-max.img --sequence 4294967295 --confirmed
img "$BLOB_B" b-seq-0.img --sequence 0
img "$BLOB_A" a-seq-5.img --sequence 5
img "$BLOB_B" b-seq-5.img --sequence 5
img "$BLOB_B" b-seq-5-confirmed.img --sequence 5 --confirmed
img "$BLOB_A" a-seq-1.img
# B: the second model with a unit error (feature 0's scale × 1e30): valid, but every d² overflows.
img "$BLOB_B" b-broken.img --scale0-times 1e30
img "$BLOB_B" b-broken-confirmed.img --scale0-times 1e30 --confirmed
# Wrap-around: A at 4 294 967 295 (even confirmed), B at 0: B is newer (RFC 1982).
# shellcheck disable=SC2046
run_m0 m0-wrap "$ELF_M0" "$W/readings.bin" $(load "$W/a-seq-max.img" "$M0_A") $(load "$W/b-seq-0.img" "$M0_B")
must_pass_m0 m0-wrap
grep -q "^model slot=B seq=0 " "$W/m0-wrap.log" || fail "M0: sequence 0 did not follow 4294967295"
$TOOL compare --device "$W/m0-wrap.log" --replay "$W/replay-b.csv" --readings "$READINGS" \
  --slot B | sed 's/^/M0, A at sequence 4294967295, B at 0 (wrapped): /' | tee -a "$W/compared-m0.txt"
# Equal sequences, different models: a reported tie; slot A by the rule, or B when only B is confirmed.
# shellcheck disable=SC2046
run_m0 m0-tie "$ELF_M0" "$W/readings.bin" $(load "$W/a-seq-5.img" "$M0_A") $(load "$W/b-seq-5.img" "$M0_B")
must_pass_m0 m0-tie
grep -q "^slot B tie with A: both seq=5, different models; A used" "$W/m0-tie.log" \
  || fail "M0: the tie of equal sequences was not reported"
$TOOL compare --device "$W/m0-tie.log" --replay "$W/replay-a.csv" --readings "$READINGS" \
  --slot A | sed 's/^/M0, A and B both sequence 5, neither confirmed (tie reported, A by rule): /' \
  | tee -a "$W/compared-m0.txt"
# shellcheck disable=SC2046
run_m0 m0-tie-b "$ELF_M0" "$W/readings.bin" $(load "$W/a-seq-5.img" "$M0_A") $(load "$W/b-seq-5-confirmed.img" "$M0_B")
must_pass_m0 m0-tie-b
grep -q "^slot B tie with A: both seq=5, different models; B used" "$W/m0-tie-b.log" \
  || fail "M0: the tie won by the confirmed slot was not reported"
$TOOL compare --device "$W/m0-tie-b.log" --replay "$W/replay-b.csv" --readings "$READINGS" \
  --slot B | sed 's/^/M0, A and B both sequence 5, B confirmed (tie reported, B by rule): /' \
  | tee -a "$W/compared-m0.txt"
# Fall-back: B (newer, unconfirmed) faults on every reading; after its probation the node takes A.
# shellcheck disable=SC2046
run_m0 m0-fallback "$ELF_M0" "$W/readings.bin" $(load "$W/a-seq-1.img" "$M0_A") $(load "$W/b-broken.img" "$M0_B")
must_pass_m0 m0-fallback
$TOOL fallback --device "$W/m0-fallback.log" --replay "$W/replay-a.csv" --from B --to A --probation 60 \
  | sed 's/^/M0, B unconfirmed and faulting, A valid: /' | tee -a "$W/compared-m0.txt"
# The check can fail: one d² bit changed after the fall-back must be refused.
awk '!done && $1 == "r" && $2 >= 60 && match($0, /d2=[0-9a-f]+/) {
  c = substr($0, RSTART + 10, 1); $0 = substr($0, 1, RSTART + 9) (c == "0" ? "1" : "0") substr($0, RSTART + 11)
  done = 1
} { print }' "$W/m0-fallback.log" >"$W/m0-fallback-tampered.log"
cmp -s "$W/m0-fallback.log" "$W/m0-fallback-tampered.log" && fail "the tampered fall-back log is unchanged"
if $TOOL fallback --device "$W/m0-fallback-tampered.log" --replay "$W/replay-a.csv" --from B --to A \
    --probation 60 >"$W/m0-fallback-tampered.out" 2>&1; then
  fail "the fall-back check accepted a log with a changed d² bit"
fi
grep -q MISMATCH "$W/m0-fallback-tampered.out" || fail "the fall-back check refused the tampered log for another reason"
# The same B, confirmed: trusted, no probation, so no fall-back: it faults on every reading.
# shellcheck disable=SC2046
run_m0 m0-no-fallback "$ELF_M0" "$W/readings.bin" $(load "$W/a-seq-1.img" "$M0_A") $(load "$W/b-broken-confirmed.img" "$M0_B")
must_pass_m0 m0-no-fallback
grep -q "^fallback\|^probation" "$W/m0-no-fallback.log" && fail "M0: a confirmed model was put on probation"
grep -q "^end scored=0 faults=14400$" "$W/m0-no-fallback.log" || fail "M0: the confirmed broken model did not fault on every reading"
echo "M0, the same faulting B but confirmed: no probation, no fall-back, all 14400 readings faults (fault line on)" \
  | tee -a "$W/compared-m0.txt"
# shellcheck disable=SC2046
run_m0 m0-pins "$ELF_M0" "$W/golden-n5.bin" $(load "$W/golden-n5.blob" "$M0_A")
must_pass_m0 m0-pins
$TOOL pins-compare --pins "$PINS" --device "$W/m0-pins.log" | sed 's/^/M0: /' | tee -a "$W/compared-m0.txt"
# A reading file the host cannot open: reported, fault line on, nothing scored, a failed run.
# shellcheck disable=SC2046
run_m0 m0-no-file "$ELF_M0" "$W/no-such-readings.bin" $(load "$BLOB_A" "$M0_A")
[ "$(cat "$W/m0-no-file.status")" != 0 ] || fail "M0: a missing reading file ended the run as a success"
grep -q "^readings unusable: $W/no-such-readings.bin: the host cannot open it" "$W/m0-no-file.log" \
  || fail "M0: the missing reading file was not reported"
grep -q "^pin fault on" "$W/m0-no-file.log" || fail "M0: the fault line stayed off without readings"
grep -q "^r " "$W/m0-no-file.log" && fail "M0: readings were scored without a reading file"
echo "M0, reading file missing: reported, fault line on, nothing scored, run failed" | tee -a "$W/compared-m0.txt"

say "M0. panic machinery on the decode and score paths of the M0 image"
$TOOL reach --elf "$ELF_M0" --roots slots::load,node::score,node::explain,node::track | tee "$W/reach-m0.txt"
# The padding after `__aeabi_dmul` is skipped, not the function: a call planted at its last
# instruction (just before the padding) must be found.
if $TOOL reach --elf "$ELF_M0" --roots slots::load,node::score,node::explain \
    --plant-panic-in __aeabi_dmul >"$W/reach-m0-planted.out" 2>&1; then
  fail "reach missed a panic call planted at the end of __aeabi_dmul in the M0 image"
fi
grep -q "panic machinery reachable" "$W/reach-m0-planted.out" || fail "reach refused the planted image for another reason"
echo "reach (M0): a panic call planted at the last instruction of __aeabi_dmul, before its padding, is found" \
  | tee -a "$W/reach-m0.txt"

say "M0. cost per score in f32 (software float)"
run_m0 m0-cost "$COST_ELF_M0" -
must_pass_m0 m0-cost
cat "$W/m0-cost.log"
for readme in firmware-example/README.md README.md; do
  $TOOL figures-m0 --elf "$ELF_M0" --cost "$W/m0-cost.log" --cost-m4 "$W/cost.log" \
    --device "$W/m0-slot-a.log" --compared "$W/compared-m0.txt" --reach "$W/reach-m0.txt" --readme "$readme"
done
# --- end of Cortex-M0 ---------------------------------------------------------------------------
if grep -q '\*\*missed\*\*' firmware-example/README.md README.md; then
  fail "a cost target was missed (see firmware-example/README.md)"
fi
capi/e2e.sh "$W/demo" # the C API's example firmware on the same demo (capi/e2e.sh says what it checks)
say "e2e passed"
