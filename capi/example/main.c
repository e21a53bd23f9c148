/* The C example firmware: a sensor node written in C over the Ellipsoid C API, for the emulated
 * Arm MPS2 AN386 (Cortex-M4F). capi/e2e.sh builds it with arm-none-eabi-gcc, runs it in
 * qemu-system-arm with the demo's blob in slot A and the demo's reading table loaded, and checks
 * its report against `ellipsoid replay` with the same tool and rules as the Rust firmware's.
 *
 * It decodes the blob in slot A, scores every reading of the table, runs the alarm machine, drives
 * the two LEDs (bit 0 alarm, bit 1 fault) and reports, in the Rust firmware's line format
 * (firmware-example/src/node.rs), every pin change and every reading:
 *
 *   r 12 d2=40490fdb v=above alarm=1 fault=0 event=raised top=3
 *
 * It reports the stack it used at boot (decode) and while scoring, from the top of the stack.
 * Then it measures the cost of a score with SysTick (one tick per 40 instructions under
 * `-icount shift=0`, calibrated here as the Rust `score-cost` image does).
 *
 * No C library: startup.c has the vector table, the reset handler and the console. */
#define ELLIPSOID_N 5
#include "ellipsoid.h"

#include <stdint.h>

#include "board.h"

extern const uint8_t _model_a_start[], _model_a_len[], _readings_start[], _readings_len[];
extern uint32_t _stack_top;

/* The FPGA I/O block's LED register: bit 0 is the alarm line, bit 1 the fault line. */
#define LEDS (*(volatile uint32_t *)0x40028000u)
/* SysTick: control and status, reload, current value. */
#define SYST_CSR (*(volatile uint32_t *)0xE000E010u)
#define SYST_RVR (*(volatile uint32_t *)0xE000E014u)
#define SYST_CVR (*(volatile uint32_t *)0xE000E018u)

/* ---- a small line printer (no C library) ---------------------------------------------------- */

static char line[160];
static unsigned line_len;

static void put_str(const char *s) {
  while (*s && line_len < sizeof line - 1) line[line_len++] = *s++;
}

static void put_u32(uint32_t v) {
  char d[10];
  int k = 0;
  do {
    d[k++] = (char)('0' + v % 10);
    v /= 10;
  } while (v);
  while (k) {
    char c[2] = {d[--k], 0};
    put_str(c);
  }
}

static void put_hex(uint32_t v) {
  static const char hex[] = "0123456789abcdef";
  for (int s = 28; s >= 0; s -= 4) {
    char c[2] = {hex[(v >> s) & 0xF], 0};
    put_str(c);
  }
}

static void end_line(void) {
  line[line_len++] = '\n';
  line[line_len] = 0;
  console_write(line);
  line_len = 0;
}

static uint32_t bits(float f) {
  union {
    float f;
    uint32_t u;
  } v = {f};
  return v.u;
}

/* ---- stack use: paint below the stack pointer, later find the deepest word overwritten ------ */

#define PAINT 0x5EE55EE5u
#define PAINT_WORDS 16384u /* 64 KiB below the stack pointer */
static uint32_t *paint_low;

__attribute__((noinline)) static void paint_stack(void) {
  uint32_t *sp;
  __asm__ volatile("mov %0, sp" : "=r"(sp));
  paint_low = sp - PAINT_WORDS;
  for (uint32_t *p = paint_low; p < sp - 8; p++) *p = PAINT;
}

/* Bytes from the top of the stack to the deepest word overwritten since the last paint. */
static uint32_t stack_peak(void) {
  uint32_t *p = paint_low;
  while (*p == PAINT) p++;
  return (uint32_t)((uintptr_t)&_stack_top - (uintptr_t)p);
}

/* ---- the two lines -------------------------------------------------------------------------- */

/* Last level driven on each line: -1 before the first. */
static int levels[2] = {-1, -1};

static void drive(int which, int on, int64_t at) {
  static const char *const names[2] = {"alarm", "fault"};
  if (levels[which] == on) return;
  levels[which] = on;
  if (on)
    LEDS |= 1u << which;
  else
    LEDS &= ~(1u << which);
  put_str("pin ");
  put_str(names[which]);
  put_str(on ? " on level=high at=" : " off level=low at=");
  if (at < 0)
    put_str("boot");
  else
    put_u32((uint32_t)at);
  end_line();
}

