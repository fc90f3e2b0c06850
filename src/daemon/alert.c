/*
 * alert.c: findings become alerts that people can act on (dispatch.c
 * hands them here in the loop, after the pause policy): one per identity (experiment, epoch, guardrail,
 * variant, and what happened: harm, safe, srm, untrusted, pause), raised
 * once and kept raised until the experiment starts a new epoch, is reset
 * or the alert is acknowledged. Each raise writes one syslog line of
 * key=value fields and yields one webhook body (dispatch.c queues it
 * in webhook.c, signed) whose webhook-id is derived from the identity, so receivers deduplicate and a
 * restart that replays the same verdict never pages twice. Optional
 * reminders repeat raised, unacknowledged alerts. The state is saved in
 * the checkpoint (alert_save / alert_restore).
 *
 * Alerts go to syslog(3) directly, also when the daemon runs in the
 * foreground (where the logger writes to stderr): they are for the
 * operators' log pipeline, not for the console.
 */
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <syslog.h>

#include "stopcock/log.h"
#include "daemon.h"

#define ALERT_MAX	4096	/* alerts remembered (raised and acked) */
#define ALERT_LINE_MAX	2048	/* bytes in one syslog line */
#define ALERT_ID_BYTES	16	/* of SHA-256, as hex after "sc_" */

enum alert_state { ALERT_RAISED, ALERT_ACKED };

struct alert_entry {
	char		 id[3 + 2 * ALERT_ID_BYTES + 1];
	char		*experiment;
	uint32_t	 epoch;
	char		*guardrail;
	char		*variant;	/* "" for the SRM check */
	enum alert_kind	 kind;
	enum alert_state state;
	int		 priority;
	double		 first_seen;	/* wall time */
	double		 last_sent;
	uint32_t	 reminders;
	char		*line;		/* syslog fields, for reminders */
	json_t		*body;		/* webhook payload as first sent */
};

struct alert {
	struct daemon		*d;
	int			 facility;
	struct event		*remind;
	double			 remind_every;
	struct alert_entry	**v;
	size_t			 n;
	uint64_t		 raised[ALERT_NKINDS];
	uint64_t		 reminders;
	uint64_t		 acked;
	uint64_t		 evicted;
	uint64_t		 duplicates;
};

/* The names in syslog, webhooks, the API, metrics and the state. */
static const char *const alert_kinds[ALERT_NKINDS] = {
	[ALERT_HARM] = "harm",
	[ALERT_SAFE] = "safe",
	[ALERT_SRM] = "srm",
	[ALERT_UNTRUSTED] = "untrusted",
	[ALERT_PAUSE] = "pause",
	[ALERT_PAUSE_DRY_RUN] = "pause_dry_run",
};

/*
 * syslog(3) keeps the ident pointer for the life of the process, so it
 * cannot live in an object that is freed; like the logger's own state
 * this is process-wide.
 */
static char alert_ident[64];

/* A bounded line builder: appends stop at the end, never overflow. */
struct alert_line {
	char	buf[ALERT_LINE_MAX];
	size_t	len;
};

static void alert_printf(struct alert_line *, const char *, ...)
    SC_PRINTF(2, 3);

static void
alert_printf(struct alert_line *l, const char *fmt, ...)
{
	va_list ap;
	int n;

	if (l->len >= sizeof l->buf - 1)
		return;
	va_start(ap, fmt);
	n = vsnprintf(l->buf + l->len, sizeof l->buf - l->len, fmt, ap);
	va_end(ap);
	if (n < 0)
		return;
	l->len += (size_t)n;
	if (l->len >= sizeof l->buf)
		l->len = sizeof l->buf - 1;
}

static void
alert_num(struct alert_line *l, const char *key, double v)
{
	if (isfinite(v))
		alert_printf(l, " %s=%.6g", key, v);
	else
		alert_printf(l, " %s=nan", key);
}

/* A saved kind's name back to the kind; -1 when unknown. */
static int
alert_kind_parse(const char *name)
{
	int k;

	for (k = 0; k < ALERT_NKINDS; k++)
		if (strcmp(alert_kinds[k], name) == 0)
			return k;
	return -1;
}

