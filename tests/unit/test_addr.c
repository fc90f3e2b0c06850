/*
 * test_addr.c: the one address parser (src/util/addr.c). Each row is an
 * address as an operator might write it and what the parser must make of
 * it; the accepted forms are host:port, [v6]:port and, where allowed, an
 * absolute socket path (the grammar of addr.h). The expected splits are
 * read off the strings by hand, not produced by the code.
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "stopcock/addr.h"
#include "stopcock/util.h"

struct acase {
	const char	*name;
	const char	*in;
	unsigned	 flags;
	int		 ok;
	const char	*host;		/* or the path when is_path */
	unsigned	 port;
	int		 is_path;
};

static const struct acase acases[] = {
	{ "ipv4", "127.0.0.1:7720", 0, 1, "127.0.0.1", 7720, 0 },
	{ "name", "redis.internal:6379", 0, 1, "redis.internal", 6379, 0 },
	{ "v6 loopback", "[::1]:7721", 0, 1, "::1", 7721, 0 },
	{ "v6 any", "[::]:80", 0, 1, "::", 80, 0 },
	{ "v6 zone", "[fe80::1%eth0]:9", 0, 0, NULL, 0, 0 },
	{ "v6 zone digits", "[fe80::1%2]:9", 0, 1, "fe80::1%2", 9, 0 },
	{ "port 1", "h:1", 0, 1, "h", 1, 0 },
	{ "port 65535", "h:65535", 0, 1, "h", 65535, 0 },
	{ "port 0", "h:0", 0, 0, NULL, 0, 0 },
	{ "port 65536", "h:65536", 0, 0, NULL, 0, 0 },
	{ "port sign", "h:+80", 0, 0, NULL, 0, 0 },
	{ "port trailing", "h:80x", 0, 0, NULL, 0, 0 },
	{ "port empty", "h:", 0, 0, NULL, 0, 0 },
	{ "bare host", "redis", 0, 0, NULL, 0, 0 },
	{ "empty host", ":7720", 0, 0, NULL, 0, 0 },
	{ "empty", "", 0, 0, NULL, 0, 0 },
	{ "bare v6", "::1:80", 0, 0, NULL, 0, 0 },
	{ "v6 no port", "[::1]", 0, 0, NULL, 0, 0 },
	{ "v6 empty", "[]:80", 0, 0, NULL, 0, 0 },
	{ "v6 name inside", "[host]:80", 0, 0, NULL, 0, 0 },
	{ "blank in host", "my host:80", 0, 0, NULL, 0, 0 },
	{ "slash in host", "a/b:80", 0, 0, NULL, 0, 0 },
	{ "unix: form", "unix:/run/redis.sock", ADDR_PATH_OK, 0, NULL, 0, 0 },
	{ "redis:// form", "redis://h:6379", ADDR_PATH_OK, 0, NULL, 0, 0 },
	{ "path", "/run/redis/redis.sock", ADDR_PATH_OK, 1,
	  "/run/redis/redis.sock", 0, 1 },
	{ "path not allowed", "/run/redis/redis.sock", 0, 0, NULL, 0, 0 },
	{ "relative path", "run/redis.sock", ADDR_PATH_OK, 0, NULL, 0, 0 },
	{ "path newline", "/run/a\nb", ADDR_PATH_OK, 0, NULL, 0, 0 },
};

static void
test_table(void **state)
{
	const struct acase *c;
	struct addr a;
	char *cause;
	size_t i;
	int rc;

	for (i = 0; i < SC_NELEM(acases); i++) {
		c = &acases[i];
		cause = NULL;
		rc = addr_parse(c->in, c->flags, &a, &cause);
		if ((rc == 0) != c->ok)
			fail_msg("row \"%s\" (%s): expected %s, got %s%s%s",
			    c->name, c->in, c->ok ? "accepted" : "refused",
			    rc == 0 ? "accepted" : "refused: ",
			    cause ? cause : "", "");
		if (!c->ok) {
			/* A refusal names the address and the forms. */
			if (cause == NULL || strstr(cause, "expected host:port")
			    == NULL)
				fail_msg("row \"%s\": cause \"%s\"", c->name,
				    cause ? cause : "(none)");
			free(cause);
			continue;
		}
		if (a.is_path != c->is_path)
			fail_msg("row \"%s\": is_path %d", c->name, a.is_path);
		if (c->is_path) {
			if (strcmp(a.path, c->host) != 0)
				fail_msg("row \"%s\": path \"%s\"", c->name,
				    a.path);
			continue;
		}
		if (strcmp(a.host, c->host) != 0 || a.port != c->port)
			fail_msg("row \"%s\": host \"%s\" port %u", c->name,
			    a.host, (unsigned)a.port);
	}
}

/* The bounds: a host of ADDR_HOST_MAX bytes and a path of ADDR_PATH_MAX
 * pass, one byte more does not. */
static void
test_lengths(void **state)
{
	char host[ADDR_HOST_MAX + 16], path[ADDR_PATH_MAX + 2];
	struct addr a;
	char *cause = NULL;

	memset(host, 'h', ADDR_HOST_MAX);
	strcpy(host + ADDR_HOST_MAX, ":80");
	assert_int_equal(addr_parse(host, 0, &a, NULL), 0);
	assert_int_equal(strlen(a.host), ADDR_HOST_MAX);
	memset(host, 'h', ADDR_HOST_MAX + 1);
	strcpy(host + ADDR_HOST_MAX + 1, ":80");
	assert_int_equal(addr_parse(host, 0, &a, &cause), -1);
	free(cause);

	path[0] = '/';
	memset(path + 1, 'p', ADDR_PATH_MAX - 1);
	path[ADDR_PATH_MAX] = '\0';
	assert_int_equal(addr_parse(path, ADDR_PATH_OK, &a, NULL), 0);
	assert_int_equal(strlen(a.path), ADDR_PATH_MAX);
	path[ADDR_PATH_MAX] = 'p';
	path[ADDR_PATH_MAX + 1] = '\0';
	assert_int_equal(addr_parse(path, ADDR_PATH_OK, &a, NULL), -1);
}

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test(test_table),
		cmocka_unit_test(test_lengths),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
