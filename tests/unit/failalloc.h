/*
 * failalloc.h - a failing allocator for unit tests that prove every
 * allocation failure path returns an error.
 *
 * Include it once, in a test's .c file, before any test code: it defines
 * malloc() and calloc() for the test binary (glibc lets the executable's
 * definitions win).  They fail once fa_countdown allocations have
 * succeeded (-1 = never) and otherwise forward to the next allocator in the
 * link order (libc, or a sanitizer's), so frees stay consistent.  Under
 * valgrind the shim never runs (valgrind replaces malloc), so those tests
 * skip themselves there.
 */
#ifndef ODDSKY_TESTS_FAILALLOC_H
#define ODDSKY_TESTS_FAILALLOC_H

#include <dlfcn.h>
#include <stddef.h>

static long fa_countdown = -1;
static void *(*fa_next_malloc)(size_t);
static void *(*fa_next_calloc)(size_t, size_t);
static unsigned char fa_boot[1024];
static size_t fa_boot_used;

static int fa_should_fail(void)
{
    if (fa_countdown < 0)
        return 0;
    if (fa_countdown == 0)
        return 1;
    fa_countdown--;
    return 0;
}

void *malloc(size_t n)
{
    if (!fa_next_malloc)
        *(void **)&fa_next_malloc = dlsym(RTLD_NEXT, "malloc");
    if (fa_should_fail())
        return NULL;
    return fa_next_malloc(n);
}

void *calloc(size_t a, size_t b)
{
    static int resolving;
    if (!fa_next_calloc) {
        if (resolving) { /* dlsym itself may ask for zeroed memory */
            size_t n = (a * b + 15) & ~(size_t)15;
            if (fa_boot_used + n > sizeof fa_boot)
                return NULL;
            void *p = fa_boot + fa_boot_used;
            fa_boot_used += n;
            return p; /* static storage: already zero */
        }
        resolving = 1;
        *(void **)&fa_next_calloc = dlsym(RTLD_NEXT, "calloc");
        resolving = 0;
    }
    if (fa_should_fail())
        return NULL;
    return fa_next_calloc(a, b);
}

#endif
