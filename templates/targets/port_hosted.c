/* Port of the luforge test driver to a hosted image (the host itself, or a user-mode emulator): output on
   standard output, exit through the C library. */
#include <stdio.h>
#include <stdlib.h>

#include "port.h"

void luf_out(const char *s, size_t n)
{
    (void)fwrite(s, 1, n, stdout);
}

void luf_exit(int status)
{
    (void)fflush(stdout);
    exit(status);
}

__attribute__((noinline)) void luf_mark_begin(void) { __asm__ volatile("" ::: "memory"); }
__attribute__((noinline)) void luf_mark_end(void) { __asm__ volatile("" ::: "memory"); }