/* The fault line first: when both change, the alarm is never seen without its context. */
static void drive_both(const ellipsoid_step_t *step, int64_t at) {
  drive(1, step->fault, at);
  drive(0, step->alarm, at);
}

static const char *event_name(ellipsoid_event_kind kind) {
  switch (kind) {
    case ELLIPSOID_EVENT_RAISED: return "raised";
    case ELLIPSOID_EVENT_CLEARED: return "cleared";
    case ELLIPSOID_EVENT_RESET: return "reset";
    case ELLIPSOID_EVENT_FAULT: return "fault";
    case ELLIPSOID_EVENT_FAULT_CLEARED: return "fault-cleared";
    default: return "other";
  }
}

/* ---- cost per score ------------------------------------------------------------------------- */

#define REPS 4000u
#define SPIN 1000001u

static uint32_t ticks(void) { return SYST_CVR; }
static uint32_t elapsed(uint32_t start, uint32_t end) { return (start - end) & 0x00FFFFFFu; }

/* A loop of exactly 2 * n instructions. */
static void spin(uint32_t n) {
  __asm__ volatile("1: subs %0, #1\n\tbne 1b" : "+r"(n));
}

__attribute__((noinline)) static int empty_call(const ellipsoid_model *m, const float *x) {
  __asm__ volatile("" ::"r"(m), "r"(x) : "memory");
  return 0;
}

static void measure_cost(const ellipsoid_model *model, const float *rows, uint32_t count) {
  SYST_RVR = 0x00FFFFFFu;
  SYST_CVR = 0;
  SYST_CSR = 5u; /* enable, core clock, no interrupt */
  uint32_t t0 = ticks();
  spin(SPIN);
  uint32_t cal = elapsed(t0, ticks());
  put_str("calibrate instructions=");
  put_u32(2 * SPIN);
  put_str(" ticks=");
  put_u32(cal);
  end_line();
  /* Four readings the model scores (not faults), used in rotation. */
  const float *xs[4];
  unsigned found = 0;
  for (uint32_t i = 0; i < count && found < 4; i++) {
    ellipsoid_score_t s;
    if (ellipsoid_score(model, rows + (uint64_t)i * ELLIPSOID_N, ELLIPSOID_N, &s) == ELLIPSOID_OK)
      xs[found++] = rows + (uint64_t)i * ELLIPSOID_N;
  }
  if (found < 4) {
    put_str("cost not measured: fewer than four scored readings");
    end_line();
    return;
  }
  volatile uint32_t sink = 0;
  ellipsoid_score_t s;
  t0 = ticks();
  for (uint32_t k = 0; k < REPS; k++) {
    ellipsoid_score(model, xs[k & 3], ELLIPSOID_N, &s);
    sink += bits(s.d2);
  }
  uint32_t t_score = elapsed(t0, ticks());
  t0 = ticks();
  for (uint32_t k = 0; k < REPS; k++) sink += (uint32_t)empty_call(model, xs[k & 3]);
  uint32_t t_empty = elapsed(t0, ticks());
  (void)sink;
  /* Instructions, as fixed point with one decimal: ticks * (2 * SPIN / cal) / REPS * 10. */
  uint64_t per_score_x10 = (uint64_t)t_score * 2u * SPIN * 10u / ((uint64_t)cal * REPS);
  uint64_t overhead_x10 = (uint64_t)t_empty * 2u * SPIN * 10u / ((uint64_t)cal * REPS);
  put_str("cost n=");
  put_u32(ELLIPSOID_N);
  put_str(" reps=");
  put_u32(REPS);
  put_str(" ticks=");
  put_u32(t_score);
  put_str(" instr_per_score=");
  put_u32((uint32_t)(per_score_x10 / 10));
  put_str(".");
  put_u32((uint32_t)(per_score_x10 % 10));
  put_str(" loop_overhead=");
  put_u32((uint32_t)(overhead_x10 / 10));
  put_str(".");
  put_u32((uint32_t)(overhead_x10 % 10));
  end_line();
}

static void print_leds(void) {
  put_str("leds=");
  put_str((LEDS & 2u) ? "1" : "0");
  put_str((LEDS & 1u) ? "1" : "0");
  end_line();
}

/* ---- the node ------------------------------------------------------------------------------- */

static ellipsoid_model_storage_t storage;
static ellipsoid_alarm_t alarm;

