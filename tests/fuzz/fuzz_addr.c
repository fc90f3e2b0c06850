/*
 * fuzz_addr.c: libFuzzer target for the address parser (src/util/addr.c).
 * Any bytes must be refused with a cause or split into a socket path or
 * a host and a port that obey addr.h's bounds, never crash; a split
 * host:port written back ("[v6]:port" when the host has a colon) must
 * parse to the same host and port.
 */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/addr.h"

int LLVMFuzzerTestOneInput(const uint8_t *, size_t);

int
LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	struct addr a, b;
	char *text, *cause = NULL, again[ADDR_HOST_MAX + 16];

	if (size > 4096)
		return 0;
	text = malloc(size + 1);
	if (text == NULL)
		return 0;
	memcpy(text, data, size);
	text[size] = '\0';
	if (addr_parse(text, ADDR_PATH_OK, &a, &cause) != 0) {
		if (cause == NULL || strstr(cause, "expected") == NULL)
			abort();
		free(cause);
		free(text);
		return 0;
	}
	if (a.is_path) {
		if (a.path[0] != '/' || strlen(a.path) > ADDR_PATH_MAX ||
		    strcmp(a.path, text) != 0)
			abort();
	} else {
		if (a.port == 0 || a.host[0] == '\0' ||
		    strlen(a.host) > ADDR_HOST_MAX)
			abort();
		if (strchr(a.host, ':') != NULL)
			snprintf(again, sizeof again, "[%s]:%u", a.host,
			    (unsigned)a.port);
		else
			snprintf(again, sizeof again, "%s:%u", a.host,
			    (unsigned)a.port);
		if (addr_parse(again, 0, &b, NULL) != 0 ||
		    strcmp(a.host, b.host) != 0 || a.port != b.port)
			abort();
	}
	free(text);
	return 0;
}