/* "sc_" + hex of the first bytes of SHA-256 over the identity. */
static void
alert_make_id(char *out, const char *experiment, uint32_t epoch,
    const char *guardrail, const char *variant, const char *what)
{
	char *s;
	int len;

	/* NUL-separated so no two identities share a string. */
	len = xasprintf(&s, "%s%c%u%c%s%c%s%c%s", experiment, 0, epoch, 0,
	    guardrail, 0, variant, 0, what);
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

/* The SRM check's own alerts, which speak of arms, not a guardrail. */
static int
alert_is_srm(enum alert_kind kind)
{
	return kind == ALERT_SRM || kind == ALERT_UNTRUSTED;
}

static const char *
alert_arm_role(const struct finding *f, const char *variant)
{
	if (f->control != NULL && strcmp(variant, f->control) == 0)
		return "control";
	if (f->variant != NULL && strcmp(variant, f->variant) == 0)
		return "treatment";
	return NULL;
}

/* One human sentence: what happened, where, how sure. */
static char *
alert_summary(const struct finding *f, enum alert_kind kind,
    const char *reason)
{
	struct alert_line l;
	int i;

	l.len = 0;
	l.buf[0] = '\0';
	if (alert_is_srm(kind)) {
		alert_printf(&l, "%s in experiment %s epoch %u:",
		    kind == ALERT_SRM ? "Sample ratio mismatch" :
		    "Verdicts untrustworthy (sample ratio mismatch)",
		    f->experiment, f->epoch);
		for (i = 0; i < f->narms; i++)
			alert_printf(&l, "%s %s %llu exposures (weight %g)",
			    i == 0 ? "" : ",", f->arms[i].variant,
			    (unsigned long long)f->arms[i].exposures,
			    f->arms[i].weight);
		alert_printf(&l, "; p=%.3g", f->p);
		return xstrdup(l.buf);
	}
	if (kind == ALERT_PAUSE || kind == ALERT_PAUSE_DRY_RUN) {
		alert_printf(&l, "%s experiment %s: %s",
		    kind == ALERT_PAUSE ? "Paused" :
		    "Dry run: would have paused", f->experiment,
		    reason != NULL ? reason : "pause guardrail");
		return xstrdup(l.buf);
	}
	alert_printf(&l, "guardrail %s %s for %s vs %s in experiment %s: "
	    "effect %+.4g", f->guardrail, kind == ALERT_SAFE ?
	    "is safe" : "shows harm", f->variant ? f->variant : "?",
	    f->control ? f->control : "?", f->experiment, f->estimate);
	if (isfinite(f->rel_estimate))
		alert_printf(&l, " (%+.1f%%)", 100 * f->rel_estimate);
	alert_printf(&l, ", confidence sequence [%.4g, %.4g], p=%.3g, "
	    "alpha %.3g of %d tests", f->lower, f->upper, f->p, f->alpha,
	    f->family);
	if (f->untrusted)
		alert_printf(&l, "; UNTRUSTED: sample ratio mismatch in this "
		    "epoch");
	return xstrdup(l.buf);
}

/* The key=value fields of the syslog line (after "alert raised"). */
static char *
alert_fields(const struct finding *f, const char *id, enum alert_kind kind,
    const char *link)
{
	struct alert_line l;
	char key[PROTO_NAME_MAX + 16];
	int i, srm;

	srm = alert_is_srm(kind);
	l.len = 0;
	l.buf[0] = '\0';
	alert_printf(&l, "id=%s alert=%s experiment=%s epoch=%u guardrail=%s",
	    id, alert_kinds[kind], f->experiment, f->epoch, f->guardrail ? f->guardrail :
	    "srm");
	if (!srm) {
		alert_printf(&l, " metric=%s test=%s variant=%s control=%s "
		    "harm=%s verdict=%s", f->metric ? f->metric : "-",
		    f->test ? f->test : "-", f->variant ? f->variant : "-",
		    f->control ? f->control : "-", f->harm ? f->harm : "-",
		    verdict_name(f->verdict));
		alert_num(&l, "estimate", f->estimate);
		alert_num(&l, "lower", f->lower);
		alert_num(&l, "upper", f->upper);
		alert_num(&l, "rel_estimate", f->rel_estimate);
		alert_num(&l, "rel_lower", f->rel_lower);
		alert_num(&l, "rel_upper", f->rel_upper);
	} else {
		alert_printf(&l, " verdict=srm");
		alert_num(&l, "chi2_p", f->chi2_p);
	}
	alert_num(&l, "p", f->p);
	alert_num(&l, "alpha", f->alpha);
	alert_printf(&l, " family=%d untrusted=%s", f->family,
	    f->untrusted ? "yes" : "no");
	/* Counts per arm: every arm for SRM, the two compared otherwise. */
	for (i = 0; i < f->narms; i++) {
		const struct finding_arm *arm = &f->arms[i];

		if (!srm && alert_arm_role(f, arm->variant) == NULL)
			continue;
		alert_printf(&l, " exposures.%s=%llu", arm->variant,
		    (unsigned long long)arm->exposures);
		if (srm)
			continue;
		snprintf(key, sizeof key, "n.%s", arm->variant);
		alert_num(&l, key, arm->n);
		if (f->test_kind == TEST_PROPORTION ||
		    f->test_kind == TEST_RATE) {
			snprintf(key, sizeof key, "k.%s", arm->variant);
			alert_num(&l, key, arm->k);
		}
	}
	if (link != NULL)
		alert_printf(&l, " link=%s", link);
	return xstrdup(l.buf);
}

static void
alert_entry_free(struct alert_entry *e)
{
	if (e == NULL)
		return;
	free(e->experiment);
	free(e->guardrail);
	free(e->variant);
	free(e->line);
	json_decref(e->body);
	free(e);
}

static struct alert_entry *
alert_find(struct alert *a, const char *id)
{
	size_t i;

	for (i = 0; i < a->n; i++)
		if (strcmp(a->v[i]->id, id) == 0)
			return a->v[i];
	return NULL;
}

static void
alert_remove_at(struct alert *a, size_t i)
{
	alert_entry_free(a->v[i]);
	memmove(&a->v[i], &a->v[i + 1], (a->n - i - 1) * sizeof *a->v);
	a->n--;
}

/* Bounded: past ALERT_MAX the oldest acknowledged alert goes first. */
static void
alert_insert(struct alert *a, struct alert_entry *e)
{
	size_t i, victim = 0;
	int found = 0;

	if (a->n >= ALERT_MAX) {
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

static void
alert_syslog(struct alert *a, struct alert_entry *e, const char *event)
{
	if (e->reminders > 0 && strcmp(event, "reminder") == 0)
		syslog(a->facility | e->priority, "alert %s %s reminder=%u",
		    event, e->line, e->reminders);
	else
		syslog(a->facility | e->priority, "alert %s %s", event,
		    e->line);
	log_debug("alert %s %s", event, e->line);
}

json_t *
alert_raise(struct alert *a, enum alert_kind kind, const struct finding *f,
    const char *reason, const char **idp)
{
	struct alert_entry *e;
	const char *guardrail, *variant;
	char id[sizeof e->id], *link, *summary;
	json_t *body;
	double now = daemon_now();

	guardrail = f->guardrail != NULL ? f->guardrail : "srm";
	variant = f->variant != NULL ? f->variant : "";
	*idp = NULL;
	if (f->experiment == NULL)
		return NULL;
	alert_make_id(id, f->experiment, f->epoch, guardrail, variant,
	    alert_kinds[kind]);
	if (alert_find(a, id) != NULL) {
		/* Already raised (or acknowledged): never page twice. */
		a->duplicates++;
		return NULL;
	}
	e = xcalloc(1, sizeof *e);
	memcpy(e->id, id, sizeof e->id);
	e->experiment = xstrdup(f->experiment);
	e->epoch = f->epoch;
	e->guardrail = xstrdup(guardrail);
	e->variant = xstrdup(variant);
	e->kind = kind;
	e->state = ALERT_RAISED;
	e->priority = alert_priority(f, kind);
	e->first_seen = now;
	e->last_sent = now;

	link = alert_link(a, f->experiment);
	e->line = alert_fields(f, id, kind, link);
	summary = alert_summary(f, kind, reason);
	if ((body = finding_json(f)) == NULL || !json_is_object(body)) {
		json_decref(body);
		body = json_object();
	}
	json_object_set_new(body, "id", json_string(id));
	json_object_set_new(body, "type", json_string("stopcock.alert.raised"));
	json_object_set_new(body, "alert", json_string(alert_kinds[kind]));
	json_object_set_new(body, "first_seen", json_real(now));
	json_object_set_new(body, "summary", json_string(summary));
	json_object_set_new(body, "untrusted", json_boolean(f->untrusted));
	json_object_set_new(body, "link", link ? json_string(link) :
	    json_null());
	json_object_set_new(body, "reminder", json_integer(0));
	if (reason != NULL)
		json_object_set_new(body, "reason", json_string(reason));
	e->body = body;
	free(link);
	free(summary);

	alert_insert(a, e);
	a->raised[kind]++;
	alert_syslog(a, e, "raised");
	*idp = e->id;
	return e->body;
}

/* A new epoch (a new plan or a reset) retires the earlier epochs' alerts. */
static void
alert_clear(struct alert *a, const char *experiment, uint32_t below)
{
	size_t i = 0;

	while (i < a->n) {
		if (strcmp(a->v[i]->experiment, experiment) == 0 &&
		    a->v[i]->epoch < below)
			alert_remove_at(a, i);
		else
			i++;
	}
}

void
alert_epoch(struct alert *a, const char *experiment, uint32_t epoch)
{
	if (a != NULL && experiment != NULL)
		alert_clear(a, experiment, epoch);
}

int
alert_ack(struct alert *a, const char *experiment, const char *guardrail,
    const char *variant, char **cause)
{
	struct alert_entry *e;
	size_t i;
	int n = 0;

	for (i = 0; i < a->n; i++) {
		e = a->v[i];
		if (e->state != ALERT_RAISED ||
		    strcmp(e->experiment, experiment) != 0 ||
		    (guardrail != NULL && strcmp(e->guardrail, guardrail) != 0) ||
		    (variant != NULL && *variant != '\0' &&
		    strcmp(e->variant, variant) != 0))
			continue;
		e->state = ALERT_ACKED;
		n++;
		syslog(a->facility | LOG_NOTICE, "alert acknowledged id=%s "
		    "alert=%s experiment=%s epoch=%u guardrail=%s variant=%s",
		    e->id, alert_kinds[e->kind], e->experiment, e->epoch, e->guardrail,
		    *e->variant ? e->variant : "-");
	}
	if (n == 0) {
		xasprintf(cause, "no raised alert for experiment %s guardrail "
		    "%s variant %s", experiment, guardrail ? guardrail : "*",
		    variant && *variant ? variant : "*");
		return -1;
	}
	a->acked += (uint64_t)n;
	return 0;
}

void
alert_experiment_reset(struct alert *a, const char *experiment)
{
	if (a != NULL)
		alert_clear(a, experiment, UINT32_MAX);
}

static int
alert_remindable(const struct alert_entry *e)
{
	return e->state == ALERT_RAISED && (e->kind == ALERT_HARM ||
	    alert_is_srm(e->kind));
}

static void
alert_remind_event(evutil_socket_t fd, short what, void *arg)
{
	struct alert *a = arg;
	struct alert_entry *e;
	double now = daemon_now();
	json_t *body;
	char *id;
	size_t i;

	for (i = 0; i < a->n; i++) {
		e = a->v[i];
		if (!alert_remindable(e) || now - e->last_sent < a->remind_every)
			continue;
		e->reminders++;
		e->last_sent = now;
		a->reminders++;
		alert_syslog(a, e, "reminder");
		/* A reminder is a new message: its own webhook-id. */
		xasprintf(&id, "%s_r%u", e->id, e->reminders);
		body = json_deep_copy(e->body);
		json_object_set_new(body, "type",
		    json_string("stopcock.alert.reminder"));
		json_object_set_new(body, "reminder",
		    json_integer(e->reminders));
		json_object_set_new(body, "sent_at", json_real(now));
		webhook_send(a->d->webhook, id, body);
		json_decref(body);
		free(id);
	}
}

struct alert *
alert_new(struct daemon *d, char **cause)
{
	const struct conf *c = d->conf;
	struct alert *a;
	struct timeval tv;
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
		tv.tv_sec = (time_t)every;
		tv.tv_usec = (suseconds_t)((every - (double)tv.tv_sec) * 1e6);
		a->remind = event_new(d->base, -1, EV_PERSIST,
		    alert_remind_event, a);
		if (a->remind == NULL || event_add(a->remind, &tv) == -1)
			fatalx("alert: cannot arm the reminder timer");
	}
	return a;
}

void
alert_free(struct alert *a)
{
	size_t i;

	if (a == NULL)
		return;
	if (a->remind != NULL)
		event_free(a->remind);
	for (i = 0; i < a->n; i++)
		alert_entry_free(a->v[i]);
	free(a->v);
	free(a);
}

json_t *
alert_save(struct alert *a)
{
	struct alert_entry *e;
	json_t *list = json_array();
	size_t i;

	for (i = 0; a != NULL && i < a->n; i++) {
		e = a->v[i];
		json_array_append_new(list, json_pack("{s:s, s:s, s:I, s:s, "
		    "s:s, s:s, s:s, s:i, s:f, s:f, s:I, s:s, s:O}",
		    "id", e->id, "experiment", e->experiment, "epoch",
		    (json_int_t)e->epoch, "guardrail", e->guardrail, "variant",
		    e->variant, "alert", alert_kinds[e->kind], "state",
		    e->state == ALERT_RAISED ? "raised" : "acked", "priority",
		    e->priority, "first_seen", e->first_seen, "last_sent",
		    e->last_sent, "reminders", (json_int_t)e->reminders,
		    "line", e->line, "body", e->body));
	}
	return json_pack("{s:i, s:o}", "version", 1, "alerts", list);
}

static struct alert_entry *
alert_restore_one(const json_t *j, char **cause)
{
	struct alert_entry *e;
	const char *id, *exp, *gr, *var, *what, *state, *line;
	json_int_t epoch, reminders;
	json_t *body;
	json_error_t err;
	char check[sizeof e->id];
	int priority, kind;
	double first, last;

	if (json_unpack_ex((json_t *)j, &err, 0, "{s:s, s:s, s:I, s:s, s:s, "
	    "s:s, s:s, s:i, s:F, s:F, s:I, s:s, s:o}", "id", &id, "experiment",
	    &exp, "epoch", &epoch, "guardrail", &gr, "variant", &var, "alert",
	    &what, "state", &state, "priority", &priority, "first_seen",
	    &first, "last_sent", &last, "reminders", &reminders, "line", &line,
	    "body", &body) == -1) {
		xasprintf(cause, "alert state: %s", err.text);
		return NULL;
	}
	if (epoch < 1 || epoch > UINT32_MAX || reminders < 0 ||
	    reminders > UINT32_MAX || (kind = alert_kind_parse(what)) == -1 ||
	    (strcmp(state, "raised") != 0 && strcmp(state, "acked") != 0) ||
	    priority < LOG_EMERG || priority > LOG_DEBUG ||
	    !json_is_object(body) || strlen(line) >= ALERT_LINE_MAX ||
	    !proto_name_ok(exp, strlen(exp))) {
		xasprintf(cause, "alert state: bad entry %s", id);
		return NULL;
	}
	alert_make_id(check, exp, (uint32_t)epoch, gr, var, what);
	if (strcmp(check, id) != 0) {
		xasprintf(cause, "alert state: id %s does not match its "
		    "identity", id);
		return NULL;
	}
	e = xcalloc(1, sizeof *e);
	memcpy(e->id, check, sizeof e->id);
	e->experiment = xstrdup(exp);
	e->epoch = (uint32_t)epoch;
	e->guardrail = xstrdup(gr);
	e->variant = xstrdup(var);
	e->kind = (enum alert_kind)kind;
	e->state = strcmp(state, "raised") == 0 ? ALERT_RAISED : ALERT_ACKED;
	e->priority = priority;
	e->first_seen = first;
	e->last_sent = last;
	e->reminders = (uint32_t)reminders;
	e->line = xstrdup(line);
	e->body = json_incref(body);
	return e;
}

int
alert_restore(struct alert *a, const json_t *j, char **cause)
{
	struct alert_entry **v = NULL, *e;
	const json_t *list;
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
		if ((e = alert_restore_one(json_array_get(list, i), cause)) ==
		    NULL)
			goto fail;
		v = xreallocarray(v, n + 1, sizeof *v);
		v[n++] = e;
	}
	/* All or nothing: the current state goes only now. */
	for (i = 0; i < a->n; i++)
		alert_entry_free(a->v[i]);
	free(a->v);
	a->v = v;
	a->n = n;
	return 0;
fail:
	for (i = 0; i < n; i++)
		alert_entry_free(v[i]);
	free(v);
	return -1;
}

json_t *
alert_json(struct alert *a)
{
	struct alert_entry *e;
	json_t *list = json_array(), *o;
	size_t i;

	for (i = 0; a != NULL && i < a->n; i++) {
		e = a->v[i];
		o = json_deep_copy(e->body);
		json_object_set_new(o, "state", json_string(e->state ==
		    ALERT_RAISED ? "raised" : "acked"));
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
		if (a->v[i]->state == ALERT_RAISED)
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
	metrics_counter(b, "stopcock_alerts_duplicates_total", "Findings that "
	    "matched an alert already raised (not sent again).",
	    a->duplicates);
	metrics_counter(b, "stopcock_alerts_evicted_total", "Alerts forgotten "
	    "because more than the limit were held.", a->evicted);
}
