/*
 * addr.c: "host:port", "[v6]:port" and, where the caller allows it, an
 * absolute socket path; see addr.h. The configuration checks addresses
 * with it at load time and the listeners, the HTTP server and the Redis
 * connections split them with it at start, so what loads is exactly what
 * runs. Earlier spellings ("unix:/path", "redis://host", a host without
 * a port, ":port") were never accepted by the configuration and are not
 * accepted here.
 */
#include <stdio.h>
#include <string.h>

#include "stopcock/addr.h"
#include "stopcock/util.h"

/* Printable ASCII without blanks: what may appear in a host or path. */
static int
addr_printable(const char *s, size_t len, int blank_ok)
{
	size_t i;

	for (i = 0; i < len; i++)
		if ((unsigned char)s[i] < 0x20 + !blank_ok ||
		    (unsigned char)s[i] >= 0x7f)
			return 0;
	return 1;
}

static int
addr_fail(const char *s, unsigned flags, char **cause)
{
	if (cause != NULL)
		xasprintf(cause, "address \"%.*s\": expected host:port or "
		    "[v6]:port with port 1-65535%s", 300, s,
		    (flags & ADDR_PATH_OK) ? ", or an absolute socket path" :
		    "");
	return -1;
}

int
addr_parse(const char *s, unsigned flags, struct addr *a, char **cause)
{
	const char *host, *colon, *close, *h;
	size_t hostlen;
	uint64_t port;

	memset(a, 0, sizeof *a);
	if (s == NULL)
		return addr_fail("", flags, cause);
	if (s[0] == '/') {
		if (!(flags & ADDR_PATH_OK) || strlen(s) > ADDR_PATH_MAX ||
		    !addr_printable(s, strlen(s), 1))
			return addr_fail(s, flags, cause);
		a->is_path = 1;
		memcpy(a->path, s, strlen(s) + 1);
		return 0;
	}
	if (s[0] == '[') {
		/* RFC 3986's IP-literal, with a zone after % allowed. */
		if ((close = strchr(s, ']')) == NULL || close == s + 1 ||
		    close[1] != ':')
			return addr_fail(s, flags, cause);
		for (h = s + 1; h < close; h++)
			if (strchr("0123456789abcdefABCDEF:.%", *h) == NULL)
				return addr_fail(s, flags, cause);
		host = s + 1;
		hostlen = (size_t)(close - host);
		colon = close + 1;
	} else {
		/* One colon only: a bare v6 address needs its brackets. */
		if ((colon = strchr(s, ':')) == NULL || colon == s ||
		    strchr(colon + 1, ':') != NULL)
			return addr_fail(s, flags, cause);
		host = s;
		hostlen = (size_t)(colon - s);
		for (h = s; h < colon; h++)
			if (strchr(" /[]", *h) != NULL)
				return addr_fail(s, flags, cause);
	}
	if (hostlen > ADDR_HOST_MAX || !addr_printable(host, hostlen, 0) ||
	    parse_u64(colon + 1, 65535, &port) != 0 || port == 0)
		return addr_fail(s, flags, cause);
	memcpy(a->host, host, hostlen);
	a->host[hostlen] = '\0';
	a->port = (uint16_t)port;
	return 0;
}
