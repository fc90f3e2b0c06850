/*
 * util.h: the few helpers every part of stopcock shares: allocators that
 * die on exhaustion (so callers carry no NULL checks), strict number
 * parsing, and the sysexits codes the command-line tools return.
 * Nothing here performs I/O except fatal(), which writes one line to
 * stderr before aborting.
 */
#ifndef STOPCOCK_UTIL_H
#define STOPCOCK_UTIL_H

#include <stddef.h>
#include <stdint.h>

#define SC_NORETURN __attribute__((noreturn))
#define SC_PRINTF(a, b) __attribute__((format(printf, a, b)))
#define SC_NELEM(x) (sizeof(x) / sizeof((x)[0]))

/* sysexits(3) values, spelled out so no platform header is needed. */
#define SC_EX_OK 0
#define SC_EX_USAGE 64
#define SC_EX_DATAERR 65
#define SC_EX_NOINPUT 66
#define SC_EX_SOFTWARE 70
#define SC_EX_OSERR 71
#define SC_EX_IOERR 74
#define SC_EX_CONFIG 78

void *xmalloc(size_t);
void *xcalloc(size_t, size_t);
void *xreallocarray(void *, size_t, size_t);
char *xstrdup(const char *);
char *xstrndup(const char *, size_t);
int xasprintf(char **, const char *, ...) SC_PRINTF(2, 3);
void fatal(const char *, ...) SC_PRINTF(1, 2) SC_NORETURN;

/*
 * Strict parsers: the whole token must be consumed, the value must be
 * finite and inside [min, max]. Return 0 on success, -1 otherwise.
 */
int parse_double(const char *s, double min, double max, double *out);
int parse_u64(const char *s, uint64_t max, uint64_t *out);
/* "250ms", "1s", "5m", "2h", or a bare number of seconds. */
int parse_duration(const char *s, double *seconds);

/* digest.c: the first nbytes (at most 32) of SHA-256 over p as lowercase
 * hex into out, which holds 2 * nbytes + 1. */
void digest_sha256_hex(const void *p, size_t len, size_t nbytes, char *out);

/* Constant-time comparison for secrets (bearer tokens). */
int timingsafe_eq(const void *, size_t, const void *, size_t);

#endif
