/*
 * alert.c: findings become alerts that people can act on (dispatch.c
 * hands them here in the loop, after the pause policy). An alert has one
 * identity (experiment, epoch and the epoch's start, guardrail, variant,
 * and what happened: harm, safe, srm, pause, pause_dry_run) and a life:
 *
 *   raised -> (reminder ...) -> acknowledged -> resolved
 *
 * It is raised once; reminders repeat an unacknowledged harm or SRM
 * alert; an operator acknowledges it (reminders stop) or closes it; it
 * is resolved when the experiment starts a new epoch, is reset, paused,
 * retired, or closed by an operator. Every event goes, as its kinds are
 * chosen, to syslog (and to stderr in the foreground, where containers
 * without /dev/log would lose it), to each webhook receiver (signed, in
 * webhook.c) and to an Alertmanager (alertmgr.c), with a severity:
 * critical for a harm that pauses and for the pause, warning for harm and
 * SRM, info for the rest.
 *
 * The id is derived from the identity; the epoch's start (record time)
 * makes it unique per incident, so a reused experiment name or a reset
 * never repeats an id a receiver has seen, while a restart or a retry of
 * the same incident keeps it. Each event has its own webhook-id (id,
 * id_rN, id_ack, id_resolved). An SRM raises one alert: the verdicts it
 * makes untrustworthy are part of it, and a safe verdict in an untrusted
 * epoch raises nothing (and a safe alert already raised is resolved).
 * Resolved alerts are kept (bounded) so a replay never pages again. The
 * state is saved in the checkpoint (alert_save / alert_restore); under
 * Kafka a partition's state carries its experiments' alerts to the next
 * owner (alert_carry.c, which also holds an alert's saved form).
 */
#include <inttypes.h>
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <syslog.h>

#include "stopcock/log.h"
#include "daemon.h"
#include "alert_int.h"

const char *const alert_states[] = { "raised", "acked", "resolved" };
const char *const alert_sevs[] = { "critical", "warning", "info" };

/* The lifecycle events, with their routing bit (raised needs none). */
enum alert_ev { EV_RAISED, EV_REMINDER, EV_ACKNOWLEDGED, EV_RESOLVED };
static const char *const alert_evs[] = {
	"raised", "reminder", "acknowledged", "resolved"
};
static const uint32_t alert_ev_bits[] = {
	0, CONF_KIND_REMINDER, CONF_KIND_ACKNOWLEDGED, CONF_KIND_RESOLVED
};

/* The names in syslog, webhooks, the API, metrics and the state. */
const char *const alert_kinds[ALERT_NKINDS] = {
	[ALERT_HARM] = "harm",
	[ALERT_SAFE] = "safe",
	[ALERT_SRM] = "srm",
	[ALERT_UNTRUSTED] = "untrusted",
	[ALERT_PAUSE] = "pause",
	[ALERT_PAUSE_DRY_RUN] = "pause_dry_run",
};

/* Each kind's routing bit ([webhook] kinds and the rest). */
static const uint32_t alert_kind_bits[ALERT_NKINDS] = {
	[ALERT_HARM] = CONF_KIND_HARM,
	[ALERT_SAFE] = CONF_KIND_SAFE,
	[ALERT_SRM] = CONF_KIND_SRM,
	[ALERT_UNTRUSTED] = CONF_KIND_SRM,
	[ALERT_PAUSE] = CONF_KIND_PAUSE,
	[ALERT_PAUSE_DRY_RUN] = CONF_KIND_DRY_RUN,
};

static void	alert_journal_lay(void *, uint64_t, const json_t *);

/*
 * syslog(3) keeps the ident pointer for the life of the process, so it
 * cannot live in an object that is freed; like the logger's own state
 * this is process-wide.
 */
static char alert_ident[64];

/*
 * "sc_" + hex of the first bytes of SHA-256 over the identity, its parts
 * NUL-separated so no two identities share a string: experiment, epoch,
 * the epoch's start in record time as "%.3f", guardrail, variant, kind.
 * A state saved before the start was part of it (start NAN) keeps the
 * ids it had, computed without it.
 */
