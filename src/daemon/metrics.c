/*
 * metrics.c: the Prometheus text exposition format (version 0.0.4) as
 * every subsystem writes it into the /metrics response: one HELP and one
 * TYPE line per family, then its samples. Every label value with text
 * that came from outside (experiment, guardrail, variant and receiver
 * names) goes through metrics_label, which escapes it as the format
 * asks; fixed words (reasons, sources, outcomes) are written as they are.
 */
#include <inttypes.h>
#include <math.h>

#include "daemon.h"

void
metrics_family(struct evbuffer *b, const char *name, const char *type,
    const char *help)
{
	evbuffer_add_printf(b, "# HELP %s %s\n# TYPE %s %s\n", name, help,
	    name, type);
}

void
metrics_counter(struct evbuffer *b, const char *name, const char *help,
    uint64_t v)
{
	metrics_family(b, name, "counter", help);
	evbuffer_add_printf(b, "%s %" PRIu64 "\n", name, v);
}

/* key="value" with backslash, double quote and newline escaped; a
 * comma first unless it is the first label. */
void
metrics_label(struct evbuffer *b, const char *key, const char *value,
    int first)
{
	const char *p;

	evbuffer_add_printf(b, "%s%s=\"", first ? "" : ",", key);
	for (p = value != NULL ? value : ""; *p != '\0'; p++) {
		if (*p == '\\')
			evbuffer_add(b, "\\\\", 2);
		else if (*p == '"')
			evbuffer_add(b, "\\\"", 2);
		else if (*p == '\n')
			evbuffer_add(b, "\\n", 2);
		else
			evbuffer_add(b, p, 1);
	}
	evbuffer_add(b, "\"", 1);
}

/* A gauge without labels; NaN when the value is not known. */
void
metrics_gauge(struct evbuffer *b, const char *name, const char *help,
    double v)
{
	metrics_family(b, name, "gauge", help);
	if (isfinite(v))
		evbuffer_add_printf(b, "%s %.17g\n", name, v);
	else
		evbuffer_add_printf(b, "%s NaN\n", name);
}
