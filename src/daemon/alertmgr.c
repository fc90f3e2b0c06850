/*
 * alertmgr.c: alerts told to an Alertmanager, so teams reuse its routing,
 * grouping and silences. Prometheus's documented interface: a POST of a
 * JSON array of postable alerts to /api/v2/alerts, each with labels (the
 * alert's identity, which Alertmanager fingerprints), annotations
 * (summary, description, runbook_url), startsAt, endsAt and generatorURL.
 * Alertmanager resolves an alert by itself at its endsAt; alert.c sends
 * every open alert again each [alertmanager] resend with endsAt four
 * resends ahead, and once more with endsAt = the resolution when it is
 * resolved. Deliveries go through webhook.c's internal receiver
 * "@alertmanager" (spooled, retried, never blocking the loop).
 */
#include <math.h>
#include <stdio.h>
#include <string.h>
#include <time.h>

#include "stopcock/log.h"
#include "daemon.h"

/* RFC 3339 in UTC with milliseconds, as Alertmanager's API writes. */
static void
alertmgr_time(double t, char *buf, size_t size)
{
	struct tm tm;
	time_t s;
	int ms;

	if (!isfinite(t) || t < 0)
		t = 0;
	s = (time_t)t;
	ms = (int)((t - (double)s) * 1000);
	if (ms > 999)
		ms = 999;
	gmtime_r(&s, &tm);
	if (ms < 0)
		ms = 0;
	snprintf(buf, size, "%04d-%02d-%02dT%02d:%02d:%02d.%03dZ",
	    (tm.tm_year + 1900) % 10000, (tm.tm_mon + 1) % 100,
	    tm.tm_mday % 100, tm.tm_hour % 100, tm.tm_min % 100,
	    tm.tm_sec % 100, ms % 1000);
}

/* alertname per kind, in the CamelCase Prometheus alert names use. */
static const char *
alertmgr_name(const char *kind)
{
	if (strcmp(kind, "harm") == 0)
		return "StopcockHarm";
	if (strcmp(kind, "safe") == 0)
		return "StopcockSafe";
	if (strcmp(kind, "srm") == 0)
		return "StopcockSampleRatioMismatch";
	if (strcmp(kind, "pause") == 0)
		return "StopcockPaused";
	if (strcmp(kind, "pause_dry_run") == 0)
		return "StopcockPauseDryRun";
	return "StopcockAlert";
}

static json_t *
alertmgr_item(const struct alert_view *v, double ends)
{
	char starts_at[64], ends_at[64], epoch[16];
	json_t *labels, *notes, *item;

	alertmgr_time(v->starts, starts_at, sizeof starts_at);
	alertmgr_time(ends, ends_at, sizeof ends_at);
	snprintf(epoch, sizeof epoch, "%u", v->epoch);
	labels = json_pack("{s:s, s:s, s:s, s:s, s:s, s:s, s:s}", "alertname",
	    alertmgr_name(v->kind), "alert_id", v->id, "kind", v->kind,
	    "severity", v->severity, "experiment", v->experiment, "epoch",
	    epoch, "guardrail", v->guardrail);
	if (*v->variant != '\0')
		json_object_set_new(labels, "variant", json_string(v->variant));
	notes = json_pack("{s:s, s:s}", "summary", v->summary, "description",
	    v->acked ? "acknowledged in stopcock" : "raised by stopcockd");
	if (v->runbook != NULL)
		json_object_set_new(notes, "runbook_url",
		    json_string(v->runbook));
	item = json_pack("{s:o, s:o, s:s, s:s}", "labels", labels,
	    "annotations", notes, "startsAt", starts_at, "endsAt", ends_at);
	if (v->link != NULL)
		json_object_set_new(item, "generatorURL", json_string(v->link));
	return item;
}

void
alertmgr_post(struct daemon *d, const struct alert_view *v, double ends)
{
	json_t *list;
	char *id;

	list = json_array();
	json_array_append_new(list, alertmgr_item(v, ends));
	/* Each post is its own message: the id only names it in logs. */
	xasprintf(&id, "%s_am%.0f", v->id, ends * 1000);
	if (webhook_post(d->webhook, WEBHOOK_ALERTMANAGER, id, list) == -1)
		log_warnx("alertmanager: no receiver for id=%s", v->id);
	free(id);
	json_decref(list);
}
