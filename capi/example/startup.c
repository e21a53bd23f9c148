/* Start-up for the C example on the emulated MPS2 AN386 (Cortex-M4F), without a C library: the
 * vector table, the reset handler (copy .data, zero .bss, turn the FPU on, call main), and the
 * emulator's console and exit through Arm semihosting (`bkpt 0xab`). */
#include <stdint.h>

#include "board.h"

extern uint32_t _stack_top, _data_start, _data_end, _data_load, _bss_start, _bss_end;
int main(void);

/* Semihosting operation numbers (Arm's semihosting specification). */
#define SYS_OPEN 0x01
#define SYS_WRITE 0x05
#define SYS_EXIT 0x18
/* SYS_EXIT reasons: the application exited / a run-time error (the emulator exits 0 / 1). */
#define ADP_STOPPED_APPLICATION_EXIT 0x20026
#define ADP_STOPPED_RUN_TIME_ERROR 0x20023

static uint32_t semihost(uint32_t op, const void *arg) {
  register uint32_t r0 __asm__("r0") = op;
  register const void *r1 __asm__("r1") = arg;
  __asm__ volatile("bkpt 0xab" : "+r"(r0) : "r"(r1) : "memory");
  return r0;
}

/* The emulator's standard output: ":tt" opened for writing (mode 4, "w"). SYS_WRITE0 would go to
   its standard error instead. */
static uint32_t console_handle(void) {
  static int32_t handle = -1;
  if (handle < 0) {
    const uint32_t args[3] = {(uint32_t)(uintptr_t)":tt", 4, 3};
    handle = (int32_t)semihost(SYS_OPEN, args);
  }
  return (uint32_t)handle;
}

void console_write(const char *s) {
  uint32_t len = 0;
  while (s[len]) len++;
  const uint32_t args[3] = {console_handle(), (uint32_t)(uintptr_t)s, len};
  semihost(SYS_WRITE, args);
}

void board_exit(int ok) {
  semihost(SYS_EXIT, (const void *)(uintptr_t)(ok ? ADP_STOPPED_APPLICATION_EXIT
                                                  : ADP_STOPPED_RUN_TIME_ERROR));
  for (;;) {
  }
}

static void fault_handler(void) {
  console_write("fault: the core took an exception\n");
  board_exit(0);
}

void reset_handler(void) {
  uint32_t *src = &_data_load, *dst = &_data_start;
  while (dst < &_data_end) *dst++ = *src++;
  for (dst = &_bss_start; dst < &_bss_end;) *dst++ = 0;
  /* CPACR: full access to the coprocessors 10 and 11, the FPU, before any float instruction. */
  *(volatile uint32_t *)0xE000ED88u |= 0xFu << 20;
  __asm__ volatile("dsb\n\tisb" ::: "memory");
  board_exit(main() == 0);
}

/* The first sixteen entries: initial stack pointer, reset, and the core's fault exceptions. */
__attribute__((section(".vectors"), used)) static const void *const vectors[16] = {
    &_stack_top,   (const void *)reset_handler, (const void *)fault_handler,
    (const void *)fault_handler, (const void *)fault_handler, (const void *)fault_handler,
    (const void *)fault_handler,
};
