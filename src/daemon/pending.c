/*
 * pending.c: weak placeholders so stopcockd links while its subsystems are
 * written in parallel. Each real definition overrides its placeholder.
 * This file is deleted once every subsystem has landed.
 */
#include "daemon.h"

#define WEAK __attribute__((weak))

WEAK struct alert *alert_new(struct daemon *d, char **cause) { return NULL; }
WEAK void alert_free(struct alert *a) {}
WEAK void alert_finding(void *a, const struct finding *f) {}
WEAK int alert_ack(struct alert *a, const char *e, const char *g,
    const char *v, char **cause) { *cause = xstrdup("alerts not built"); return -1; }
WEAK void alert_experiment_reset(struct alert *a, const char *e) {}
WEAK json_t *alert_save(struct alert *a) { return json_object(); }
WEAK int alert_restore(struct alert *a, const json_t *j, char **cause) { return 0; }
WEAK json_t *alert_json(struct alert *a) { return json_array(); }
WEAK void alert_metrics(struct alert *a, struct evbuffer *b) {}
WEAK struct webhook *webhook_new(struct daemon *d, char **cause) { return NULL; }
WEAK void webhook_free(struct webhook *w) {}
WEAK void webhook_send(struct webhook *w, const char *id, json_t *body) {}
WEAK void webhook_metrics(struct webhook *w, struct evbuffer *b) {}
WEAK struct pause *pause_new(struct daemon *d, char **cause) { return NULL; }
WEAK void pause_free(struct pause *p) {}
WEAK void pause_finding(struct pause *p, const struct finding *f) {}
WEAK void pause_metrics(struct pause *p, struct evbuffer *b) {}
WEAK struct http *http_new(struct daemon *d, char **cause) { return NULL; }
WEAK void http_free(struct http *h) {}
