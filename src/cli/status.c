/*
 * status.c: `stopcock status [--url URL]... [--json] [EXP]`, a terminal
 * view of running daemons. It reads each daemon's JSON API (the same one
 * the page uses) with blocking libcurl requests and prints a compact
 * table: every experiment with its guardrail verdicts, or, given EXP,
 * each test with its estimate, bounds and p-value. Colour only on a
 * terminal, and always with the verdict in words; --json passes one
 * daemon's answer through untouched.
 *
 * Several --url (the daemons of one Kafka group, say) are merged: each
 * daemon's line says what it owns (its partitions, from /api/health),
 * each experiment names its daemon, and an experiment that two daemons
 * both hold is called out on stderr (its records are split between
 * them, so each tests part of the data). A daemon that does not answer
 * is reported and the others are still shown (exit status 74).
 */
#include <ctype.h>
#include <getopt.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>
#include <unistd.h>

#include <curl/curl.h>
#include <jansson.h>

#include "stopcock/proto.h"
#include "stopcock/util.h"
#include "cli.h"

#define STATUS_URL	"http://127.0.0.1:7721"
#define STATUS_BODY_MAX	(64u * 1024 * 1024)	/* bytes we accept */
#define STATUS_TIMEOUT	10L			/* seconds */
#define STATUS_URLS_MAX	64			/* --url given */


struct status_style {
	const char	*harm, *safe, *warn, *dim, *bold, *off;
};

static const struct status_style status_plain = { "", "", "", "", "", "" };
static const struct status_style status_ansi = { "\033[1;31m", "\033[32m",
    "\033[1;33m", "\033[2m", "\033[1m", "\033[0m" };

/* libcurl's write callback: append to a status_body up to its max. */
size_t
status_body_write(char *data, size_t size, size_t n, void *arg)
{
	struct status_body *b = arg;
	size_t len = size * n;

	if (b->len + len > b->max) {
		b->overflow = 1;
		return 0;
	}
	b->p = xreallocarray(b->p, b->len + len + 1, 1);
	memcpy(b->p + b->len, data, len);
	b->len += len;
	b->p[b->len] = '\0';
	return len;
}

/* GET url into *body. 0 with the HTTP status in *code, or -1 with the
 * reason in *cause. */
static int
status_get(const char *url, struct status_body *body, long *code,
    char **cause)
{
	char err[CURL_ERROR_SIZE] = "";
	CURLcode rc;
	CURL *c;

	if ((c = curl_easy_init()) == NULL) {
		*cause = xstrdup("cannot start libcurl");
		return -1;
	}
	if (curl_easy_setopt(c, CURLOPT_URL, url) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_PROTOCOLS_STR, "http,https") !=
	    CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_WRITEFUNCTION, status_body_write) !=
	    CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_WRITEDATA, body) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_ERRORBUFFER, err) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_TIMEOUT, STATUS_TIMEOUT) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_NOSIGNAL, 1L) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_USERAGENT, "stopcock-status") !=
	    CURLE_OK) {
		curl_easy_cleanup(c);
		xasprintf(cause, "%s: cannot set up the request", url);
		return -1;
	}
	rc = curl_easy_perform(c);
	if (rc != CURLE_OK) {
		if (body->overflow)
			xasprintf(cause, "%s: answer larger than %u bytes", url,
			    STATUS_BODY_MAX);
		else
			xasprintf(cause, "%s: %s", url, *err != '\0' ? err :
			    curl_easy_strerror(rc));
		curl_easy_cleanup(c);
		return -1;
	}
	curl_easy_getinfo(c, CURLINFO_RESPONSE_CODE, code);
	curl_easy_cleanup(c);
	return 0;
}

static double
status_num(const json_t *o, const char *key)
{
	const json_t *j = json_object_get(o, key);

	return json_is_number(j) ? json_number_value(j) : NAN;
}

static const char *
status_str(const json_t *o, const char *key)
{
	const char *s = json_string_value(json_object_get(o, key));

	return s != NULL ? s : "?";
}