void
alert_make_id(char *out, const char *experiment, uint32_t epoch,
    double start, const char *guardrail, const char *variant,
    const char *what)
{
	char *s;
	int len;

	if (isfinite(start))
		len = xasprintf(&s, "%s%c%u%c%.3f%c%s%c%s%c%s", experiment, 0,
		    epoch, 0, start, 0, guardrail, 0, variant, 0, what);
	else
		len = xasprintf(&s, "%s%c%u%c%s%c%s%c%s", experiment, 0, epoch,
		    0, guardrail, 0, variant, 0, what);
	memcpy(out, "sc_", 3);
	digest_sha256_hex(s, (size_t)len, ALERT_ID_BYTES, out + 3);
	free(s);
}

/* <public_url>/?experiment=ID; names are URL-safe ([A-Za-z0-9._:-]). */
static char *
alert_link(struct alert *a, const char *experiment)
{
	const struct conf *c = a->d->conf;
	char *base, *link;
	size_t len;

	if (c->public_url != NULL && *c->public_url != '\0')
		base = xstrdup(c->public_url);
	else if (c->http != NULL && *c->http != '\0')
		xasprintf(&base, "http://%s", c->http);
	else
		return NULL;
	len = strlen(base);
	while (len > 0 && base[len - 1] == '/')
		base[--len] = '\0';
	xasprintf(&link, "%s/?experiment=%s", base, experiment);
	free(base);
	return link;
}

static int
alert_priority(const struct finding *f, enum alert_kind kind)
{
	switch (kind) {
	case ALERT_HARM:
		return f->action_pause ? LOG_CRIT : LOG_ERR;
	case ALERT_PAUSE:
		return LOG_CRIT;
	case ALERT_SRM:
		return LOG_ERR;
	case ALERT_SAFE:
		return LOG_NOTICE;
	default:
		return LOG_WARNING;	/* untrusted, pause_dry_run */
	}
}

/* critical: harm that pauses (and the pause); warning: harm and SRM. */
static enum alert_sev
alert_severity(const struct finding *f, enum alert_kind kind)
{
	switch (kind) {
	case ALERT_HARM:
		return f->action_pause ? SEV_CRITICAL : SEV_WARNING;
	case ALERT_PAUSE:
		return SEV_CRITICAL;
	case ALERT_SRM:
	case ALERT_UNTRUSTED:
		return SEV_WARNING;
	default:
		return SEV_INFO;	/* safe, pause_dry_run */
	}
}

/* The configured unit of a guardrail's metric ("" when none). */
static const char *
alert_unit(const struct alert *a, const char *guardrail)
{
	const struct conf *c = a->d->conf;
	int i;

	if (guardrail == NULL)
		return "";
	for (i = 0; i < c->nguardrails; i++)
		if (strcmp(c->guardrails[i].name, guardrail) == 0)
			return c->guardrails[i].unit;
	return "";
}


void
alert_entry_free(struct alert_entry *e)
{
	if (e == NULL)
		return;
	free(e->experiment);
	free(e->guardrail);
	free(e->variant);
	free(e->resolution);
	free(e->line);
	json_decref(e->body);
	free(e);
}

struct alert_entry *
alert_find(struct alert *a, const char *id)
{
	size_t i;

	for (i = 0; i < a->n; i++)
		if (strcmp(a->v[i]->id, id) == 0)
			return a->v[i];
	return NULL;
}

void
alert_remove_at(struct alert *a, size_t i)
{
	alert_entry_free(a->v[i]);
	memmove(&a->v[i], &a->v[i + 1], (a->n - i - 1) * sizeof *a->v);
	a->n--;
}

/* Bounded: past ALERT_MAX the oldest resolved, then acknowledged, alert
 * goes first. */
void
alert_insert(struct alert *a, struct alert_entry *e)
{
	size_t i, victim = 0;
	int found = 0;

	if (a->n >= ALERT_MAX) {
		for (i = 0; i < a->n && !found; i++) {
			if (a->v[i]->state == ALERT_RESOLVED) {
				victim = i;
				found = 1;
			}
		}
		for (i = 0; i < a->n && !found; i++) {
			if (a->v[i]->state == ALERT_ACKED) {
				victim = i;
				found = 1;
			}
		}
		log_warnx("alert: more than %d alerts, forgetting id=%s "
		    "experiment=%s", ALERT_MAX, a->v[victim]->id,
		    a->v[victim]->experiment);
		alert_remove_at(a, victim);
		a->evicted++;
	}
	a->v = xreallocarray(a->v, a->n + 1, sizeof *a->v);
	a->v[a->n++] = e;
}

