/*
 * dispatch.c: the one path a finding takes from the engine to the
 * outputs. The engine's sink (dispatch_finding) only copies the finding
 * into a bounded queue: it runs on the stack of whoever fed the engine (a
 * client's read callback half way through its buffer, the Redis reply,
 * the tick), where the fsyncs of the webhook spool and the pause audit do
 * not belong. A deferred event drains the queue on the next turn of the
 * loop: for each finding it asks the pause policy (pause.c), raises the
 * alert (alert.c, which sends it to syslog, the webhooks and
 * Alertmanager) and hands the pause to its receivers. Two findings are
 * events, not alerts: a test a reload restarted (stopcock.test.restarted)
 * and a retired experiment (stopcock.experiment.retired, whose alerts
 * resolve with it); both are logged, and sent to the webhooks and the
 * syslog alert lines whose kinds name them (restarted, retired).
 *
 * Before anything reads or saves the alert state (a checkpoint, an HTTP
 * request, shutdown), dispatch_drain empties the queue synchronously so
 * that the saved engine state never runs ahead of its alerts.
 *
 * The queue is bounded. When it is full, a finding that only says a
 * guardrail became safe is dropped (counted and logged); a harm, SRM,
 * pause or epoch finding instead evicts the oldest such "safe" finding
 * waiting, or, when none waits, makes room by handling the oldest finding
 * at once. Harm and pause are never dropped.
 */
#include <stdlib.h>
#include <string.h>

#include "stopcock/log.h"
#include "daemon.h"

#define DISPATCH_QUEUE_MAX	4096	/* findings waiting */
#define DISPATCH_BATCH		256	/* handled per turn of the loop */

struct dispatch {
	struct daemon	*d;
	struct event	*ev;
	struct finding	**q;		/* ring of DISPATCH_QUEUE_MAX */
	size_t		 head;
	size_t		 n;
	int		 draining;	/* inside dispatch_run: no reentry */

	uint64_t	 queued;
	uint64_t	 handled;
	uint64_t	 dropped;	/* "safe" findings lost to overflow */
	uint64_t	 overflow_now;	/* handled at once to make room */
	size_t		 high_water;
};

static char *
dispatch_strdup(const char *s)
{
	return s != NULL ? xstrdup(s) : NULL;
}

/* The engine's strings live until its next call: copy them all. */
static struct finding *
dispatch_copy(const struct finding *f)
{
	struct finding *c;
	int i;

	c = xmalloc(sizeof *c);
	*c = *f;
	c->experiment = dispatch_strdup(f->experiment);
	c->guardrail = dispatch_strdup(f->guardrail);
	c->metric = dispatch_strdup(f->metric);
	c->test = dispatch_strdup(f->test);
	c->variant = dispatch_strdup(f->variant);
	c->control = dispatch_strdup(f->control);
	c->harm = dispatch_strdup(f->harm);
	c->reason = dispatch_strdup(f->reason);
	for (i = 0; i < f->narms && i < PROTO_PLAN_MAX; i++)
		c->arms[i].variant = dispatch_strdup(f->arms[i].variant);
	return c;
}

static void
dispatch_copy_free(struct finding *c)
{
	int i;

	if (c == NULL)
		return;
	free((char *)c->experiment);
	free((char *)c->guardrail);
	free((char *)c->metric);
	free((char *)c->test);
	free((char *)c->variant);
	free((char *)c->control);
	free((char *)c->harm);
	free((char *)c->reason);
	for (i = 0; i < c->narms && i < PROTO_PLAN_MAX; i++)
		free((char *)c->arms[i].variant);
	free(c);
}

/* 1 when the finding leads to anything: an alert, a pause, a clearing. */
static int
dispatch_wanted(const struct finding *f)
{
	if (f->experiment == NULL)
		return 0;
	switch (f->kind) {
	case FINDING_VERDICT:
		return f->verdict != f->previous &&
		    (f->verdict == VERDICT_HARM || f->verdict == VERDICT_SAFE);
	case FINDING_SRM:
		return f->verdict != VERDICT_UNDECIDED;
	case FINDING_UNTRUSTED:
	case FINDING_PAUSE:
	case FINDING_EPOCH:
	case FINDING_RESTART:
	case FINDING_RETIRED:
		return 1;
	}
	return 0;
}

/* Only a "became safe" finding may be lost when the queue overflows. */
static int
dispatch_droppable(const struct finding *f)
{
	return f->kind == FINDING_VERDICT && f->verdict == VERDICT_SAFE;
}

/* An alert raised: alert.c sends it to the outputs that chose it. */
static void
dispatch_raise(struct dispatch *ds, enum alert_kind kind,
    const struct finding *f, const char *reason)
{
	if (ds->d->alert != NULL)
		(void)alert_raise(ds->d->alert, kind, f, reason);
}

/*
 * An event that is not an alert (a test restarted by a reload, an
 * experiment retired): sent to the webhooks that chose its kind as its
 * own type with an id of its own, so a receiver that deduplicates alerts
 * keeps it, and to syslog as an "event" line (fields: the key=value
 * words of the daemon's log line, then the id).
 */
