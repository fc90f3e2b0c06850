/*
 * http.c: stopcockd's HTTP face on libevent's evhttp, bound to loopback
 * unless configured otherwise. It serves
 *
 *   GET  /                          the page (page.html, compiled in)
 *   GET  /api/experiments           engine_json_list
 *   GET  /api/experiments/ID        engine_json_experiment + its alerts
 *   GET  /api/alerts                raised alerts
 *   GET  /api/health                liveness, uptime, checkpoint age, Redis
 *   GET  /chart/ID/N.svg, srm.svg   chart.c's SVGs of one test / the SRM
 *   GET  /metrics                   Prometheus text format 0.0.4
 *   POST /api/experiments/ID/plan|epoch|reset|ack|close|retire   operator
 *                                   actions
 *
 * Everything reads the engine's state between events on the loop, so a
 * request never waits for anything: responses are built in memory into
 * the request's evbuffer and libevent writes them out at the peer's pace.
 * The POST actions need the configured bearer token (compared in
 * constant time) and go through the same engine calls as the protocol.
 * Errors are JSON objects {"error": "..."} with a fitting status.
 */
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <strings.h>

#include <event2/buffer.h>
#include <event2/http.h>
#include <event2/keyvalq_struct.h>

#include "daemon.h"
#include "stopcock/addr.h"
#include "stopcock/chart.h"
#include "stopcock/log.h"

#ifndef STOPCOCK_VERSION
#define STOPCOCK_VERSION "0.1.0"
#endif

#define HTTP_BODY_MAX	(64 * 1024)	/* POST bodies we accept */
/* What evhttp will read before it refuses by itself; between the two
 * the refusal is ours and comes as JSON. */
#define HTTP_BODY_HARD	(1024 * 1024)
#define HTTP_HEADERS_MAX (16 * 1024)
#define HTTP_TIMEOUT	30		/* seconds per idle or slow peer */
#define HTTP_SEGMENTS	5		/* path segments we route on */

/* The page, from src/daemon/page.html via tools/embed.sh. */
extern const char http_page[];
extern const size_t http_page_len;

/* Responses by status, for /metrics; a fixed set keeps the labels
 * bounded. */
static const int http_codes[] = { 200, 304, 400, 401, 403, 404, 405, 413,
    415, 500 };
#define HTTP_NCODES (sizeof http_codes / sizeof http_codes[0])

struct http {
	struct daemon			*d;
	struct evhttp			*evh;
	struct evhttp_bound_socket	*sock;
	uint64_t			 responses[HTTP_NCODES + 1];
	uint64_t			 actions;	/* accepted POSTs */
	uint64_t			 refused_auth;
};

/* ---- replies ---- */

static void
http_count(struct http *h, int code)
{
	size_t i;

	for (i = 0; i < HTTP_NCODES; i++)
		if (http_codes[i] == code)
			break;
	h->responses[i]++;
}

static void
http_send(struct http *h, struct evhttp_request *req, int code,
    const char *type, struct evbuffer *body)
{
	struct evkeyvalq *out = evhttp_request_get_output_headers(req);

	evhttp_add_header(out, "Content-Type", type);
	evhttp_add_header(out, "Cache-Control", "no-store");
	evhttp_add_header(out, "X-Content-Type-Options", "nosniff");
	http_count(h, code);
	evhttp_send_reply(req, code, NULL, body);
}

static int
http_dump_cb(const char *buf, size_t size, void *arg)
{
	return evbuffer_add(arg, buf, size);
}

/* Reply with j (reference stolen). */
static void
http_json(struct http *h, struct evhttp_request *req, int code, json_t *j)
{
	struct evbuffer *b = evbuffer_new();

	if (b == NULL)
		fatalx("http: evbuffer_new failed");
	if (j == NULL || json_dump_callback(j, http_dump_cb, b,
	    JSON_COMPACT | JSON_ENSURE_ASCII) != 0) {
		evbuffer_drain(b, evbuffer_get_length(b));
		evbuffer_add_printf(b, "{\"error\": \"internal error\"}");
		code = 500;
	}
	evbuffer_add(b, "\n", 1);
	http_send(h, req, code, "application/json", b);
	evbuffer_free(b);
	json_decref(j);
}

static void SC_PRINTF(4, 5)
http_error(struct http *h, struct evhttp_request *req, int code,
    const char *fmt, ...)
{
	va_list ap;
	char msg[512];

	va_start(ap, fmt);
	vsnprintf(msg, sizeof msg, fmt, ap);
	va_end(ap);
	http_json(h, req, code, json_pack("{s:s}", "error", msg));
}

static void
http_not_allowed(struct http *h, struct evhttp_request *req,
    const char *allow)
{
	evhttp_add_header(evhttp_request_get_output_headers(req), "Allow",
	    allow);
	http_error(h, req, 405, "method not allowed here; use %s", allow);
}