/*
 * Take e (a journaled or carried alert) into the table: it replaces the
 * alert of the same id when it is further on (alert_carry_progress),
 * joins when the id is new, and is freed otherwise. 1 taken, 0 not.
 */
int
alert_merge(struct alert *a, struct alert_entry *e)
{
	struct alert_entry *old;
	size_t i;

	if ((old = alert_find(a, e->id)) == NULL) {
		alert_insert(a, e);
		return 1;
	}
	if (alert_carry_progress(e) <= alert_carry_progress(old)) {
		alert_entry_free(e);
		return 0;
	}
	for (i = 0; a->v[i] != old; i++)
		;
	alert_entry_free(old);
	a->v[i] = e;
	return 1;
}

/* The event's webhook-id: the alert's id, and one per later event. */
static char *
alert_event_id(const struct alert_entry *e, enum alert_ev ev)
{
	char *id;

	switch (ev) {
	case EV_REMINDER:
		xasprintf(&id, "%s_r%u", e->id, e->reminders);
		break;
	case EV_ACKNOWLEDGED:
		xasprintf(&id, "%s_ack", e->id);
		break;
	case EV_RESOLVED:
		xasprintf(&id, "%s_resolved", e->id);
		break;
	default:
		id = xstrdup(e->id);
		break;
	}
	return id;
}

/* The webhook body of an event: the raise's body, retyped. */
static json_t *
alert_event_body(const struct alert_entry *e, enum alert_ev ev, double now)
{
	json_t *body;
	char *type;

	body = json_deep_copy(e->body);
	xasprintf(&type, "stopcock.alert.%s", alert_evs[ev]);
	json_object_set_new(body, "type", json_string(type));
	free(type);
	json_object_set_new(body, "reminder", json_integer(e->reminders));
	if (ev != EV_RAISED)
		json_object_set_new(body, "sent_at", json_real(now));
	if (ev == EV_ACKNOWLEDGED)
		json_object_set_new(body, "acknowledged_at", json_real(now));
	if (ev == EV_RESOLVED) {
		json_object_set_new(body, "resolved_at",
		    json_real(e->resolved_at));
		json_object_set_new(body, "resolution",
		    json_string(e->resolution ? e->resolution : "closed"));
	}
	return body;
}

/* The Alertmanager's view of one entry (alertmgr.c formats it). */
static void
alert_view(const struct alert_entry *e, struct alert_view *v)
{
	json_t *s, *l, *r;

	memset(v, 0, sizeof *v);
	v->id = e->id;
	v->kind = alert_kinds[e->kind];
	v->severity = alert_sevs[e->severity];
	v->experiment = e->experiment;
	v->epoch = e->epoch;
	v->guardrail = e->guardrail;
	v->variant = e->variant;
	s = json_object_get(e->body, "summary");
	l = json_object_get(e->body, "link");
	r = json_object_get(e->body, "runbook");
	v->summary = json_is_string(s) ? json_string_value(s) : "";
	v->link = json_is_string(l) ? json_string_value(l) : NULL;
	v->runbook = json_is_string(r) ? json_string_value(r) : NULL;
	v->starts = e->first_seen;
	v->acked = e->state == ALERT_ACKED;
}

/*
 * One event of an alert's life to every output that chose it: syslog
 * (and stderr in the foreground), the webhook receivers, Alertmanager.
 */
