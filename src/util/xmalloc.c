/*
 * xmalloc.c: allocators that die on exhaustion and check multiplication
 * overflow, so no caller carries a NULL check; plus strict number parsing
 * shared by the protocol, the configuration and the command line.
 */
#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/util.h"

void
fatal(const char *fmt, ...)
{
	va_list ap;

	va_start(ap, fmt);
	fputs("stopcock: fatal: ", stderr);
	vfprintf(stderr, fmt, ap);
	fputc('\n', stderr);
	va_end(ap);
	abort();
}

void *
xmalloc(size_t size)
{
	void *p;

	if (size == 0)
		size = 1;
	if ((p = malloc(size)) == NULL)
		fatal("out of memory allocating %zu bytes", size);
	return p;
}

void *
xcalloc(size_t n, size_t size)
{
	void *p;

	if (n == 0 || size == 0)
		n = size = 1;
	if ((p = calloc(n, size)) == NULL)
		fatal("out of memory allocating %zu x %zu bytes", n, size);
	return p;
}

void *
xreallocarray(void *old, size_t n, size_t size)
{
	void *p;

	if (size != 0 && n > SIZE_MAX / size)
		fatal("allocation overflow: %zu x %zu", n, size);
	if (n * size == 0)
		n = size = 1;
	if ((p = realloc(old, n * size)) == NULL)
		fatal("out of memory allocating %zu x %zu bytes", n, size);
	return p;
}

char *
xstrdup(const char *s)
{
	return xstrndup(s, strlen(s));
}

char *
xstrndup(const char *s, size_t n)
{
	char *p;
	size_t len = strnlen(s, n);

	p = xmalloc(len + 1);
	memcpy(p, s, len);
	p[len] = '\0';
	return p;
}

int
xasprintf(char **out, const char *fmt, ...)
{
	va_list ap;
	int n;

	va_start(ap, fmt);
	n = vasprintf(out, fmt, ap);
	va_end(ap);
	if (n < 0)
		fatal("out of memory formatting a string");
	return n;
}

int
parse_double(const char *s, double min, double max, double *out)
{
	char *end;
	double v;

	if (s == NULL || *s == '\0')
		return -1;
	errno = 0;
	v = strtod(s, &end);
	if (errno != 0 || *end != '\0' || end == s || !isfinite(v))
		return -1;
	if (v < min || v > max)
		return -1;
	*out = v;
	return 0;
}

int
parse_u64(const char *s, uint64_t max, uint64_t *out)
{
	char *end;
	unsigned long long v;

	if (s == NULL || *s < '0' || *s > '9')
		return -1;
	errno = 0;
	v = strtoull(s, &end, 10);
	if (errno != 0 || *end != '\0' || v > max)
		return -1;
	*out = v;
	return 0;
}

int
parse_duration(const char *s, double *seconds)
{
	static const struct { const char *suffix; double scale; } units[] = {
		{ "ms", 1e-3 }, { "s", 1 }, { "m", 60 }, { "h", 3600 },
		{ "d", 86400 },
	};
	char buf[64];
	size_t len, i, sl;

	if (s == NULL || (len = strlen(s)) == 0 || len >= sizeof buf)
		return -1;
	for (i = 0; i < SC_NELEM(units); i++) {
		sl = strlen(units[i].suffix);
		if (len > sl && strcmp(s + len - sl, units[i].suffix) == 0 &&
		    !(sl == 1 && s[len - 2] == 'm' && units[i].suffix[0] == 's')) {
			memcpy(buf, s, len - sl);
			buf[len - sl] = '\0';
			if (parse_double(buf, 0, 1e9, seconds) != 0)
				return -1;
			*seconds *= units[i].scale;
			return 0;
		}
	}
	return parse_double(s, 0, 1e9, seconds);
}

int
timingsafe_eq(const void *a, size_t alen, const void *b, size_t blen)
{
	const unsigned char *p = a, *q = b;
	unsigned char diff = (unsigned char)(alen != blen);
	size_t i, n = alen < blen ? alen : blen;

	for (i = 0; i < n; i++)
		diff |= p[i] ^ q[i];
	return diff == 0;
}