int main(void) {
  paint_stack();
  put_str("boot c-example n=");
  put_u32((uint32_t)ellipsoid_features());
  end_line();
  if (ellipsoid_features() != ELLIPSOID_N) {
    put_str("the library is built for another N");
    end_line();
    return 1;
  }

  const ellipsoid_model *model;
  ellipsoid_status st = ellipsoid_decode(_model_a_start, (size_t)_model_a_len, &storage,
                                         sizeof storage, &model);
  ellipsoid_step_t step = {0};
  if (st != ELLIPSOID_OK) {
    put_str("slot A unusable: ");
    put_str(ellipsoid_status_name(st));
    end_line();
    put_str("model none");
    end_line();
    ellipsoid_alarm_init_without_model(&alarm);
    step.fault = 1;
    drive_both(&step, -1);
    put_str("not scoring: no valid model");
    end_line();
    print_leds();
    return 0;
  }
  ellipsoid_model_info_t info;
  ellipsoid_model_info(model, &info);
  put_str("slot A valid seq=");
  put_u32(info.sequence);
  put_str(" id=0x");
  put_hex(info.model_id);
  end_line();
  put_str("model slot=A seq=");
  put_u32(info.sequence);
  put_str(" id=0x");
  put_hex(info.model_id);
  end_line();
  ellipsoid_alarm_init(&alarm, model);
  drive_both(&step, -1);
  put_str("stack boot_bytes=");
  put_u32(stack_peak());
  end_line();

  /* The reading table: "ERTB", N, count (u32 LE each), then count * N floats. */
  const uint32_t *head = (const uint32_t *)_readings_start;
  uint32_t capacity = ((uint32_t)(uintptr_t)_readings_len - 12u) / (4u * ELLIPSOID_N);
  if (head[0] != 0x42545245u /* "ERTB" */ || head[1] != ELLIPSOID_N || head[2] > capacity) {
    put_str("readings unusable: no table of this N");
    end_line();
    step.fault = 1;
    step.alarm = (uint8_t)(levels[0] == 1);
    drive_both(&step, -1);
    print_leds();
    return 1;
  }
  uint32_t count = head[2];
  const float *rows = (const float *)(head + 3);
  put_str("readings count=");
  put_u32(count);
  end_line();
  paint_stack();

  uint32_t scored = 0, faults = 0;
  for (uint32_t i = 0; i < count; i++) {
    const float *x = rows + (uint64_t)i * ELLIPSOID_N;
    ellipsoid_score_t s;
    ellipsoid_score(model, x, ELLIPSOID_N, &s);
    ellipsoid_alarm_update(&alarm, &s, &step);
    int raised = 0;
    for (unsigned k = 0; k < step.n_events; k++)
      raised |= step.events[k].kind == ELLIPSOID_EVENT_RAISED;
    put_str("r ");
    put_u32(i);
    if (s.status == ELLIPSOID_OK) {
      put_str(" d2=");
      put_hex(bits(s.d2));
      put_str(s.above ? " v=above" : " v=below");
    } else {
      put_str(" d2=- v=fault");
    }
    put_str(step.alarm ? " alarm=1" : " alarm=0");
    put_str(step.fault ? " fault=1 event=" : " fault=0 event=");
    if (step.n_events == 0) put_str("-");
    for (unsigned k = 0; k < step.n_events; k++) {
      if (k) put_str("+");
      put_str(event_name(step.events[k].kind));
    }
    if (raised) {
      /* Which feature broke the pattern: the largest contribution to d². */
      float c[ELLIPSOID_N];
      ellipsoid_score_t e;
      if (ellipsoid_explain(model, x, ELLIPSOID_N, c, ELLIPSOID_N, &e) == ELLIPSOID_OK) {
        unsigned top = 0;
        for (unsigned k = 1; k < ELLIPSOID_N; k++)
          if (c[k] > c[top]) top = k;
        put_str(" top=");
        put_u32(top);
      }
    }
    if (s.status != ELLIPSOID_OK) {
      put_str(" cause=");
      put_str(ellipsoid_status_name(s.status));
      if (s.status == ELLIPSOID_FAULT_NOT_FINITE || s.status == ELLIPSOID_FAULT_LOG_DOMAIN) {
        put_str(":");
        put_u32(s.feature);
      }
    }
    end_line();
    drive_both(&step, i);
    if (step.fault)
      faults++;
    else
      scored++;
  }
  put_str("end scored=");
  put_u32(scored);
  put_str(" faults=");
  put_u32(faults);
  end_line();
  print_leds();
  put_str("stack run_bytes=");
  put_u32(stack_peak());
  end_line();

  measure_cost(model, rows, count);
  return 0;
}
