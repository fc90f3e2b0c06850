/*
 * metrics.c: the Prometheus text exposition format (version 0.0.4) as
 * every subsystem writes it into the /metrics response: one HELP and one
 * TYPE line per family, then its samples. Label values are our own names
 * ([A-Za-z0-9._:-], checked where they enter), so they need no escaping
 * here; http.c escapes the per-test labels it writes itself.
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