static void
alert_emit(struct alert *a, struct alert_entry *e, enum alert_ev ev)
{
	const struct conf *c = a->d->conf;
	uint32_t need = alert_kind_bits[e->kind] | alert_ev_bits[ev];
	struct alert_view v;
	double now = daemon_now();
	int pri;
	char *id, more[64] = "";
	json_t *body;

	alert_journal_note(a, e);
	if (ev == EV_REMINDER)
		snprintf(more, sizeof more, " reminder=%u", e->reminders);
	else if (ev == EV_RESOLVED)
		snprintf(more, sizeof more, " resolution=%s",
		    e->resolution ? e->resolution : "closed");
	if ((c->syslog_kinds & need) == need) {
		pri = ev == EV_RAISED || ev == EV_REMINDER ? e->priority :
		    LOG_NOTICE;
		syslog(a->facility | pri, "alert %s %s%s", alert_evs[ev],
		    e->line, more);
		/* In the foreground the logger writes to stderr: the same
		 * line there, where a container collects it. */
		if (a->d->log_stderr)
			log_info("alert %s %s%s", alert_evs[ev], e->line, more);
	}
	id = alert_event_id(e, ev);
	body = alert_event_body(e, ev, now);
	webhook_send(a->d->webhook, need, id, body);
	json_decref(body);
	free(id);
	if (c->am_url != NULL && (c->am_kinds & need) == need &&
	    (ev == EV_RAISED || ev == EV_RESOLVED)) {
		alert_view(e, &v);
		alertmgr_post(a->d, &v, ev == EV_RESOLVED ? e->resolved_at :
		    now + 4 * a->am_resend);
	}
}

static void
alert_resolve(struct alert *a, struct alert_entry *e, const char *why)
{
	if (e->state == ALERT_RESOLVED)
		return;
	e->state = ALERT_RESOLVED;
	e->resolved_at = daemon_now();
	free(e->resolution);
	e->resolution = xstrdup(why);
	a->resolved++;
	alert_emit(a, e, EV_RESOLVED);
}

/*
 * Resolve the experiment's open alerts of epochs below `below` (all
 * epochs: UINT32_MAX), except those of kind `keep` (-1: none).
 */
static int
alert_resolve_where(struct alert *a, const char *experiment, uint32_t below,
    int keep, const char *why)
{
	struct alert_entry *e;
	size_t i;
	int n = 0;

	for (i = 0; i < a->n; i++) {
		e = a->v[i];
		if (e->state == ALERT_RESOLVED || e->epoch >= below ||
		    (int)e->kind == keep ||
		    strcmp(e->experiment, experiment) != 0)
			continue;
		alert_resolve(a, e, why);
		n++;
	}
	return n;
}

int
alert_raise(struct alert *a, enum alert_kind kind, const struct finding *f,
    const char *reason)
{
	const struct conf *c = a->d->conf;
	struct alert_entry *e;
	const char *guardrail, *variant, *unit;
	char id[sizeof e->id], *link, *summary;
	json_t *body;
	double now = daemon_now();
	size_t i;

	guardrail = f->guardrail != NULL ? f->guardrail : "srm";
	variant = f->variant != NULL ? f->variant : "";
	if (f->experiment == NULL)
		return 0;
	if (kind == ALERT_SAFE && f->untrusted) {
		/* Untrusted is never good news: nothing is raised. */
		a->untrusted_safe++;
		return 0;
	}
	alert_make_id(id, f->experiment, f->epoch, isfinite(f->covers_from) ?
	    f->covers_from : 0, guardrail, variant, alert_kinds[kind]);
	if (alert_find(a, id) != NULL) {
		/* Already raised (or acknowledged): never page twice. */
		a->duplicates++;
		return 0;
	}
	e = xcalloc(1, sizeof *e);
	memcpy(e->id, id, sizeof e->id);
	e->experiment = xstrdup(f->experiment);
	e->epoch = f->epoch;
	e->epoch_start = isfinite(f->covers_from) ? f->covers_from : 0;
	e->guardrail = xstrdup(guardrail);
	e->variant = xstrdup(variant);
	e->kind = kind;
	e->state = ALERT_RAISED;
	e->severity = alert_severity(f, kind);
	e->priority = alert_priority(f, kind);
	e->first_seen = now;
	e->last_sent = now;

	unit = alert_text_srm(kind) ? "" : alert_unit(a, f->guardrail);
	link = alert_link(a, f->experiment);
	e->line = alert_text_fields(f, id, kind, alert_kinds[kind],
	    alert_sevs[e->severity], link, unit);
	summary = alert_text_summary(f, kind, reason, unit);
	if ((body = finding_json(f)) == NULL || !json_is_object(body)) {
		json_decref(body);
		body = json_object();
	}
	json_object_set_new(body, "id", json_string(id));
	json_object_set_new(body, "type", json_string("stopcock.alert.raised"));
	json_object_set_new(body, "alert", json_string(alert_kinds[kind]));
	json_object_set_new(body, "severity",
	    json_string(alert_sevs[e->severity]));
	json_object_set_new(body, "epoch_start", json_real(e->epoch_start));
	json_object_set_new(body, "first_seen", json_real(now));
	json_object_set_new(body, "summary", json_string(summary));
	json_object_set_new(body, "untrusted", json_boolean(f->untrusted));
	if (*unit != '\0')
		json_object_set_new(body, "unit", json_string(unit));
	json_object_set_new(body, "link", link ? json_string(link) :
	    json_null());
	if (c->runbook != NULL)
		json_object_set_new(body, "runbook", json_string(c->runbook));
	json_object_set_new(body, "reminder", json_integer(0));
	if (reason != NULL)
		json_object_set_new(body, "reason", json_string(reason));
	e->body = body;
	free(link);
	free(summary);

	alert_insert(a, e);
	a->raised[kind]++;
	alert_emit(a, e, EV_RAISED);
	if (kind == ALERT_SRM) {
		/* The safe news of this epoch no longer holds. */
		for (i = 0; i < a->n; i++)
			if (a->v[i]->kind == ALERT_SAFE &&
			    a->v[i]->epoch == f->epoch &&
			    strcmp(a->v[i]->experiment, f->experiment) == 0)
				alert_resolve(a, a->v[i], "untrusted");
	}
	return 1;
}

