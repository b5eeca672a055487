/* Port of the luforge test driver to a bare-metal image: output and exit through semihosting (the host sees
   SYS_WRITE on its standard output and SYS_EXIT_EXTENDED as QEMU's exit status). */
#include "port.h"

int luf_semihost(int op, void *arg);

enum { SYS_OPEN = 0x01, SYS_WRITE = 0x05, SYS_EXIT_EXTENDED = 0x20 };
#define ADP_STOPPED_APPLICATION_EXIT 0x20026

void luf_out(const char *s, size_t n)
{
    /* ":tt" opened for writing (mode 4) is the host's standard output (Arm semihosting specification) */
    static long handle = -1;
    unsigned long block[3];
    if (handle < 0) {
        static const char tt[] = ":tt";
        block[0] = (unsigned long)tt;
        block[1] = 4;
        block[2] = 3;
        handle = luf_semihost(SYS_OPEN, block);
    }
    block[0] = (unsigned long)handle;
    block[1] = (unsigned long)s;
    block[2] = (unsigned long)n;
    (void)luf_semihost(SYS_WRITE, block);
}

void luf_exit(int status)
{
    unsigned long block[2];
    block[0] = ADP_STOPPED_APPLICATION_EXIT;
    block[1] = (unsigned long)(long)status;
    for (;;)
        (void)luf_semihost(SYS_EXIT_EXTENDED, block);
}

/* noinline and an empty asm keep each marker a real call the plugin can see */
__attribute__((noinline)) void luf_mark_begin(void) { __asm__ volatile("" ::: "memory"); }
__attribute__((noinline)) void luf_mark_end(void) { __asm__ volatile("" ::: "memory"); }

/* GCC requires a freestanding environment to provide memcpy, memmove, memset and memcmp and may call them for
   plain C loops (GCC manual, "Language Standards Supported by GCC"): the rows linked without a C library get
   them here, byte by byte; the attribute keeps GCC from turning these very loops back into such calls. */
#define LUF_NO_LIBCALLS __attribute__((optimize("no-tree-loop-distribute-patterns")))
void *memcpy(void *restrict dst, const void *restrict src, size_t n);
void *memmove(void *dst, const void *src, size_t n);
void *memset(void *dst, int c, size_t n);
int memcmp(const void *x, const void *y, size_t n);

LUF_NO_LIBCALLS void *memcpy(void *restrict dst, const void *restrict src, size_t n)
{
    unsigned char *d = dst;
    const unsigned char *s = src;
    while (n--) *d++ = *s++;
    return dst;
}

LUF_NO_LIBCALLS void *memmove(void *dst, const void *src, size_t n)
{
    unsigned char *d = dst;
    const unsigned char *s = src;
    if (d < s)
        while (n--) *d++ = *s++;
    else
        while (n--) d[n] = s[n];
    return dst;
}

LUF_NO_LIBCALLS void *memset(void *dst, int c, size_t n)
{
    unsigned char *d = dst;
    while (n--) *d++ = (unsigned char)c;
    return dst;
}

LUF_NO_LIBCALLS int memcmp(const void *x, const void *y, size_t n)
{
    const unsigned char *a = x, *b = y;
    for (; n; --n, ++a, ++b)
        if (*a != *b) return *a < *b ? -1 : 1;
    return 0;
}