/* Names come from the network: print them without terminal controls. */
static void
status_name(const char *s, int width)
{
	int n = 0;

	for (; *s != '\0'; s++, n++)
		putchar(isprint((unsigned char)*s) ? *s : '?');
	for (; n < width; n++)
		putchar(' ');
}

static const char *
status_verdict_colour(const struct status_style *st, const char *v)
{
	if (strcmp(v, "harm") == 0)
		return st->harm;
	if (strcmp(v, "safe") == 0)
		return st->safe;
	return st->dim;
}

static void
status_p(char *buf, size_t size, double p)
{
	if (!isfinite(p))
		snprintf(buf, size, "n/a");
	else if (p < 1e-4)
		snprintf(buf, size, "<0.0001");
	else
		snprintf(buf, size, "%.4f", p);
}

static void
status_time(char *buf, size_t size, double t)
{
	struct tm tm;
	time_t tt;

	if (!isfinite(t) || t <= 0) {
		snprintf(buf, size, "-");
		return;
	}
	tt = (time_t)t;
	if (gmtime_r(&tt, &tm) == NULL)
		snprintf(buf, size, "?");
	else
		strftime(buf, size, "%Y-%m-%d %H:%M UTC", &tm);
}

/* "+1.2 [+0.3, +2.1]" from three fields, n/a for missing numbers. */
static void
status_interval(char *buf, size_t size, const json_t *t, const char *k0,
    const char *k1, const char *k2, double scale, const char *unit)
{
	const char *keys[3] = { k0, k1, k2 };
	char part[3][40];
	double v;
	int i;

	for (i = 0; i < 3; i++) {
		v = status_num(t, keys[i]) * scale;
		if (isfinite(v))
			snprintf(part[i], sizeof part[i], "%+.4g%s", v, unit);
		else
			snprintf(part[i], sizeof part[i], "n/a");
	}
	snprintf(buf, size, "%s [%s, %s]", part[0], part[1], part[2]);
}

/* A test's [guardrail] unit ("" when none); a name, so printable. */
static const char *
status_unit(const json_t *t)
{
	const char *u = json_string_value(json_object_get(t, "unit"));

	return u != NULL && proto_name_ok(u, strlen(u)) ? u : "";
}

/* The bound that rules harm out: "<=+1.2ms" (harm = increase). */
static void
status_bound(char *buf, size_t size, const json_t *t)
{
	int decrease = strcmp(status_str(t, "harm"), "decrease") == 0;
	double b = status_num(t, decrease ? "lower" : "upper");

	if (isfinite(b))
		snprintf(buf, size, "%s%+.3g%s", decrease ? ">=" : "<=", b,
		    status_unit(t));
	else
		snprintf(buf, size, "n/a");
}

static void
status_list(const json_t *root, const struct status_style *st)
{
	const json_t *xs = json_object_get(root, "experiments"), *x, *g, *a;
	const char *v;
	char p[32], name[160];
	size_t i, j;

	if (json_array_size(xs) == 0) {
		printf("no experiments yet\n");
		return;
	}
	for (i = 0; i < json_array_size(xs); i++) {
		x = json_array_get(xs, i);
		printf("%s", st->bold);
		status_name(status_str(x, "id"), 0);
		printf("%s", st->off);
		if (json_is_string(json_object_get(x, "daemon"))) {
			printf("  %s@", st->dim);
			status_name(status_str(x, "daemon"), 0);
			printf("%s", st->off);
		}
		printf("  epoch %.0f ", status_num(x, "epoch"));
		for (j = 0; j < json_array_size(json_object_get(x, "arms"));
		    j++) {
			a = json_array_get(json_object_get(x, "arms"), j);
			printf(" ");
			status_name(status_str(a, "variant"), 0);
			printf("=%.0f", status_num(a, "exposures"));
		}
		if (json_is_true(json_object_get(x, "untrusted")) ||
		    strcmp(status_str(json_object_get(x, "srm"), "verdict"),
		    "harm") == 0)
			printf("  %sSRM: sample ratio mismatch, verdicts "
			    "untrustworthy%s\n", st->warn, st->off);
		else
			printf("  SRM: none found\n");
		g = json_object_get(x, "guardrails");
		for (j = 0; j < json_array_size(g); j++) {
			const json_t *e = json_array_get(g, j);

			v = status_str(e, "verdict");
			status_p(p, sizeof p, status_num(e, "p"));
			snprintf(name, sizeof name, "%s / %s",
			    status_str(e, "name"), status_str(e, "variant"));
			printf("  %s%-10s%s ", status_verdict_colour(st, v), v,
			    st->off);
			status_name(name, 32);
			/* A safe verdict's p measures the evidence against
			 * harm: a small one reads as harm. Say what it is. */
			if (strcmp(v, "safe") == 0)
				printf(" harm ruled out%s\n",
				    json_is_true(json_object_get(e,
				    "untrusted")) ? " (untrusted: SRM)" : "");
			else
				printf(" p=%s\n", p);
		}
		if (json_array_size(g) == 0)
			printf("  %s(no guardrail data yet)%s\n", st->dim,
			    st->off);
	}
}