void
alert_epoch(struct alert *a, const char *experiment, uint32_t epoch)
{
	if (a != NULL && experiment != NULL)
		(void)alert_resolve_where(a, experiment, epoch, -1,
		    "new_epoch");
}

void
alert_paused(struct alert *a, const char *experiment)
{
	if (a != NULL && experiment != NULL)
		(void)alert_resolve_where(a, experiment, UINT32_MAX,
		    ALERT_PAUSE, "paused");
}

void
alert_experiment_resolve(struct alert *a, const char *experiment,
    const char *why)
{
	if (a != NULL && experiment != NULL)
		(void)alert_resolve_where(a, experiment, UINT32_MAX, -1, why);
}

void
alert_experiment_reset(struct alert *a, const char *experiment)
{
	alert_experiment_resolve(a, experiment, "reset");
}

/* Acknowledge (close = 0) or close (1) the matching open alerts. */
static int
alert_operator(struct alert *a, const char *experiment, const char *guardrail,
    const char *variant, int close, char **cause)
{
	struct alert_entry *e;
	size_t i;
	int n = 0;

	for (i = 0; i < a->n; i++) {
		e = a->v[i];
		if (e->state == ALERT_RESOLVED ||
		    (!close && e->state != ALERT_RAISED) ||
		    strcmp(e->experiment, experiment) != 0 ||
		    (guardrail != NULL && strcmp(e->guardrail, guardrail) != 0) ||
		    (variant != NULL && *variant != '\0' &&
		    strcmp(e->variant, variant) != 0))
			continue;
		n++;
		if (close)
			alert_resolve(a, e, "closed");
		else {
			e->state = ALERT_ACKED;
			alert_emit(a, e, EV_ACKNOWLEDGED);
		}
	}
	if (n == 0) {
		xasprintf(cause, "no %s alert for experiment %s guardrail "
		    "%s variant %s", close ? "open" : "raised", experiment,
		    guardrail ? guardrail : "*", variant && *variant ? variant :
		    "*");
		return -1;
	}
	if (!close)
		a->acked += (uint64_t)n;
	/* Under Kafka the partition's state keeps it, before the answer:
	 * a takeover a moment later still knows. */
	if (a->d->kafka != NULL &&
	    kafka_state_commit_of(a->d->kafka, experiment) != 0)
		log_warnx("alert: %s of experiment %s not yet in its "
		    "partition's state (retried at the next commit)",
		    close ? "close" : "ack", experiment);
	return 0;
}

int
alert_ack(struct alert *a, const char *experiment, const char *guardrail,
    const char *variant, char **cause)
{
	return alert_operator(a, experiment, guardrail, variant, 0, cause);
}

int
alert_close(struct alert *a, const char *experiment, const char *guardrail,
    const char *variant, char **cause)
{
	return alert_operator(a, experiment, guardrail, variant, 1, cause);
}

