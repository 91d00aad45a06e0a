/*
 * err.h - the one return convention of core/.
 *
 * Every fallible core function returns 0 on success or one of the negative
 * codes below.  The names come from one X-macro so that the enum and the
 * name table cannot drift apart.  core_strerror() never returns NULL.
 */
#ifndef ODDSKY_CORE_ERR_H
#define ODDSKY_CORE_ERR_H

#define CORE_ERRNO_MAP(X)                                                     \
    X(EINVAL, -1, "invalid argument")                                         \
    X(ENOMEM, -2, "out of memory")                                            \
    X(ERANGE, -3, "value out of range")                                       \
    X(ESHORT, -4, "buffer too short")                                         \
    X(EFORMAT, -5, "malformed snapshot")                                      \
    X(EVERSION, -6, "unsupported snapshot version")                           \
    X(ECHECKSUM, -7, "snapshot checksum mismatch")                            \
    X(EMISMATCH, -8, "snapshot parameters do not match")                      \
    X(EAGAIN, -9, "not ready yet")

enum core_err {
    CORE_OK = 0,
#define CORE_ERR_ENUM(name, val, msg) CORE_##name = (val),
    CORE_ERRNO_MAP(CORE_ERR_ENUM)
#undef CORE_ERR_ENUM
};

/* Human-readable text for a core return code (0 gives "ok"). */
const char *core_strerror(int code);

#endif