static void
dispatch_event_send(struct dispatch *ds, const struct finding *f,
    const char *type, uint32_t kind, const char *fields)
{
	char *s, id[3 + 2 * 16 + 1];
	json_t *body;
	int len;

	len = xasprintf(&s, "%s%c%u%c%s%c%s%c%s%c%.6f", f->experiment, 0,
	    f->epoch, 0, f->guardrail ? f->guardrail : "", 0,
	    f->variant ? f->variant : "", 0, type, 0, f->ts);
	memcpy(id, "sc_", 3);
	digest_sha256_hex(s, (size_t)len, 16, id + 3);
	free(s);
	if (ds->d->alert != NULL)
		alert_news(ds->d->alert, kind, fields, id);
	if (ds->d->webhook == NULL)
		return;
	body = finding_json(f);
	json_object_set_new(body, "id", json_string(id));
	json_object_set_new(body, "type", json_string(type));
	webhook_send(ds->d->webhook, kind, id, body);
	json_decref(body);
}

/* A reload changed a guardrail: its evidence starts afresh. */
static void
dispatch_restart(struct dispatch *ds, const struct finding *f)
{
	char *fields;

	xasprintf(&fields, "experiment=%s epoch=%u guardrail=%s variant=%s "
	    "reason=\"%s\" previous=%s", f->experiment, f->epoch,
	    f->guardrail ? f->guardrail : "-", f->variant ? f->variant : "-",
	    f->reason ? f->reason : "-", verdict_name(f->previous));
	log_warnx("test restarted %s", fields);
	dispatch_event_send(ds, f, "stopcock.test.restarted",
	    CONF_KIND_RESTARTED, fields);
	free(fields);
}

static void
dispatch_retired(struct dispatch *ds, const struct finding *f)
{
	char *fields;

	xasprintf(&fields, "experiment=%s epoch=%u reason=%s", f->experiment,
	    f->epoch, f->reason ? f->reason : "-");
	log_info("experiment retired %s", fields);
	/* its alerts are over: the experiment is gone */
	if (ds->d->alert != NULL)
		alert_experiment_resolve(ds->d->alert, f->experiment,
		    "retired");
	dispatch_event_send(ds, f, "stopcock.experiment.retired",
	    CONF_KIND_RETIRED, fields);
	free(fields);
}

/* The pause policy decides; a pause is delivered, then alerted. */
static void
dispatch_pause(struct dispatch *ds, const struct finding *f)
{
	enum pause_decision dec;
	char *reason = NULL;

	if (ds->d->pause == NULL)
		return;
	dec = pause_decide(ds->d->pause, f, &reason);
	switch (dec) {
	case PAUSE_PAUSED:
		pause_deliver(ds->d->pause, f, reason);
		dispatch_raise(ds, ALERT_PAUSE, f, reason);
		/* Paused, its other alerts are over: the pause's stays. */
		if (ds->d->alert != NULL)
			alert_paused(ds->d->alert, f->experiment);
		break;
	case PAUSE_DRY_RUN:
		dispatch_raise(ds, ALERT_PAUSE_DRY_RUN, f, reason);
		break;
	default:
		break;	/* not asked, or refused: audited by pause.c */
	}
	free(reason);
}

static void
dispatch_one(struct dispatch *ds, const struct finding *f)
{
	ds->handled++;
	switch (f->kind) {
	case FINDING_EPOCH:
		if (ds->d->alert != NULL)
			alert_epoch(ds->d->alert, f->experiment, f->epoch);
		break;
	case FINDING_VERDICT:
		dispatch_raise(ds, f->verdict == VERDICT_HARM ? ALERT_HARM :
		    ALERT_SAFE, f, NULL);
		break;
	case FINDING_SRM:
		dispatch_raise(ds, ALERT_SRM, f, NULL);
		dispatch_pause(ds, f);	/* it pauses only under pause_on_srm */
		break;
	case FINDING_UNTRUSTED:
		/* Part of the SRM alert just raised, not a second one. */
		break;
	case FINDING_PAUSE:
		dispatch_pause(ds, f);
		break;
	case FINDING_RESTART:
		dispatch_restart(ds, f);
		break;
	case FINDING_RETIRED:
		dispatch_retired(ds, f);
		break;
	}
}

static struct finding *
dispatch_pop(struct dispatch *ds)
{
	struct finding *f;

	f = ds->q[ds->head];
	ds->q[ds->head] = NULL;
	ds->head = (ds->head + 1) % DISPATCH_QUEUE_MAX;
	ds->n--;
	return f;
}

/* Handle up to max findings from the head; 1 when some remain. */
static int
dispatch_run(struct dispatch *ds, size_t max)
{
	struct finding *f;
	size_t done = 0;

	if (ds->draining)
		return ds->n > 0;
	ds->draining = 1;
	while (ds->n > 0 && done < max) {
		f = dispatch_pop(ds);
		dispatch_one(ds, f);
		dispatch_copy_free(f);
		done++;
	}
	ds->draining = 0;
	return ds->n > 0;
}