/*
 * Under a test's line: what a safe verdict covers (it is no promise
 * about the future), a harm found by the change detector with the
 * estimated start of the change, and the effect over the last hour.
 */
static void
status_test_notes(const struct status_style *st, const json_t *t)
{
	const json_t *cov = json_object_get(t, "covers");
	const json_t *det = json_object_get(t, "detector");
	const json_t *hour = json_array_get(json_object_get(t, "recent"), 0);
	char a[64], b[64];

	if (strcmp(status_str(t, "verdict"), "safe") == 0 && cov != NULL) {
		status_time(a, sizeof a, status_num(cov, "from"));
		status_time(b, sizeof b, status_num(cov, "to"));
		printf("%s           safe on the records from %s to %s; still "
		    "watched%s\n", st->dim, a, b, st->off);
	}
	if (strcmp(status_str(t, "raised_by"), "change_detector") == 0 &&
	    det != NULL) {
		status_time(a, sizeof a, status_num(det, "change_start"));
		printf("%s           found by the change detector; the change "
		    "began about %s%s\n", st->warn, a, st->off);
	}
	if (hour == NULL || !isfinite(status_num(hour, "estimate")))
		return;
	/* a quantile's window: the shares beyond one threshold compared */
	if (strcmp(status_str(t, "recent_measure"), "share_beyond") == 0)
		printf("%s           last hour: %+.3g pts beyond %.4g%s\n",
		    st->dim, 100 * status_num(hour, "estimate"),
		    status_num(t, "recent_threshold"), st->off);
	else
		printf("%s           last hour: %+.4g%s\n", st->dim,
		    status_num(hour, "estimate"), st->off);
}

static void
status_experiment(const json_t *x, const struct status_style *st)
{
	const json_t *tests = json_object_get(x, "tests"), *t, *srm;
	char p[32], since[40], est[160], rel[160];
	const char *v;
	size_t i;

	srm = json_object_get(x, "srm");
	printf("%s", st->bold);
	status_name(status_str(x, "id"), 0);
	printf("%s  epoch %.0f  alpha %g over %.0f tests  srm_alpha %g\n",
	    st->off, status_num(x, "epoch"), status_num(x, "alpha"),
	    status_num(x, "family"), status_num(x, "srm_alpha"));
	status_p(p, sizeof p, status_num(srm, "p"));
	if (strcmp(status_str(srm, "verdict"), "harm") == 0) {
		status_time(since, sizeof since, status_num(srm, "first_ts"));
		printf("%sUNTRUSTWORTHY: sample ratio mismatch since %s "
		    "(p=%s)%s\n", st->warn, since, p, st->off);
	} else
		printf("sample ratio: no mismatch found (p=%s)\n", p);
	printf("\n%-10s %-28s %-34s %-26s %-8s %s\n", "VERDICT",
	    "GUARDRAIL / VARIANT", "EFFECT [BOUNDS]", "RELATIVE", "P|BOUND",
	    "SINCE");
	for (i = 0; i < json_array_size(tests); i++) {
		char name[160];

		t = json_array_get(tests, i);
		v = status_str(t, "verdict");
		snprintf(name, sizeof name, "%s / %s",
		    status_str(t, "guardrail"), status_str(t, "variant"));
		status_interval(est, sizeof est, t, "estimate", "lower",
		    "upper", 1, status_unit(t));
		status_interval(rel, sizeof rel, t, "rel_estimate",
		    "rel_lower", "rel_upper", 100, "%");
		status_p(p, sizeof p, status_num(t, "p"));
		if (strcmp(v, "safe") == 0)
			status_bound(p, sizeof p, t);
		if (strcmp(v, "undecided") != 0)
			status_time(since, sizeof since,
			    status_num(t, "first_ts"));
		else
			snprintf(since, sizeof since, "-");
		printf("%s%-10s%s ", status_verdict_colour(st, v), v, st->off);
		status_name(name, 28);
		printf(" %-34s %-26s %-8s %s\n", est, rel, p, since);
		status_test_notes(st, t);
	}
	if (json_array_size(tests) == 0)
		printf("%s(no guardrail data in this epoch yet)%s\n", st->dim,
		    st->off);
}

