/*
 * alert_carry.c: an alert's saved form (the checkpoint's, the journal's
 * and a Kafka partition state's), and its travel with a partition. A
 * partition's state carries the alert entries of its experiments
 * (raised, acknowledged, resolved, with the reminders sent), so the
 * partition's next owner knows an alert's later life: it neither raises
 * a closed alert again nor reminds an acknowledged one, and the ack verb
 * reaches the daemon that holds the experiment. The old owner forgets
 * them when the partition leaves, so two daemons never both remind.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <syslog.h>

#include "stopcock/log.h"
#include "daemon.h"
#include "alert_int.h"

/* A saved kind's name back to the kind; -1 when unknown. */
static int
alert_carry_kind(const char *name)
{
	int k;

	for (k = 0; k < ALERT_NKINDS; k++)
		if (strcmp(alert_kinds[k], name) == 0)
			return k;
	return -1;
}

/* One alert as the checkpoint, the journal and a partition state keep
 * it. */
json_t *
alert_carry_entry(const struct alert_entry *e)
{
	json_t *o;

	o = json_pack("{s:s, s:s, s:I, s:s, s:s, s:s, s:s, s:i, s:f, "
	    "s:f, s:I, s:s, s:O, s:s}",
	    "id", e->id, "experiment", e->experiment, "epoch",
	    (json_int_t)e->epoch, "guardrail", e->guardrail, "variant",
	    e->variant, "alert", alert_kinds[e->kind], "state",
	    alert_states[e->state], "priority", e->priority,
	    "first_seen", e->first_seen, "last_sent", e->last_sent,
	    "reminders", (json_int_t)e->reminders, "line", e->line,
	    "body", e->body, "severity", alert_sevs[e->severity]);
	if (isfinite(e->epoch_start))
		json_object_set_new(o, "epoch_start", json_real(e->epoch_start));
	if (e->state == ALERT_RESOLVED) {
		json_object_set_new(o, "resolved_at", json_real(e->resolved_at));
		json_object_set_new(o, "resolution", json_string(e->resolution ?
		    e->resolution : "closed"));
	}
	return o;
}

/* A saved word back to its index in names; -1 when unknown. */
static int
alert_carry_word(const char *const *names, int n, const char *w)
{
	int i;

	for (i = 0; w != NULL && i < n; i++)
		if (strcmp(names[i], w) == 0)
			return i;
	return -1;
}

/* A saved alert back, checked: its id must be its identity's. */
struct alert_entry *
alert_carry_load(const json_t *j, char **cause)
{
	struct alert_entry *e;
	const char *id, *exp, *gr, *var, *what, *state, *line;
	json_int_t epoch, reminders;
	json_t *body;
	json_error_t err;
	char check[sizeof e->id];
	int priority, kind, st, sev;
	double first, last, start = NAN;
	const json_t *o;

	if (json_unpack_ex((json_t *)j, &err, 0, "{s:s, s:s, s:I, s:s, s:s, "
	    "s:s, s:s, s:i, s:F, s:F, s:I, s:s, s:o}", "id", &id, "experiment",
	    &exp, "epoch", &epoch, "guardrail", &gr, "variant", &var, "alert",
	    &what, "state", &state, "priority", &priority, "first_seen",
	    &first, "last_sent", &last, "reminders", &reminders, "line", &line,
	    "body", &body) == -1) {
		xasprintf(cause, "alert state: %s", err.text);
		return NULL;
	}
	/* Written before severity and resolution were kept: absent. */
	o = json_object_get(j, "severity");
	sev = o == NULL ? -2 : alert_carry_word(alert_sevs, 3, json_string_value(o));
	if ((o = json_object_get(j, "epoch_start")) != NULL)
		start = json_is_number(o) ? json_number_value(o) : -1;
	if (epoch < 1 || epoch > UINT32_MAX || reminders < 0 ||
	    reminders > UINT32_MAX || (kind = alert_carry_kind(what)) == -1 ||
	    (st = alert_carry_word(alert_states, 3, state)) == -1 || sev == -1 ||
	    (o != NULL && !(isfinite(start) && start >= 0)) ||
	    priority < LOG_EMERG || priority > LOG_DEBUG ||
	    !json_is_object(body) || strlen(line) >= ALERT_LINE_MAX ||
	    !proto_name_ok(exp, strlen(exp))) {
		xasprintf(cause, "alert state: bad entry %s", id);
		return NULL;
	}
	alert_make_id(check, exp, (uint32_t)epoch, start, gr, var, what);
	if (strcmp(check, id) != 0) {
		xasprintf(cause, "alert state: id %s does not match its "
		    "identity", id);
		return NULL;
	}
	e = xcalloc(1, sizeof *e);
	memcpy(e->id, check, sizeof e->id);
	e->experiment = xstrdup(exp);
	e->epoch = (uint32_t)epoch;
	e->epoch_start = start;
	e->guardrail = xstrdup(gr);
	e->variant = xstrdup(var);
	e->kind = (enum alert_kind)kind;
	e->state = (enum alert_state)st;
	e->severity = sev >= 0 ? (enum alert_sev)sev : priority <= LOG_CRIT ?
	    SEV_CRITICAL : priority <= LOG_WARNING ? SEV_WARNING : SEV_INFO;
	if (st == ALERT_RESOLVED) {
		o = json_object_get(j, "resolution");
		e->resolution = xstrdup(json_is_string(o) ?
		    json_string_value(o) : "closed");
		o = json_object_get(j, "resolved_at");
		e->resolved_at = json_is_number(o) ? json_number_value(o) : 0;
	}
	e->priority = priority;
	e->first_seen = first;
	e->last_sent = last;
	e->reminders = (uint32_t)reminders;
	e->line = xstrdup(line);
	e->body = json_incref(body);
	return e;
}