/* ---- reading requests ---- */

static const char *
http_method(struct evhttp_request *req)
{
	switch (evhttp_request_get_command(req)) {
	case EVHTTP_REQ_GET: return "GET";
	case EVHTTP_REQ_HEAD: return "HEAD";
	case EVHTTP_REQ_POST: return "POST";
	case EVHTTP_REQ_PUT: return "PUT";
	case EVHTTP_REQ_DELETE: return "DELETE";
	case EVHTTP_REQ_OPTIONS: return "OPTIONS";
	case EVHTTP_REQ_PATCH: return "PATCH";
	default: return "other";
	}
}

static int
http_is_get(struct evhttp_request *req)
{
	enum evhttp_cmd_type c = evhttp_request_get_command(req);

	return c == EVHTTP_REQ_GET || c == EVHTTP_REQ_HEAD;
}

/*
 * Split the path into at most HTTP_SEGMENTS percent-decoded segments.
 * Returns the count, or -1 for a path we will not route (too deep, empty
 * segments inside, NUL bytes).
 */
static int
http_split(const char *path, char **seg)
{
	const char *p = path, *q;
	char *raw, *dec;
	size_t len;
	int n = 0;

	if (path == NULL || *path == '\0')
		return 0;
	if (*p != '/')
		return -1;
	p++;
	while (*p != '\0') {
		q = strchr(p, '/');
		len = q != NULL ? (size_t)(q - p) : strlen(p);
		if (len == 0 && q == NULL)
			break;		/* one trailing slash */
		if (len == 0 || n == HTTP_SEGMENTS)
			goto fail;
		raw = xstrndup(p, len);
		dec = evhttp_uridecode(raw, 0, &len);
		free(raw);
		if (dec == NULL)
			goto fail;
		if (strlen(dec) != len) {
			free(dec);
			goto fail;
		}
		seg[n++] = dec;
		if (q == NULL)
			break;
		p = q + 1;
	}
	return n;
fail:
	while (n > 0)
		free(seg[--n]);
	return -1;
}

/*
 * Bearer token check for the actions. 0 when allowed; otherwise the reply
 * has been sent: 403 when no token is configured (the actions are off),
 * 401 for a missing or wrong one.
 */
static int
http_authorised(struct http *h, struct evhttp_request *req)
{
	const char *token = h->d->conf->http_token, *got;
	struct evkeyvalq *in = evhttp_request_get_input_headers(req);

	if (token == NULL || *token == '\0') {
		http_error(h, req, 403, "actions are disabled: the daemon has "
		    "no http_token configured");
		return -1;
	}
	got = evhttp_find_header(in, "Authorization");
	if (got == NULL || strncasecmp(got, "Bearer ", 7) != 0) {
		h->refused_auth++;
		evhttp_add_header(evhttp_request_get_output_headers(req),
		    "WWW-Authenticate", "Bearer realm=\"stopcock\"");
		http_error(h, req, 401, "this action needs an "
		    "\"Authorization: Bearer <token>\" header");
		return -1;
	}
	got += 7;
	while (*got == ' ')
		got++;
	if (!timingsafe_eq(got, strlen(got), token, strlen(token))) {
		h->refused_auth++;
		evhttp_add_header(evhttp_request_get_output_headers(req),
		    "WWW-Authenticate", "Bearer realm=\"stopcock\", "
		    "error=\"invalid_token\"");
		http_error(h, req, 401, "the bearer token is not valid");
		return -1;
	}
	return 0;
}

/*
 * The request body as JSON (a new reference) when the action takes one.
 * NULL when the reply (413, 415 or 400) has been sent.
 */
static json_t *
http_body_json(struct http *h, struct evhttp_request *req)
{
	struct evbuffer *in = evhttp_request_get_input_buffer(req);
	const char *type;
	size_t len = evbuffer_get_length(in);
	json_error_t err;
	json_t *j;

	if (len > HTTP_BODY_MAX) {
		http_error(h, req, 413, "request body is %zu bytes; the limit "
		    "is %d", len, HTTP_BODY_MAX);
		return NULL;
	}
	type = evhttp_find_header(evhttp_request_get_input_headers(req),
	    "Content-Type");
	if (type == NULL || strncasecmp(type, "application/json", 16) != 0 ||
	    (type[16] != '\0' && type[16] != ';' && type[16] != ' ')) {
		http_error(h, req, 415, "send the body as application/json");
		return NULL;
	}
	j = json_loadb((const char *)evbuffer_pullup(in, -1), len,
	    JSON_REJECT_DUPLICATES, &err);
	if (j == NULL) {
		http_error(h, req, 400, "body is not valid JSON: %s "
		    "(line %d, column %d)", err.text, err.line, err.column);
		return NULL;
	}
	if (!json_is_object(j)) {
		json_decref(j);
		http_error(h, req, 400, "body must be a JSON object");
		return NULL;
	}
	return j;
}