static void
dispatch_event(evutil_socket_t fd, short what, void *arg)
{
	struct dispatch *ds = arg;

	/* A long queue yields to the inputs between batches. */
	if (dispatch_run(ds, DISPATCH_BATCH))
		event_active(ds->ev, EV_TIMEOUT, 0);
}

/* Remove the oldest droppable finding waiting; 0 when there is none. */
static int
dispatch_evict(struct dispatch *ds)
{
	size_t i, at, next;

	for (i = 0; i < ds->n; i++) {
		at = (ds->head + i) % DISPATCH_QUEUE_MAX;
		if (!dispatch_droppable(ds->q[at]))
			continue;
		dispatch_copy_free(ds->q[at]);
		/* Close the gap, keeping the order of the rest. */
		for (; i + 1 < ds->n; i++) {
			next = (ds->head + i + 1) % DISPATCH_QUEUE_MAX;
			ds->q[(ds->head + i) % DISPATCH_QUEUE_MAX] = ds->q[next];
		}
		ds->q[(ds->head + ds->n - 1) % DISPATCH_QUEUE_MAX] = NULL;
		ds->n--;
		return 1;
	}
	return 0;
}

static void
dispatch_dropped(struct dispatch *ds, const struct finding *f)
{
	ds->dropped++;
	/* The first and then every 1000th: an overflow is a flood. */
	if (ds->dropped % 1000 == 1)
		log_warnx("dispatch: queue full (%d findings), dropped a safe "
		    "verdict experiment=%s guardrail=%s variant=%s dropped=%llu",
		    DISPATCH_QUEUE_MAX, f->experiment, f->guardrail ?
		    f->guardrail : "-", f->variant ? f->variant : "-",
		    (unsigned long long)ds->dropped);
}

void
dispatch_finding(void *arg, const struct finding *f)
{
	struct dispatch *ds = arg;
	struct finding *keep;

	if (ds == NULL || f == NULL || !dispatch_wanted(f))
		return;
	if (ds->n == DISPATCH_QUEUE_MAX) {
		if (dispatch_droppable(f)) {
			dispatch_dropped(ds, f);
			return;
		}
		if (dispatch_evict(ds))
			dispatch_dropped(ds, f);
		else {
			/* Nothing may be lost: handle the oldest now. */
			if (ds->overflow_now++ % 1000 == 0)
				log_warnx("dispatch: queue full (%d findings), "
				    "handling the oldest at once overflow=%llu",
				    DISPATCH_QUEUE_MAX,
				    (unsigned long long)ds->overflow_now);
			keep = dispatch_pop(ds);
			dispatch_one(ds, keep);
			dispatch_copy_free(keep);
		}
	}
	ds->q[(ds->head + ds->n) % DISPATCH_QUEUE_MAX] = dispatch_copy(f);
	ds->n++;
	ds->queued++;
	if (ds->n > ds->high_water)
		ds->high_water = ds->n;
	if (ds->n == 1)
		event_active(ds->ev, EV_TIMEOUT, 0);
}

void
dispatch_drain(struct dispatch *ds)
{
	if (ds != NULL)
		(void)dispatch_run(ds, SIZE_MAX);
}

struct dispatch *
dispatch_new(struct daemon *d)
{
	struct dispatch *ds;

	ds = xcalloc(1, sizeof *ds);
	ds->d = d;
	ds->q = xcalloc(DISPATCH_QUEUE_MAX, sizeof *ds->q);
	if ((ds->ev = event_new(d->base, -1, 0, dispatch_event, ds)) == NULL)
		fatalx("dispatch: event_new failed");
	return ds;
}

/* Before the outputs go: what still waits is handled, not lost. */
void
dispatch_free(struct dispatch *ds)
{
	if (ds == NULL)
		return;
	dispatch_drain(ds);
	event_free(ds->ev);
	free(ds->q);
	free(ds);
}

void
dispatch_metrics(struct dispatch *ds, struct evbuffer *b)
{
	if (ds == NULL)
		return;
	metrics_counter(b, "stopcock_dispatch_queued_total", "Findings queued "
	    "for the alert and pause outputs.", ds->queued);
	metrics_counter(b, "stopcock_dispatch_handled_total", "Findings handed "
	    "to the alert and pause outputs.", ds->handled);
	metrics_counter(b, "stopcock_dispatch_dropped_total", "Safe verdicts "
	    "dropped because the queue was full.", ds->dropped);
	metrics_counter(b, "stopcock_dispatch_overflow_total", "Findings "
	    "handled at once because the queue was full of harm and pause.",
	    ds->overflow_now);
	metrics_gauge(b, "stopcock_dispatch_queue", "Findings waiting.",
	    (double)ds->n);
	metrics_gauge(b, "stopcock_dispatch_queue_high_water", "Most findings "
	    "waiting at once since start.", (double)ds->high_water);
}