/* How far an alert's life has gone: it only ever moves forward
 * (raised, acknowledged, resolved; then the reminders sent). */
uint64_t
alert_carry_progress(const struct alert_entry *e)
{
	return (uint64_t)e->state << 32 | e->reminders;
}


/*
 * The alerts of the experiments mine() accepts (a partition's), as
 * [alert_carry_entry...]: what the partition's state carries.
 */
json_t *
alert_carry(struct alert *a, int (*mine)(void *, const char *), void *arg)
{
	json_t *out = json_array();
	size_t i;

	for (i = 0; a != NULL && i < a->n; i++)
		if (mine(arg, a->v[i]->experiment))
			json_array_append_new(out, alert_carry_entry(a->v[i]));
	return out;
}

/*
 * Another daemon's alert_carry, merged here: an alert not known joins
 * the table; one known keeps whichever life went further (closed beats
 * open, acknowledged beats raised, more reminders beat fewer). The ids
 * are checked against the identities, so they stay the ones receivers
 * have seen. Each taken alert is journaled, so it is in this daemon's
 * local state too (its checkpoint, a restart). The number taken.
 */
size_t
alert_carry_adopt(struct alert *a, const json_t *carried)
{
	struct alert_entry *e;
	const json_t *j;
	char *cause = NULL;
	size_t i, n = 0;

	if (a == NULL || !json_is_array(carried))
		return 0;
	json_array_foreach(carried, i, j) {
		if (i >= ALERT_MAX) {
			log_warnx("alert: a partition carried more than %d "
			    "alerts; the rest are not taken", ALERT_MAX);
			a->carried_refused += json_array_size(carried) - i;
			break;
		}
		if ((e = alert_carry_load(j, &cause)) == NULL) {
			log_warnx("alert: a carried alert is refused: %s",
			    cause);
			free(cause);
			cause = NULL;
			a->carried_refused++;
			continue;
		}
		if (!alert_merge(a, e))
			continue;
		alert_journal_note(a, e);
		a->adopted++;
		n++;
	}
	return n;
}

/*
 * The partition left (revoked, lost, fenced): its experiments' alerts
 * are its next owner's now. Not journaled: one restored again from an
 * older local checkpoint is of an experiment no engine here holds, and
 * such an alert is neither listed nor reminded (alert_held). The number
 * forgotten.
 */
size_t
alert_carry_forget(struct alert *a, int (*mine)(void *, const char *),
    void *arg)
{
	size_t i = 0, n = 0;

	while (a != NULL && i < a->n) {
		if (mine(arg, a->v[i]->experiment)) {
			alert_remove_at(a, i);
			n++;
		} else
			i++;
	}
	if (a != NULL)
		a->forgotten += n;
	return n;
}