/* ---- GET handlers ---- */

static void
http_page_get(struct http *h, struct evhttp_request *req)
{
	struct evbuffer *b = evbuffer_new();
	struct evkeyvalq *out = evhttp_request_get_output_headers(req);

	if (b == NULL)
		fatalx("http: evbuffer_new failed");
	/* The page may talk to this daemon only: no outside scripts,
	 * styles, fonts or frames. */
	evhttp_add_header(out, "Content-Security-Policy", "default-src 'none'; "
	    "script-src 'unsafe-inline'; style-src 'unsafe-inline'; "
	    "img-src 'self' data:; connect-src 'self'; "
	    "frame-ancestors 'none'; base-uri 'none'; form-action 'none'");
	evhttp_add_header(out, "Referrer-Policy", "no-referrer");
	evbuffer_add_reference(b, http_page, http_page_len, NULL, NULL);
	http_send(h, req, 200, "text/html; charset=utf-8", b);
	evbuffer_free(b);
}

/* Raised alerts, all or those of one experiment. */
static json_t *
http_alerts(struct http *h, const char *experiment)
{
	json_t *all, *list, *out, *a;
	const char *e;
	size_t i;

	if ((all = alert_json(h->d->alert)) == NULL)
		return json_array();
	list = json_is_object(all) ? json_object_get(all, "alerts") : all;
	out = json_array();
	for (i = 0; json_is_array(list) && i < json_array_size(list); i++) {
		a = json_array_get(list, i);
		e = json_string_value(json_object_get(a, "experiment"));
		if (experiment == NULL ||
		    (e != NULL && strcmp(e, experiment) == 0))
			json_array_append(out, a);
	}
	json_decref(all);
	return out;
}

/* Each entry of list gets its guardrail's [guardrail] unit, if any (key:
 * the field naming the guardrail), for the page and stopcock status. */
static void
http_units(struct http *h, json_t *list, const char *key)
{
	const struct conf *c = h->d->conf;
	const char *name;
	json_t *o;
	size_t i;
	int g;

	json_array_foreach(list, i, o) {
		name = json_string_value(json_object_get(o, key));
		for (g = 0; name != NULL && g < c->nguardrails; g++)
			if (strcmp(c->guardrails[g].name, name) == 0 &&
			    c->guardrails[g].unit[0] != '\0')
				json_object_set_new(o, "unit",
				    json_string(c->guardrails[g].unit));
	}
}

static json_t *
http_list(struct http *h)
{
	json_t *j = engines_json_list(h->d), *x;
	size_t i;

	json_array_foreach(json_object_get(j, "experiments"), i, x)
		http_units(h, json_object_get(x, "guardrails"), "name");
	return j;
}

static int
http_known(struct http *h, const char *id)
{
	return proto_name_ok(id, strlen(id));
}

static void
http_experiment_get(struct http *h, struct evhttp_request *req,
    const char *id)
{
	struct engine *e;
	json_t *j;

	if (!http_known(h, id) || (e = engines_find(h->d, id)) == NULL ||
	    (j = engine_json_experiment(e, id)) == NULL) {
		http_error(h, req, 404, "no experiment named \"%.64s\"", id);
		return;
	}
	json_object_set_new(j, "alerts", http_alerts(h, id));
	http_units(h, json_object_get(j, "tests"), "guardrail");
	http_json(h, req, 200, j);
}

static void
http_health_get(struct http *h, struct evhttp_request *req)
{
	struct daemon *d = h->d;
	struct engine_counters c;
	double now = daemon_now();
	json_t *j, *redis;

	engines_counters(d, &c);
	redis = d->redis != NULL ? redis_in_json(d->redis) : NULL;
	j = json_pack("{s:s, s:s, s:f, s:o, s:I, s:o, s:{s:I, s:I, s:I, s:I}}",
	    "status", d->draining ? "draining" : "ok",
	    "version", STOPCOCK_VERSION,
	    "uptime_seconds", now - d->started,
	    "checkpoint_age_seconds", d->last_checkpoint > 0 ?
	    json_real(now - d->last_checkpoint) : json_null(),
	    "checkpoints", (json_int_t)d->checkpoints,
	    "redis", redis != NULL ? redis : json_null(),
	    "engine",
	    "experiments", (json_int_t)c.experiments,
	    "series", (json_int_t)c.series,
	    "tests", (json_int_t)c.tests,
	    "bytes", (json_int_t)c.bytes);
	if (d->kafka != NULL)
		json_object_set_new(j, "kafka", kafka_in_json(d->kafka));
	json_object_set_new(j, "sources", auth_json(d));
	http_json(h, req, 200, j);
}