static void
status_usage(FILE *fp)
{
	fprintf(fp, "usage: stopcock status [--url URL]... [--json] "
	    "[EXPERIMENT]\n"
	    "  --url URL  the daemon's HTTP address (default $STOPCOCK_URL "
	    "or " STATUS_URL ");\n"
	    "             several: their answers merged\n"
	    "  --json     print the API's JSON as it comes (several daemons: "
	    "merged)\n");
}

/* base (its trailing slashes dropped) + path; the caller frees. */
static char *
status_url(const char *base, const char *path)
{
	size_t blen = strlen(base);
	char *url;

	while (blen > 0 && base[blen - 1] == '/')
		blen--;
	xasprintf(&url, "%.*s%s", (int)blen, base, path);
	return url;
}

/* GET base+path as JSON: the answer (200) or NULL with *code (0: no
 * answer, 404: none there) and *cause. */
json_t *
status_fetch(const char *base, const char *path, long *code, char **cause)
{
	struct status_body body = { NULL, 0, STATUS_BODY_MAX, 0 };
	json_error_t jerr;
	json_t *root = NULL;
	char *url = status_url(base, path);

	*code = 0;
	if (status_get(url, &body, code, cause) != 0)
		*code = 0;
	else if (*code != 200)
		xasprintf(cause, "%s: HTTP %ld", url, *code);
	else if (body.p == NULL ||
	    (root = json_loadb(body.p, body.len, 0, &jerr)) == NULL) {
		xasprintf(cause, "%s: answer is not JSON", url);
		*code = 0;
	}
	free(body.p);
	free(url);
	return root;
}

/* "partitions 0 3 7 of rec" from a daemon's /api/health. */
static void
status_owned(const json_t *health, char *buf, size_t size)
{
	const json_t *k = json_object_get(health, "kafka"), *p;
	size_t i, o;

	if (k == NULL) {
		snprintf(buf, size, "no kafka input");
		return;
	}
	o = (size_t)snprintf(buf, size, "partitions");
	json_array_foreach(json_object_get(k, "partitions"), i, p)
		if (o < size)
			o += (size_t)snprintf(buf + o, size - o, " %.0f%s",
			    status_num(p, "partition"),
			    strcmp(status_str(p, "state"), "running") == 0 ?
			    "" : "(not running)");
	if (i == 0 && o < size)
		snprintf(buf + o, size - o, " none");
}

