/*
 * fuzz_util.h - small helpers shared by the fuzz targets (header only, so
 * run.sh's one-file-per-target build needs no extra source).
 *
 * fuzz_top() finds the repository (ODDSKY_TOP, else the working directory
 * or one of its parents holding config/demo-featmap.json) because targets
 * read the demo feature map and schema from it; fuzz_tmpdir() makes a
 * private temporary folder; fuzz_check() aborts with a message, which
 * libFuzzer reports as a crash with the input saved.
 */
#ifndef ODDSKY_TESTS_FUZZ_UTIL_H
#define ODDSKY_TESTS_FUZZ_UTIL_H

#include <limits.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/stat.h>
#include <unistd.h>

static inline void fuzz_check(int cond, const char *what)
{
    if (!cond) {
        fprintf(stderr, "invariant violated: %s\n", what);
        abort();
    }
}

static inline int fuzz_is_top(const char *dir)
{
    char p[PATH_MAX];
    struct stat st;
    snprintf(p, sizeof p, "%s/config/demo-featmap.json", dir);
    return stat(p, &st) == 0;
}

/* The repository folder, static storage; aborts when not found. */
static inline const char *fuzz_top(void)
{
    static char top[PATH_MAX];
    if (top[0])
        return top;
    const char *env = getenv("ODDSKY_TOP");
    if (env && env[0] && fuzz_is_top(env)) {
        snprintf(top, sizeof top, "%s", env);
        return top;
    }
    char cwd[PATH_MAX];
    if (!getcwd(cwd, sizeof cwd))
        cwd[0] = '\0';
    for (int up = 0; up < 6 && cwd[0]; up++) {
        if (fuzz_is_top(cwd)) {
            snprintf(top, sizeof top, "%s", cwd);
            return top;
        }
        char *slash = strrchr(cwd, '/');
        if (!slash)
            break;
        if (slash == cwd)
            slash[1] = '\0';
        else
            *slash = '\0';
        if (!strcmp(cwd, "/") && !fuzz_is_top(cwd))
            break;
    }
    fprintf(stderr, "fuzz: repository not found: set ODDSKY_TOP or run from "
                    "inside the repository\n");
    abort();
}

/* Read a whole file (NUL-terminated); aborts on failure. */
static inline char *fuzz_slurp(const char *path, size_t *len)
{
    FILE *f = fopen(path, "rb");
    fuzz_check(f != NULL, path);
    fseek(f, 0, SEEK_END);
    long n = ftell(f);
    fseek(f, 0, SEEK_SET);
    fuzz_check(n >= 0, path);
    char *buf = malloc((size_t)n + 1);
    fuzz_check(buf && fread(buf, 1, (size_t)n, f) == (size_t)n, path);
    fclose(f);
    buf[n] = '\0';
    if (len)
        *len = (size_t)n;
    return buf;
}

static inline void fuzz_write(const char *dir, const char *name,
                              const void *buf, size_t len)
{
    char p[PATH_MAX];
    snprintf(p, sizeof p, "%s/%s", dir, name);
    FILE *f = fopen(p, "wb");
    fuzz_check(f != NULL, p);
    fuzz_check(fwrite(buf, 1, len, f) == len && fclose(f) == 0, p);
}

/* A new private folder under $TMPDIR (or /tmp), static storage. */
static inline const char *fuzz_tmpdir(const char *tag)
{
    static char dir[PATH_MAX];
    const char *tmp = getenv("TMPDIR");
    snprintf(dir, sizeof dir, "%s/oddsky-fuzz-%s-XXXXXX",
             tmp && tmp[0] ? tmp : "/tmp", tag);
    fuzz_check(mkdtemp(dir) != NULL, "mkdtemp");
    return dir;
}

#endif