static int
alert_remindable(const struct alert_entry *e)
{
	return e->state == ALERT_RAISED && (e->kind == ALERT_HARM ||
	    alert_text_srm(e->kind));
}

/*
 * Under Kafka an alert is this daemon's while an engine here holds its
 * experiment: one of a partition that left (restored from an older
 * local checkpoint, or waiting for its partition's state) is kept, so a
 * repeat is still known, but neither listed, reminded nor refreshed.
 */
static int
alert_held(const struct alert *a, const struct alert_entry *e)
{
	return a->d->kafka == NULL || engines_find(a->d, e->experiment) !=
	    NULL;
}

/* The alert's life moved on outside a record: its partition's state
 * carries that at its next commit. */
static void
alert_touched(struct alert *a, const char *experiment)
{
	struct engine *eng;

	if (a->d->kafka != NULL && (eng = engines_find(a->d, experiment)) !=
	    NULL)
		engines_touched(a->d, eng);
}

static void
alert_remind_event(evutil_socket_t fd, short what, void *arg)
{
	struct alert *a = arg;
	struct alert_entry *e;
	double now = daemon_now();
	size_t i;

	for (i = 0; i < a->n; i++) {
		e = a->v[i];
		if (!alert_remindable(e) || now - e->last_sent <
		    a->remind_every || !alert_held(a, e))
			continue;
		e->reminders++;
		e->last_sent = now;
		a->reminders++;
		alert_emit(a, e, EV_REMINDER);
		alert_touched(a, e->experiment);
	}
}

/*
 * Alertmanager forgets an alert at its endsAt: every open alert is sent
 * again each resend with endsAt four resends ahead, as Prometheus does,
 * so it holds while it is open and ends soon after a daemon that died.
 */
static void
alert_am_event(evutil_socket_t fd, short what, void *arg)
{
	struct alert *a = arg;
	const struct conf *c = a->d->conf;
	struct alert_entry *e;
	struct alert_view v;
	double ends = daemon_now() + 4 * a->am_resend;
	size_t i;

	if (c->am_url == NULL)
		return;
	for (i = 0; i < a->n; i++) {
		e = a->v[i];
		if (e->state == ALERT_RESOLVED ||
		    (c->am_kinds & alert_kind_bits[e->kind]) == 0 ||
		    !alert_held(a, e))
			continue;
		alert_view(e, &v);
		alertmgr_post(a->d, &v, ends);
	}
}

static struct event *
alert_timer(struct alert *a, double every, event_callback_fn cb)
{
	struct timeval tv;
	struct event *ev;

	tv.tv_sec = (time_t)every;
	tv.tv_usec = (suseconds_t)((every - (double)tv.tv_sec) * 1e6);
	ev = event_new(a->d->base, -1, EV_PERSIST, cb, a);
	if (ev == NULL || event_add(ev, &tv) == -1)
		fatalx("alert: cannot arm a timer");
	return ev;
}

struct alert *
alert_new(struct daemon *d, char **cause)
{
	const struct conf *c = d->conf;
	struct alert *a;
	double every;
	int fac;

	fac = log_facility(c->syslog_facility ? c->syslog_facility : "daemon");
	if (fac == -1) {
		xasprintf(cause, "unknown syslog facility %s",
		    c->syslog_facility);
		return NULL;
	}
	a = xcalloc(1, sizeof *a);
	a->d = d;
	a->facility = fac;
	a->remind_every = c->remind_every;
	snprintf(alert_ident, sizeof alert_ident, "%s",
	    c->syslog_ident ? c->syslog_ident : "stopcockd");
	openlog(alert_ident, LOG_PID | LOG_NDELAY, fac);
	if (a->remind_every > 0) {
		every = a->remind_every / 4;
		every = every < 0.25 ? 0.25 : every > 60 ? 60 : every;
		a->remind = alert_timer(a, every, alert_remind_event);
	}
	if (c->am_url != NULL) {
		a->am_resend = c->am_resend;
		a->am_timer = alert_timer(a, a->am_resend, alert_am_event);
	}
	return a;
}

void
alert_free(struct alert *a)
{
	size_t i;

	if (a == NULL)
		return;
	if (a->am_timer != NULL)
		event_free(a->am_timer);
	if (a->remind != NULL)
		event_free(a->remind);
	alert_journal_free(a->journal);
	for (i = 0; i < a->n; i++)
		alert_entry_free(a->v[i]);
	free(a->v);
	free(a);
}