/* Several daemons, no experiment named: one merged list. */
static int
status_many_list(const char *const *bases, int n, int raw,
    const struct status_style *st)
{
	json_t *all = json_array(), *daemons = json_array(), *where, *root;
	json_t *health, *x, *dj, *urls, *split = json_array();
	const char *id, *c;
	char *cause = NULL, owned[512];
	long code;
	size_t i;
	int d, rc = SC_EX_OK;

	where = json_object();
	for (d = 0; d < n; d++) {
		if ((root = status_fetch(bases[d], "/api/experiments", &code,
		    &cause)) == NULL) {
			fprintf(stderr, "stopcock status: %s\n", cause);
			json_array_append_new(daemons, json_pack("{s:s, s:s}",
			    "url", bases[d], "error", cause));
			free(cause);
			cause = NULL;
			rc = SC_EX_IOERR;
			continue;
		}
		health = status_fetch(bases[d], "/api/health", &code, &cause);
		free(cause);
		cause = NULL;
		dj = json_pack("{s:s, s:I}", "url", bases[d], "experiments",
		    (json_int_t)json_array_size(json_object_get(root,
		    "experiments")));
		if (health != NULL && json_object_get(health, "kafka") != NULL)
			json_object_set(dj, "kafka", json_object_get(health,
			    "kafka"));
		json_array_append_new(daemons, dj);
		if (!raw) {
			status_owned(health, owned, sizeof owned);
			printf("%sdaemon ", st->dim);
			status_name(bases[d], 0);
			printf(": %zu experiments, %s%s\n",
			    json_array_size(json_object_get(root,
			    "experiments")), owned, st->off);
		}
		json_decref(health);
		json_array_foreach(json_object_get(root, "experiments"), i,
		    x) {
			json_object_set_new(x, "daemon",
			    json_string(bases[d]));
			json_array_append(all, x);
			id = status_str(x, "id");
			if ((urls = json_object_get(where, id)) == NULL) {
				urls = json_array();
				json_object_set_new(where, id, urls);
			}
			json_array_append_new(urls, json_string(bases[d]));
		}
		json_decref(root);
	}
	json_object_foreach(where, id, urls) {
		if (json_array_size(urls) < 2)
			continue;
		json_array_append_new(split, json_string(id));
		fprintf(stderr, "stopcock status: experiment ");
		for (c = id; *c != '\0'; c++)	/* id drives the loop */
			fputc(isprint((unsigned char)*c) ? *c : '?', stderr);
		fprintf(stderr, " is held by %zu daemons: its records are "
		    "split between them, each tests only a part\n",
		    json_array_size(urls));
	}
	root = json_pack("{s:o, s:o, s:o}", "daemons", daemons,
	    "experiments", all, "split", split);
	if (raw) {
		char *text = json_dumps(root, JSON_COMPACT);

		if (text == NULL)
			fatal("status: cannot serialise the merged answer");
		printf("%s\n", text);
		free(text);
	} else
		status_list(root, st);
	json_decref(root);
	json_decref(where);
	return rc;
}

/* Several daemons, one experiment: shown from whichever holds it. */
static int
status_many_experiment(const char *const *bases, int n, const char *path,
    const char *exp, int raw, const struct status_style *st)
{
	json_t *root;
	char *cause = NULL, *text;
	long code;
	int d, found = 0, failed = 0;

	for (d = 0; d < n; d++) {
		if ((root = status_fetch(bases[d], path, &code,
		    &cause)) == NULL) {
			if (code != 404) {
				fprintf(stderr, "stopcock status: %s\n",
				    cause);
				failed++;
			}
			free(cause);
			cause = NULL;
			continue;
		}
		found++;
		if (raw) {
			json_object_set_new(root, "daemon",
			    json_string(bases[d]));
			if ((text = json_dumps(root, JSON_COMPACT)) == NULL)
				fatal("status: cannot serialise an answer");
			printf("%s\n", text);
			free(text);
		} else {
			printf("%sat ", st->dim);
			status_name(bases[d], 0);
			printf("%s\n", st->off);
			status_experiment(root, st);
		}
		json_decref(root);
	}
	if (found > 1)
		fprintf(stderr, "stopcock status: %d daemons hold the "
		    "experiment: its records are split between them, each "
		    "tests only a part\n", found);
	if (found == 0 && failed == 0) {
		fprintf(stderr, "stopcock status: none of the %d daemons holds "
		    "an experiment named ", n);
		for (; *exp != '\0'; exp++)
			fputc(isprint((unsigned char)*exp) ? *exp : '?',
			    stderr);
		fputc('\n', stderr);
		return SC_EX_NOINPUT;
	}
	return failed > 0 ? SC_EX_IOERR : SC_EX_OK;
}