static void
http_chart_get(struct http *h, struct evhttp_request *req, const char *id,
    const char *file)
{
	struct evbuffer *b;
	json_t *x, *tests;
	uint64_t idx;
	char *svg, *num;
	size_t len = strlen(file);
	struct engine *e;

	if (len < 5 || strcmp(file + len - 4, ".svg") != 0) {
		http_error(h, req, 404, "charts are named N.svg or srm.svg");
		return;
	}
	if (!http_known(h, id) || (e = engines_find(h->d, id)) == NULL ||
	    (x = engine_json_experiment(e, id)) == NULL) {
		http_error(h, req, 404, "no experiment named \"%.64s\"", id);
		return;
	}
	if (strcmp(file, "srm.svg") == 0)
		svg = chart_srm_svg(x);
	else {
		num = xstrndup(file, len - 4);
		tests = json_object_get(x, "tests");
		if (parse_u64(num, UINT32_MAX, &idx) != 0 ||
		    idx >= json_array_size(tests)) {
			free(num);
			json_decref(x);
			http_error(h, req, 404, "experiment \"%s\" has no test "
			    "numbered %.20s", id, file);
			return;
		}
		free(num);
		svg = chart_test_svg(json_array_get(tests, (size_t)idx));
	}
	json_decref(x);
	if ((b = evbuffer_new()) == NULL)
		fatalx("http: evbuffer_new failed");
	evbuffer_add(b, svg, strlen(svg));
	free(svg);
	http_send(h, req, 200, "image/svg+xml; charset=utf-8", b);
	evbuffer_free(b);
}

/* ---- POST actions ---- */

/* {"weights": [{"variant": "control", "weight": 50}, ...]} -> arms: the
 * JSON plan record's own names ("arms" is the older spelling, kept). */
static int
http_plan_arms(const json_t *body, struct proto_arm *arms, int *narms,
    char **cause)
{
	const json_t *list = json_object_get(body, "weights"), *a, *w;
	const char *name;
	size_t i, j;

	if (list == NULL)
		list = json_object_get(body, "arms");
	if (!json_is_array(list) || json_array_size(list) == 0) {
		*cause = xstrdup("\"weights\" must be a non-empty array of "
		    "{\"variant\": NAME, \"weight\": NUMBER}");
		return -1;
	}
	if (json_array_size(list) > PROTO_PLAN_MAX) {
		xasprintf(cause, "a plan has at most %d arms",
		    PROTO_PLAN_MAX);
		return -1;
	}
	for (i = 0; i < json_array_size(list); i++) {
		a = json_array_get(list, i);
		name = json_string_value(json_object_get(a, "variant"));
		w = json_object_get(a, "weight");
		if (name == NULL || !proto_name_ok(name, strlen(name))) {
			xasprintf(cause, "arm %zu: \"variant\" must be a name "
			    "of 1 to %d characters from [A-Za-z0-9._:-]", i + 1,
			    PROTO_NAME_MAX);
			return -1;
		}
		if (!json_is_number(w) || !(json_number_value(w) >= 0) ||
		    json_number_value(w) > PROTO_WEIGHT_MAX) {
			xasprintf(cause, "arm %zu: \"weight\" must be a number "
			    "from 0 to %g", i + 1, PROTO_WEIGHT_MAX);
			return -1;
		}
		for (j = 0; j < i; j++)
			if (strcmp(arms[j].name, name) == 0) {
				xasprintf(cause, "variant \"%s\" appears twice",
				    name);
				return -1;
			}
		snprintf(arms[i].name, sizeof arms[i].name, "%s", name);
		arms[i].weight = json_number_value(w);
	}
	*narms = (int)i;
	return 0;
}