/* Before any output hears of an event, the journal has it on disk. */
void
alert_journal_note(struct alert *a, const struct alert_entry *e)
{
	json_t *o;

	if (a->journal == NULL)
		return;
	o = alert_carry_entry(e);
	a->jseq++;
	alert_journal_append(a->journal, a->jseq, o);
	json_decref(o);
}

json_t *
alert_save(struct alert *a)
{
	json_t *list = json_array();
	size_t i;

	for (i = 0; a != NULL && i < a->n; i++)
		json_array_append_new(list, alert_carry_entry(a->v[i]));
	return json_pack("{s:i, s:o, s:I}", "version", 1, "alerts", list,
	    "journal_seq", (json_int_t)(a != NULL ? a->jseq : 0));
}

int
alert_restore(struct alert *a, const json_t *j, char **cause)
{
	struct alert_entry **v = NULL, *e;
	const json_t *list, *seq;
	json_int_t version;
	size_t i, n = 0;

	if (json_unpack((json_t *)j, "{s:I, s:o}", "version", &version,
	    "alerts", &list) == -1 || !json_is_array(list)) {
		*cause = xstrdup("alert state: not an alert state object");
		return -1;
	}
	if (version != 1) {
		xasprintf(cause, "alert state: unknown version %lld",
		    (long long)version);
		return -1;
	}
	if (json_array_size(list) > ALERT_MAX) {
		xasprintf(cause, "alert state: more than %d alerts", ALERT_MAX);
		return -1;
	}
	for (i = 0; i < json_array_size(list); i++) {
		if ((e = alert_carry_load(json_array_get(list, i), cause)) ==
		    NULL)
			goto fail;
		v = xreallocarray(v, n + 1, sizeof *v);
		v[n++] = e;
	}
	/* All or nothing: the current state goes only now. Written before
	 * the journal existed: no journal_seq, and every line is newer. */
	for (i = 0; i < a->n; i++)
		alert_entry_free(a->v[i]);
	free(a->v);
	a->v = v;
	a->n = n;
	seq = json_object_get(j, "journal_seq");
	a->jseq = json_is_integer(seq) && json_integer_value(seq) > 0 ?
	    (uint64_t)json_integer_value(seq) : 0;
	/* Taking over another daemon's state (Redis ha): the events this
	 * one journaled since its own last checkpoint still count. */
	if (a->journal != NULL &&
	    alert_journal_replay(a->journal, 0, alert_journal_lay, a) != 0)
		log_warnx("alert journal: not read over the adopted state");
	return 0;
fail:
	for (i = 0; i < n; i++)
		alert_entry_free(v[i]);
	free(v);
	return -1;
}

/*
 * One journaled event over the restored state: it replaces the alert's
 * self when it is further on, or joins the state when the checkpoint
 * never saw it. Further on, not newer by sequence: the state may be
 * another daemon's (a takeover), whose numbers are not this journal's.
 */
static void
alert_journal_lay(void *arg, uint64_t seq, const json_t *j)
{
	struct alert *a = arg;
	struct alert_entry *e;
	char *cause = NULL;

	if (seq > a->jseq)
		a->jseq = seq;
	if ((e = alert_carry_load(j, &cause)) == NULL) {
		log_warnx("alert journal: event %" PRIu64 " refused: %s", seq,
		    cause);
		free(cause);
		return;
	}
	alert_merge(a, e);
	alert_journal_replayed(a->journal);
}

/*
 * After the checkpoint is restored (or there was none): events journaled
 * after its snapshot are laid over it, so what a crash interrupted is
 * remembered and never sent twice; from now on every event is journaled.
 */
int
alert_start_journal(struct alert *a, const char *dir, char **cause)
{
	uint64_t from = a->jseq;

	if ((a->journal = alert_journal_open(dir, cause)) == NULL)
		return -1;
	if (alert_journal_replay(a->journal, from, alert_journal_lay, a) != 0)
		log_warnx("alert journal: not read; alerts raised since the "
		    "last checkpoint may be sent again");
	if (a->jseq > from)
		log_info("alert journal: events %" PRIu64 "-%" PRIu64 " laid "
		    "over the checkpoint", from + 1, a->jseq);
	return 0;
}

