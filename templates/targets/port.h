/* The few services a luforge test driver needs from its image: write bytes to the host, stop with a status,
   and mark the start and end of a counted window. Bare-metal images use semihosting, hosted ones the C library. */
#ifndef LUF_PORT_H
#define LUF_PORT_H

#include <stddef.h>

void luf_out(const char *s, size_t n);
void luf_exit(int status);
/* The instruction-counting plugin snapshots its counters on entry to these two functions. */
void luf_mark_begin(void);
void luf_mark_end(void);

#endif
