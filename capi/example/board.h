/* What the example's main.c needs from the board (startup.c): a console and an exit. */
#ifndef BOARD_H
#define BOARD_H

/* Write a NUL-terminated string to the emulator's console. */
void console_write(const char *s);
/* End the run: the emulator exits with 0 when ok is non-zero, else with 1. */
void board_exit(int ok);

#endif