int
cmd_status(int argc, char **argv)
{
	static const struct option opts[] = {
		{ "url", required_argument, NULL, 'u' },
		{ "json", no_argument, NULL, 'j' },
		{ "help", no_argument, NULL, 'h' },
		{ NULL, 0, NULL, 0 },
	};
	const struct status_style *st = &status_plain;
	struct status_body body = { NULL, 0, STATUS_BODY_MAX, 0 };
	const char *base = getenv("STOPCOCK_URL"), *exp = NULL, *msg;
	const char *bases[STATUS_URLS_MAX];
	char *url, *cause = NULL, *esc, *path;
	json_error_t jerr;
	json_t *root;
	long code = 0;
	int c, raw = 0, rc = SC_EX_OK, nbases = 0;
	size_t blen;

	if (base == NULL || *base == '\0')
		base = STATUS_URL;
	optind = 1;
	while ((c = getopt_long(argc, argv, "u:jh", opts, NULL)) != -1) {
		switch (c) {
		case 'u':
			if (nbases == STATUS_URLS_MAX) {
				fprintf(stderr, "stopcock status: at most %d "
				    "--url\n", STATUS_URLS_MAX);
				return SC_EX_USAGE;
			}
			bases[nbases++] = base = optarg;
			break;
		case 'j': raw = 1; break;
		case 'h': status_usage(stdout); return SC_EX_OK;
		default: status_usage(stderr); return SC_EX_USAGE;
		}
	}
	if (argc - optind > 1) {
		status_usage(stderr);
		return SC_EX_USAGE;
	}
	if (argc - optind == 1)
		exp = argv[optind];
	if (isatty(STDOUT_FILENO) && getenv("NO_COLOR") == NULL)
		st = &status_ansi;

	if (curl_global_init(CURL_GLOBAL_DEFAULT) != CURLE_OK) {
		fprintf(stderr, "stopcock status: cannot start libcurl\n");
		return SC_EX_SOFTWARE;
	}
	if (nbases > 1) {
		if (exp == NULL)
			rc = status_many_list(bases, nbases, raw, st);
		else {
			CURL *e = curl_easy_init();

			if (e == NULL ||
			    (esc = curl_easy_escape(e, exp, 0)) == NULL)
				fatal("status: cannot escape the experiment "
				    "name");
			xasprintf(&path, "/api/experiments/%s", esc);
			curl_free(esc);
			curl_easy_cleanup(e);
			rc = status_many_experiment(bases, nbases, path, exp,
			    raw, st);
			free(path);
		}
		curl_global_cleanup();
		return rc;
	}
	blen = strlen(base);
	while (blen > 0 && base[blen - 1] == '/')
		blen--;
	if (exp != NULL) {
		CURL *e = curl_easy_init();

		if (e == NULL || (esc = curl_easy_escape(e, exp, 0)) == NULL)
			fatal("status: cannot escape the experiment name");
		xasprintf(&url, "%.*s/api/experiments/%s", (int)blen, base,
		    esc);
		curl_free(esc);
		curl_easy_cleanup(e);
	} else
		xasprintf(&url, "%.*s/api/experiments", (int)blen, base);

	if (status_get(url, &body, &code, &cause) != 0) {
		fprintf(stderr, "stopcock status: %s\n", cause);
		free(cause);
		rc = SC_EX_IOERR;
		goto out;
	}
	root = body.p != NULL ? json_loadb(body.p, body.len, 0, &jerr) : NULL;
	if (code != 200) {
		msg = json_string_value(json_object_get(root, "error"));
		fprintf(stderr, "stopcock status: %s: HTTP %ld%s%s\n", url,
		    code, msg != NULL ? ": " : "", msg != NULL ? msg : "");
		rc = code == 404 ? SC_EX_NOINPUT : SC_EX_IOERR;
	} else if (raw)
		fwrite(body.p, 1, body.len, stdout);
	else if (root == NULL) {
		fprintf(stderr, "stopcock status: %s: answer is not JSON\n",
		    url);
		rc = SC_EX_DATAERR;
	} else if (exp != NULL)
		status_experiment(root, st);
	else
		status_list(root, st);
	json_decref(root);
out:
	free(body.p);
	free(url);
	curl_global_cleanup();
	return rc;
}
