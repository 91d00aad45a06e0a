/*
 * err.c - names for the core return codes declared in err.h.
 */
#include "err.h"

const char *core_strerror(int code)
{
    switch (code) {
    case CORE_OK:
        return "ok";
#define CORE_ERR_CASE(name, val, msg) \
    case (val):                       \
        return (msg);
        CORE_ERRNO_MAP(CORE_ERR_CASE)
#undef CORE_ERR_CASE
    default:
        return "unknown error";
    }
}