static void
http_action(struct http *h, struct evhttp_request *req, const char *id,
    const char *action)
{
	struct daemon *d = h->d;
	struct proto_arm arms[PROTO_PLAN_MAX];
	const char *g, *v;
	json_t *body = NULL;
	char *cause = NULL;
	char *archive = NULL;
	struct engine *eng;
	int narms, rc, exists;

	if (strcmp(action, "plan") != 0 && strcmp(action, "epoch") != 0 &&
	    strcmp(action, "reset") != 0 && strcmp(action, "ack") != 0 &&
	    strcmp(action, "close") != 0 &&
	    strcmp(action, "retire") != 0) {
		http_error(h, req, 404, "no action \"%.32s\"; actions are "
		    "plan, epoch, reset, ack, close and retire", action);
		return;
	}
	if (evhttp_request_get_command(req) != EVHTTP_REQ_POST) {
		http_not_allowed(h, req, "POST");
		return;
	}
	if (http_authorised(h, req) != 0)
		return;
	if (!redis_lease_may_checkpoint(redis_in_lease(d->redis))) {
		/* A standby's state is replaced when it takes over. */
		http_error(h, req, 503, "this daemon is a standby: another "
		    "daemon holds the Redis lease and the state; send %s to "
		    "it", action);
		return;
	}
	if (!http_known(h, id)) {
		http_error(h, req, 400, "experiment names are 1 to %d "
		    "characters from [A-Za-z0-9._:-]", PROTO_NAME_MAX);
		return;
	}
	/* a new plan goes to the main engine; the rest where it lives */
	exists = (eng = engines_find(d, id)) != NULL;
	if (eng == NULL)
		eng = d->engine;
	if (!exists && strcmp(action, "plan") != 0) {
		http_error(h, req, 404, "no experiment named \"%s\"", id);
		return;
	}

	if (strcmp(action, "retire") == 0) {
		rc = retire_experiment(d, id, "operator", &archive, &cause);
	} else if (strcmp(action, "plan") == 0) {
		if ((body = http_body_json(h, req)) == NULL)
			return;
		rc = http_plan_arms(body, arms, &narms, &cause);
		if (rc == 0)
			rc = engine_plan(eng, id, arms, narms,
			    daemon_now(), &cause);
	} else if (strcmp(action, "epoch") == 0)
		rc = engine_new_epoch(eng, id, daemon_now(), &cause);
	else if (strcmp(action, "reset") == 0) {
		rc = engine_reset(eng, id, daemon_now(), &cause);
		if (rc == 0)
			alert_experiment_reset(d->alert, id);
	} else {
		if ((body = http_body_json(h, req)) == NULL)
			return;
		g = json_string_value(json_object_get(body, "guardrail"));
		v = json_string_value(json_object_get(body, "variant"));
		if (g == NULL || (json_object_get(body, "variant") != NULL &&
		    !json_is_null(json_object_get(body, "variant")) &&
		    v == NULL)) {
			xasprintf(&cause, "%s needs {\"guardrail\": NAME, "
			    "\"variant\": NAME}", action);
			rc = -1;
		} else if (strcmp(action, "ack") == 0)
			rc = alert_ack(d->alert, id, g, v, &cause);
		else
			rc = alert_close(d->alert, id, g, v, &cause);
	}
	if (rc != 0) {
		http_error(h, req, 400, "%s: %s", action,
		    cause != NULL ? cause : "refused");
		free(cause);
		json_decref(body);
		return;
	}
	h->actions++;
	if (strcmp(action, "plan") == 0 || strcmp(action, "epoch") == 0 ||
	    strcmp(action, "reset") == 0)
		engines_touched(d, eng);
	log_info("http: %s experiment=%s", action, id);
	json_decref(body);
	/*
	 * Answered only once it is on disk: the action's findings are handed
	 * on, then a checkpoint is written here, in the loop. That stalls the
	 * loop for one checkpoint per operator action (rare, and a person is
	 * waiting), where a crash would otherwise undo an answered action.
	 */
	if (d->state_dir != NULL) {
		dispatch_drain(d->dispatch);
		if (ckpt_write(d, &cause) != 0) {
			log_warnx("http: %s experiment=%s applied but not on "
			    "disk: %s", action, id, cause);
			http_error(h, req, 500, "%s applied, but the checkpoint "
			    "that keeps it failed: %s (it is written again "
			    "at the next checkpoint)", action, cause);
			free(cause);
			free(archive);
			return;
		}
	}
	body = json_pack("{s:b, s:s, s:s, s:b}", "ok", 1, "experiment", id,
	    "action", action, "durable", d->state_dir != NULL);
	if (archive != NULL)
		json_object_set_new(body, "archive", json_string(archive));
	free(archive);
	http_json(h, req, 200, body);
}

/* ---- /metrics ---- */

/* One family of per-test gauges, gathered in its own buffer so that its
 * HELP and TYPE lines come once, ahead of all its samples. */
enum http_fam {
	FAM_LOG_E, FAM_P, FAM_EST, FAM_LOWER, FAM_UPPER, FAM_VERDICT,
	FAM_ALPHA, FAM_SRM_LOG_E, FAM_SRM_P, FAM_SRM_CHI2_P, FAM_SRM_VERDICT,
	FAM_EPOCH, FAM_UNTRUSTED, FAM_EXPOSURES, FAM_WEIGHT, FAM_N
};

