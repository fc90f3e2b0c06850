/*
 * fuzz_conf.c: libFuzzer target for the configuration parser. Any text
 * must give either a configuration or a cause whose every line reads
 * "f:LINE: message" (or "f: message"), never both, never a crash; a
 * configuration must survive conf_dup and conf_help.
 */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/conf.h"

int LLVMFuzzerTestOneInput(const uint8_t *, size_t);

int
LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	struct conf *c = NULL, *d;
	char *text, *cause = NULL, *line;
	FILE *devnull;
	int rc, i;

	text = malloc(size + 1);
	if (text == NULL)
		return 0;
	memcpy(text, data, size);
	text[size] = '\0';
	rc = conf_parse(text, "f", &c, &cause);
	free(text);
	if (rc != 0) {
		if (c != NULL || cause == NULL || *cause == '\0')
			abort();
		for (line = cause; line != NULL; line = strchr(line, '\n')) {
			if (*line == '\n')
				line++;
			if (strncmp(line, "f:", 2) != 0)
				abort();
		}
		free(cause);
		return 0;
	}
	if (c == NULL || c->nguardrails > CONF_GUARDRAILS_MAX ||
	    c->nexperiments > CONF_EXPERIMENTS_MAX ||
	    c->nwebhooks > CONF_WEBHOOKS_MAX)
		abort();
	for (i = 0; i < c->nguardrails; i++) {
		if (c->guardrails[i].metric[0] == '\0' ||
		    (c->guardrails[i].test == TEST_QUANTILE) !=
		    (c->guardrails[i].quantile > 0))
			abort();
	}
	for (i = 0; i < c->nwebhooks; i++)
		if (c->webhooks[i].url == NULL)
			abort();
	d = conf_dup(c);
	conf_free(c);
	if ((devnull = fopen("/dev/null", "w")) != NULL) {
		conf_help(devnull);
		fclose(devnull);
	}
	conf_free(d);
	return 0;
}