/* The sequence number a checkpoint taken now covers. */
uint64_t
alert_journal_seq(const struct alert *a)
{
	return a != NULL ? a->jseq : 0;
}

/* A checkpoint covering events up to seq is on disk. */
void
alert_journal_done(struct alert *a, uint64_t seq)
{
	if (a != NULL)
		alert_journal_covered(a->journal, seq);
}

json_t *
alert_json(struct alert *a)
{
	struct alert_entry *e;
	json_t *list = json_array(), *o;
	size_t i;

	for (i = 0; a != NULL && i < a->n; i++) {
		e = a->v[i];
		if (e->state == ALERT_RESOLVED || !alert_held(a, e))
			continue;	/* kept against repeats, not shown */
		o = json_deep_copy(e->body);
		json_object_set_new(o, "state", json_string(
		    alert_states[e->state]));
		json_object_set_new(o, "last_sent", json_real(e->last_sent));
		json_object_set_new(o, "reminder", json_integer(e->reminders));
		json_object_del(o, "type");
		json_array_append_new(list, o);
	}
	return list;
}

void
alert_metrics(struct alert *a, struct evbuffer *b)
{
	uint64_t active[ALERT_NKINDS] = { 0 };
	size_t i;

	if (a == NULL)
		return;
	for (i = 0; i < a->n; i++)
		if (a->v[i]->state == ALERT_RAISED && alert_held(a, a->v[i]))
			active[a->v[i]->kind]++;
	metrics_family(b, "stopcock_alerts_raised_total", "counter",
	    "Alerts raised since start, by kind.");
	for (i = 0; i < ALERT_NKINDS; i++)
		evbuffer_add_printf(b, "stopcock_alerts_raised_total"
		    "{alert=\"%s\"} %llu\n", alert_kinds[i],
		    (unsigned long long)a->raised[i]);
	metrics_family(b, "stopcock_alerts_active", "gauge",
	    "Alerts raised and not acknowledged, by kind.");
	for (i = 0; i < ALERT_NKINDS; i++)
		evbuffer_add_printf(b, "stopcock_alerts_active{alert=\"%s\"} "
		    "%llu\n", alert_kinds[i], (unsigned long long)active[i]);
	metrics_counter(b, "stopcock_alerts_reminders_total",
	    "Reminders sent.", a->reminders);
	metrics_counter(b, "stopcock_alerts_acked_total",
	    "Alerts acknowledged.", a->acked);
	metrics_counter(b, "stopcock_alerts_resolved_total", "Alerts resolved "
	    "(new epoch, reset, pause, retirement or an operator's close).",
	    a->resolved);
	metrics_counter(b, "stopcock_alerts_untrusted_safe_total", "Safe "
	    "verdicts not alerted because SRM made them untrustworthy.",
	    a->untrusted_safe);
	metrics_counter(b, "stopcock_alerts_duplicates_total", "Findings that "
	    "matched an alert already raised (not sent again).",
	    a->duplicates);
	metrics_counter(b, "stopcock_alerts_evicted_total", "Alerts forgotten "
	    "because more than the limit were held.", a->evicted);
	metrics_counter(b, "stopcock_alerts_adopted_total", "Alerts taken "
	    "from a Kafka partition's state (new here, or further on).",
	    a->adopted);
	metrics_counter(b, "stopcock_alerts_carried_refused_total", "Alerts "
	    "in a Kafka partition's state refused as malformed.",
	    a->carried_refused);
	metrics_counter(b, "stopcock_alerts_forgotten_total", "Alerts that "
	    "left with their Kafka partition.", a->forgotten);
	alert_journal_metrics(a->journal, b);
}

void
alert_news(struct alert *a, uint32_t kind, const char *fields,
    const char *id)
{
	const char *word = kind == CONF_KIND_RESTARTED ? "restarted" :
	    "retired";

	if ((a->d->conf->syslog_kinds & kind) == 0)
		return;
	/* No copy on stderr in the foreground: the daemon's log line,
	 * with the same fields, is already there. */
	syslog(a->facility | LOG_NOTICE, "event %s %s id=%s", word, fields,
	    id);
}