static const struct {
	const char	*name;
	const char	*help;
} http_fams[FAM_N] = {
	{ "stopcock_test_log_e",
	    "Log e-value of the guardrail test (evidence for harm)." },
	{ "stopcock_test_p_value", "Always-valid p-value of the test." },
	{ "stopcock_test_estimate",
	    "Effect estimate, treatment minus control, in metric units." },
	{ "stopcock_test_lower", "Lower confidence-sequence bound." },
	{ "stopcock_test_upper", "Upper confidence-sequence bound." },
	{ "stopcock_test_verdict", "Verdict: 0 undecided, 1 harm, 2 safe." },
	{ "stopcock_test_alpha",
	    "Level of the test: the experiment's alpha over its family." },
	{ "stopcock_srm_log_e", "Log e-value of the sample ratio check." },
	{ "stopcock_srm_p_value",
	    "Always-valid p-value of the sample ratio check." },
	{ "stopcock_srm_chi2_p_value",
	    "One-look chi-square p-value of the sample ratio (reference)." },
	{ "stopcock_srm_verdict",
	    "Sample ratio mismatch: 0 none found, 1 mismatch." },
	{ "stopcock_experiment_epoch", "Current epoch of the experiment." },
	{ "stopcock_experiment_untrusted",
	    "1 when SRM made this epoch's verdicts untrustworthy." },
	{ "stopcock_arm_exposures", "Units exposed to the arm this epoch." },
	{ "stopcock_arm_weight", "Planned weight of the arm." },
};

struct http_scrape {
	struct evbuffer	*fam[FAM_N];
};

static void
http_value(struct evbuffer *b, double v)
{
	if (isnan(v))
		evbuffer_add_printf(b, "} NaN\n");
	else if (isinf(v))
		evbuffer_add_printf(b, "} %sInf\n", v > 0 ? "+" : "-");
	else
		evbuffer_add_printf(b, "} %.17g\n", v);
}

static void
http_sample(struct http_scrape *s, enum http_fam fam,
    const struct finding *f, const char *variant, double v)
{
	struct evbuffer *b = s->fam[fam];

	evbuffer_add_printf(b, "%s{", http_fams[fam].name);
	metrics_label(b, "experiment", f->experiment, 1);
	if (fam <= FAM_ALPHA)
		metrics_label(b, "guardrail", f->guardrail, 0);
	if (variant != NULL)
		metrics_label(b, "variant", variant, 0);
	http_value(b, v);
}

static void
http_scrape_finding(void *arg, const struct finding *f)
{
	struct http_scrape *s = arg;
	int i;

	if (f->kind == FINDING_SRM || f->variant == NULL) {
		http_sample(s, FAM_SRM_LOG_E, f, NULL, f->log_e);
		http_sample(s, FAM_SRM_P, f, NULL, f->p);
		http_sample(s, FAM_SRM_CHI2_P, f, NULL, f->chi2_p);
		http_sample(s, FAM_SRM_VERDICT, f, NULL,
		    f->verdict == VERDICT_HARM);
		http_sample(s, FAM_EPOCH, f, NULL, f->epoch);
		http_sample(s, FAM_UNTRUSTED, f, NULL, f->untrusted);
		for (i = 0; i < f->narms && i < PROTO_PLAN_MAX; i++) {
			http_sample(s, FAM_EXPOSURES, f, f->arms[i].variant,
			    (double)f->arms[i].exposures);
			http_sample(s, FAM_WEIGHT, f, f->arms[i].variant,
			    f->arms[i].weight);
		}
		return;
	}
	http_sample(s, FAM_LOG_E, f, f->variant, f->log_e);
	http_sample(s, FAM_P, f, f->variant, f->p);
	http_sample(s, FAM_EST, f, f->variant, f->estimate);
	http_sample(s, FAM_LOWER, f, f->variant, f->lower);
	http_sample(s, FAM_UPPER, f, f->variant, f->upper);
	http_sample(s, FAM_VERDICT, f, f->variant, f->verdict);
	http_sample(s, FAM_ALPHA, f, f->variant, f->alpha);
}

/* Our own families, then every subsystem's, then the per-test gauges. */
static void
http_metrics(struct http *h, struct evbuffer *b)
{
	struct daemon *d = h->d;
	struct http_scrape s;
	struct engine_counters ec;
	struct engine *e;
	double now = daemon_now();
	size_t i;

	metrics_family(b, "stopcock_build_info", "gauge",
	    "Always 1; the version is a label.");
	evbuffer_add_printf(b, "stopcock_build_info{version=\"%s\"} 1\n",
	    STOPCOCK_VERSION);
	metrics_family(b, "stopcock_uptime_seconds", "gauge",
	    "Seconds since the daemon started.");
	evbuffer_add_printf(b, "stopcock_uptime_seconds %.3f\n",
	    now - d->started);
	metrics_family(b, "stopcock_checkpoints_total", "counter",
	    "Checkpoints written.");
	evbuffer_add_printf(b, "stopcock_checkpoints_total %llu\n",
	    (unsigned long long)d->checkpoints);
	metrics_family(b, "stopcock_checkpoint_age_seconds", "gauge",
	    "Seconds since the last checkpoint (+Inf before the first).");
	if (d->last_checkpoint > 0)
		evbuffer_add_printf(b, "stopcock_checkpoint_age_seconds %.3f\n",
		    now - d->last_checkpoint);
	else
		evbuffer_add_printf(b,
		    "stopcock_checkpoint_age_seconds +Inf\n");
	metrics_family(b, "stopcock_http_responses_total", "counter",
	    "HTTP responses by status code.");
	for (i = 0; i <= HTTP_NCODES; i++) {
		if (i < HTTP_NCODES)
			evbuffer_add_printf(b, "stopcock_http_responses_total"
			    "{code=\"%d\"} %llu\n", http_codes[i],
			    (unsigned long long)h->responses[i]);
		else
			evbuffer_add_printf(b, "stopcock_http_responses_total"
			    "{code=\"other\"} %llu\n",
			    (unsigned long long)h->responses[i]);
	}
	metrics_family(b, "stopcock_http_actions_total", "counter",
	    "Operator actions accepted over HTTP.");
	evbuffer_add_printf(b, "stopcock_http_actions_total %llu\n",
	    (unsigned long long)h->actions);
	metrics_family(b, "stopcock_http_auth_refused_total", "counter",
	    "Actions refused for a missing or wrong bearer token.");
	evbuffer_add_printf(b, "stopcock_http_auth_refused_total %llu\n",
	    (unsigned long long)h->refused_auth);

	engines_counters(d, &ec);
	metrics_family(b, "stopcock_engine_experiments", "gauge",
	    "Experiments tracked (bounded by max_experiments).");
	evbuffer_add_printf(b, "stopcock_engine_experiments %u\n",
	    ec.experiments);
	metrics_family(b, "stopcock_engine_series", "gauge",
	    "Tallies held: experiment x epoch x arm x metric.");
	evbuffer_add_printf(b, "stopcock_engine_series %llu\n",
	    (unsigned long long)ec.series);
	metrics_family(b, "stopcock_engine_tests", "gauge",
	    "Live guardrail x arm tests.");
	evbuffer_add_printf(b, "stopcock_engine_tests %llu\n",
	    (unsigned long long)ec.tests);
	metrics_family(b, "stopcock_engine_memory_bytes", "gauge",
	    "Memory held by tallies and tests.");
	evbuffer_add_printf(b, "stopcock_engine_memory_bytes %zu\n", ec.bytes);
	metrics_family(b, "stopcock_engine_findings_total", "counter",
	    "Verdict changes and other findings the engine reported.");
	evbuffer_add_printf(b, "stopcock_engine_findings_total %llu\n",
	    (unsigned long long)ec.findings);
	metrics_family(b, "stopcock_engine_srm_late_exposures_total",
	    "counter", "Exposures the SRM test did not read: behind its "
	    "watermark, stamped before their epoch, or beyond its ring.");
	evbuffer_add_printf(b, "stopcock_engine_srm_late_exposures_total "
	    "%llu\n", (unsigned long long)ec.srm_late);
	metrics_family(b, "stopcock_engine_metric_late_records_total",
	    "counter", "Metric records older than their metric's event-time "
	    "watermark: applied at once.");
	evbuffer_add_printf(b, "stopcock_engine_metric_late_records_total "
	    "%llu\n", (unsigned long long)ec.metric_late);
	metrics_family(b, "stopcock_engine_held_forced_total", "counter",
	    "Metric records applied before their watermark because an "
	    "experiment held the most it may.");
	evbuffer_add_printf(b, "stopcock_engine_held_forced_total %llu\n",
	    (unsigned long long)ec.held_forced);
	metrics_family(b, "stopcock_engine_held_records", "gauge",
	    "Metric records waiting for their metric's watermark.");
	evbuffer_add_printf(b, "stopcock_engine_held_records %llu\n",
	    (unsigned long long)ec.held);
	metrics_family(b, "stopcock_engine_grouped_series_total", "counter",
	    "Series that began to use unit groups (their records name units).");
	evbuffer_add_printf(b, "stopcock_engine_grouped_series_total %llu\n",
	    (unsigned long long)ec.grouped_series);

	ingest_metrics(d, b);
	auth_metrics(d, b);
	if (d->listen != NULL)
		listen_metrics(d->listen, b);
	if (d->redis != NULL)
		redis_in_metrics(d->redis, b);
	if (d->kafka != NULL)
		kafka_in_metrics(d->kafka, b);
	if (d->webhook != NULL)
		webhook_metrics(d->webhook, b);
	if (d->dispatch != NULL)
		dispatch_metrics(d->dispatch, b);
	if (d->alert != NULL)
		alert_metrics(d->alert, b);
	if (d->pause != NULL)
		pause_metrics(d->pause, b);

	for (i = 0; i < FAM_N; i++)
		if ((s.fam[i] = evbuffer_new()) == NULL)
			fatalx("http: evbuffer_new failed");
	for (i = 0; (e = engines_at(d, i)) != NULL; i++)
		engine_foreach(e, http_scrape_finding, &s);
	for (i = 0; i < FAM_N; i++) {
		metrics_family(b, http_fams[i].name, "gauge", http_fams[i].help);
		evbuffer_add_buffer(b, s.fam[i]);
		evbuffer_free(s.fam[i]);
	}
}

static void
http_request(struct evhttp_request *req, void *arg)
{
	struct http *h = arg;
	const struct evhttp_uri *uri = evhttp_request_get_evhttp_uri(req);
	char *seg[HTTP_SEGMENTS];
	struct evbuffer *b;
	int n, i;

	/* Every view and action sees the alerts of every finding so far. */
	dispatch_drain(h->d->dispatch);
	n = http_split(uri != NULL ? evhttp_uri_get_path(uri) : NULL, seg);
	if (n < 0) {
		http_error(h, req, 404, "no such path");
		return;
	}
	log_debug("http: %s %s", http_method(req),
	    evhttp_request_get_uri(req));

	if (n == 0) {
		if (!http_is_get(req))
			http_not_allowed(h, req, "GET, HEAD");
		else
			http_page_get(h, req);
	} else if (n == 1 && strcmp(seg[0], "metrics") == 0) {
		if (!http_is_get(req))
			http_not_allowed(h, req, "GET, HEAD");
		else {
			if ((b = evbuffer_new()) == NULL)
				fatalx("http: evbuffer_new failed");
			http_metrics(h, b);
			http_send(h, req, 200,
			    "text/plain; version=0.0.4; charset=utf-8", b);
			evbuffer_free(b);
		}
	} else if (n >= 2 && strcmp(seg[0], "api") == 0 && (n == 2 ||
	    strcmp(seg[1], "experiments") == 0)) {
		if (n == 4)
			http_action(h, req, seg[2], seg[3]);
		else if (n > 4)
			http_error(h, req, 404, "no such path");
		else if (strcmp(seg[1], "experiments") != 0 &&
		    strcmp(seg[1], "alerts") != 0 &&
		    strcmp(seg[1], "health") != 0)
			http_error(h, req, 404, "no such API resource; try "
			    "/api/experiments, /api/alerts or /api/health");
		else if (!http_is_get(req))
			http_not_allowed(h, req, "GET, HEAD");
		else if (n == 3)
			http_experiment_get(h, req, seg[2]);
		else if (strcmp(seg[1], "experiments") == 0)
			http_json(h, req, 200, http_list(h));
		else if (strcmp(seg[1], "alerts") == 0)
			http_json(h, req, 200, json_pack("{s:o}", "alerts",
			    http_alerts(h, NULL)));
		else
			http_health_get(h, req);
	} else if (n == 3 && strcmp(seg[0], "chart") == 0) {
		if (!http_is_get(req))
			http_not_allowed(h, req, "GET, HEAD");
		else
			http_chart_get(h, req, seg[1], seg[2]);
	} else
		http_error(h, req, 404, "no such path");

	for (i = 0; i < n; i++)
		free(seg[i]);
}

/* ---- life cycle ---- */

struct http *
http_new(struct daemon *d, char **cause)
{
	struct http *h = xcalloc(1, sizeof *h);
	const char *addr = d->conf->http;
	struct addr a;

	h->d = d;
	if (addr == NULL || *addr == '\0') {
		log_info("http: no address configured; API, page and "
		    "metrics are off");
		return h;
	}
	if (addr_parse(addr, 0, &a, cause) != 0) {
		free(h);
		return NULL;
	}
	if ((h->evh = evhttp_new(d->base)) == NULL)
		fatalx("http: evhttp_new failed");
	evhttp_set_timeout(h->evh, HTTP_TIMEOUT);
	evhttp_set_max_body_size(h->evh, HTTP_BODY_HARD);
	evhttp_set_max_headers_size(h->evh, HTTP_HEADERS_MAX);
	/* Let every common method through so that a wrong one gets our
	 * 405 with an Allow header rather than evhttp's bare 501. */
	evhttp_set_allowed_methods(h->evh, EVHTTP_REQ_GET | EVHTTP_REQ_HEAD |
	    EVHTTP_REQ_POST | EVHTTP_REQ_PUT | EVHTTP_REQ_DELETE |
	    EVHTTP_REQ_OPTIONS | EVHTTP_REQ_PATCH);
	evhttp_set_gencb(h->evh, http_request, h);
	h->sock = evhttp_bind_socket_with_handle(h->evh, a.host, a.port);
	if (h->sock == NULL) {
		xasprintf(cause, "http: cannot listen on %s", addr);
		evhttp_free(h->evh);
		free(h);
		return NULL;
	}
	log_info("http: listening on %s%s", addr,
	    d->conf->http_token != NULL ? "" : " (actions off: no token)");
	return h;
}

void
http_free(struct http *h)
{
	if (h == NULL)
		return;
	if (h->evh != NULL)
		evhttp_free(h->evh);
	free(h);
}
