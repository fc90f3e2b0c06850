/*
 * action.c: operator actions on a running daemon from the command line,
 * so nobody needs curl and a JSON body: `stopcock VERB EXP [ARGS]` POSTs
 * /api/experiments/EXP/VERB with the bearer token and prints what the
 * daemon answered. The verbs: retire (the archive it wrote), ack and
 * close GUARDRAIL VARIANT, epoch, reset and plan ARM=WEIGHT... (the body
 * uses the record protocol's own names: "weights", "variant", "weight"). The daemon's address and token
 * come from --url/--token, else $STOPCOCK_URL/$STOPCOCK_TOKEN, else the
 * [daemon] http and http_token of the configuration file given with -c.
 *
 * ack and close take several --url (the daemons of one Kafka group): each
 * is asked whether it holds the experiment (GET /api/experiments/EXP,
 * the same lookup the action makes), and the action goes to that one
 * only; none, or two (a split), is an error and nothing is sent.
 */
#include <getopt.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <curl/curl.h>
#include <jansson.h>

#include "stopcock/conf.h"
#include "stopcock/proto.h"
#include "stopcock/util.h"
#include "cli.h"

#define ACTION_URL	"http://127.0.0.1:7721"
#define ACTION_BODY_MAX	(1024u * 1024)	/* bytes of an answer we keep */
#define ACTION_TIMEOUT	30L		/* seconds */
#define ACTION_URLS_MAX	64		/* --url given */


/* POST the JSON body to url with the token; 0 with the HTTP status in
 * *code and the answer in *b, or -1 with *cause. */
static int
action_post(const char *url, const char *token, const char *body,
    struct status_body *b, long *code, char **cause)
{
	char err[CURL_ERROR_SIZE] = "", *auth;
	struct curl_slist *hdr = NULL;
	CURLcode rc;
	CURL *c;

	if ((c = curl_easy_init()) == NULL) {
		*cause = xstrdup("cannot start libcurl");
		return -1;
	}
	xasprintf(&auth, "Authorization: Bearer %s", token);
	hdr = curl_slist_append(hdr, auth);
	hdr = curl_slist_append(hdr, "Content-Type: application/json");
	free(auth);
	if (hdr == NULL ||
	    curl_easy_setopt(c, CURLOPT_URL, url) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_PROTOCOLS_STR, "http,https") !=
	    CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_HTTPHEADER, hdr) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_POSTFIELDS, body) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_WRITEFUNCTION, status_body_write) !=
	    CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_WRITEDATA, b) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_ERRORBUFFER, err) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_TIMEOUT, ACTION_TIMEOUT) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_NOSIGNAL, 1L) != CURLE_OK ||
	    curl_easy_setopt(c, CURLOPT_USERAGENT, "stopcock-action") !=
	    CURLE_OK) {
		curl_slist_free_all(hdr);
		curl_easy_cleanup(c);
		xasprintf(cause, "%s: cannot set up the request", url);
		return -1;
	}
	rc = curl_easy_perform(c);
	curl_slist_free_all(hdr);
	if (rc != CURLE_OK) {
		xasprintf(cause, "%s: %s", url, *err != '\0' ? err :
		    curl_easy_strerror(rc));
		curl_easy_cleanup(c);
		return -1;
	}
	curl_easy_getinfo(c, CURLINFO_RESPONSE_CODE, code);
	curl_easy_cleanup(c);
	return 0;
}

/* The verbs, the arguments each takes after the experiment, and what it
 * does: the one table usage, checking and the body come from. */
static const struct action_verb {
	const char	*name;
	const char	*args;		/* NULL: none; "..." : ARM=WEIGHT... */
	int		 nargs;		/* fixed count, -1: one or more */
	const char	*done;		/* printed on success */
} action_verbs[] = {
	{ "retire", NULL, 0, "retired" },
	{ "ack", "GUARDRAIL VARIANT", 2, "acknowledged" },
	{ "close", "GUARDRAIL VARIANT", 2, "closed: the alert is resolved" },
	{ "epoch", NULL, 0, "started a new epoch" },
	{ "reset", NULL, 0, "reset: tallies and evidence forgotten" },
	{ "plan", "ARM=WEIGHT ARM=WEIGHT...", -1, "planned" },
};

static const struct action_verb *
action_find(const char *verb)
{
	size_t i;

	for (i = 0; i < SC_NELEM(action_verbs); i++)
		if (strcmp(action_verbs[i].name, verb) == 0)
			return &action_verbs[i];
	return NULL;
}

/* The request body from the verb's arguments; NULL with *cause. */
static char *
action_body(const struct action_verb *v, int argc, char **argv,
    char **cause)
{
	json_t *o = json_object(), *w;
	char *eq, *body;
	double weight;
	int i;

	if (v->nargs == 2) {	/* ack, close: one alert */
		json_object_set_new(o, "guardrail", json_string(argv[0]));
		json_object_set_new(o, "variant", json_string(argv[1]));
	}
	if (strcmp(v->name, "plan") == 0) {
		w = json_array();
		for (i = 0; i < argc; i++) {
			if ((eq = strchr(argv[i], '=')) == NULL ||
			    eq == argv[i] || parse_double(eq + 1, 0,
			    PROTO_WEIGHT_MAX, &weight) != 0) {
				xasprintf(cause, "\"%s\": an arm is NAME=WEIGHT",
				    argv[i]);
				json_decref(w);
				json_decref(o);
				return NULL;
			}
			json_array_append_new(w, json_pack("{s:s%, s:f}",
			    "variant", argv[i], (size_t)(eq - argv[i]),
			    "weight", weight));
		}
		json_object_set_new(o, "weights", w);
	}
	body = json_dumps(o, JSON_COMPACT);
	json_decref(o);
	return body;
}

static void
action_usage(FILE *fp, const char *verb)
{
	const struct action_verb *v = action_find(verb);

	fprintf(fp, "usage: stopcock %s [-c CONF] [--url URL]%s [--token TOKEN] "
	    "EXPERIMENT%s%s\n", verb, v != NULL && v->nargs == 2 ? "..." : "",
	    v != NULL && v->args ? " " : "", v != NULL && v->args ? v->args :
	    "");
	fputs("  -c CONF        read [daemon] http and http_token from CONF\n"
	    "  --url URL      the daemon's HTTP address (default $STOPCOCK_URL, "
	    "CONF's, or " ACTION_URL ")\n", fp);
	if (v != NULL && v->nargs == 2)
		fputs("                 several: sent to the one that holds "
		    "EXPERIMENT\n", fp);
	fputs(
	    "  --token TOKEN  the bearer token (default $STOPCOCK_TOKEN or "
	    "CONF's)\n", fp);
}

/*
 * Of several daemons, the one that holds the experiment: its index, or
 * -1 with the exit status in *rc (none holds it, two or more do, or none
 * that answered does). One that does not answer is reported; when
 * another holds the experiment the action still goes there.
 */
static int
action_owner(const char *verb, const char *const *bases, int n,
    const char *esc, const char *exp, int *rc)
{
	char *path, *why = NULL, held[1024] = "";
	size_t o = 0;
	json_t *root;
	long code;
	int i, owner = -1, nheld = 0, failed = 0;

	xasprintf(&path, "/api/experiments/%s", esc);
	for (i = 0; i < n; i++) {
		if ((root = status_fetch(bases[i], path, &code, &why)) !=
		    NULL) {
			json_decref(root);
			if (nheld++ == 0)
				owner = i;
			if (o < sizeof held)
				o += (size_t)snprintf(held + o, sizeof held - o,
				    "%s%s", o > 0 ? ", " : "", bases[i]);
			continue;
		}
		if (code != 404) {
			fprintf(stderr, "stopcock %s: %s\n", verb, why);
			failed++;
		}
		free(why);
		why = NULL;
	}
	free(path);
	if (nheld > 1) {
		fprintf(stderr, "stopcock %s: experiment %s is held by %d "
		    "daemons (%s): its records are split between them; "
		    "nothing sent (give one --url to act on one of them)\n",
		    verb, exp, nheld, held);
		*rc = SC_EX_DATAERR;
		return -1;
	}
	if (nheld == 0) {
		if (failed > 0)
			fprintf(stderr, "stopcock %s: none of the daemons that "
			    "answered holds experiment %s (%d did not "
			    "answer); nothing sent\n", verb, exp, failed);
		else
			fprintf(stderr, "stopcock %s: none of the %d daemons "
			    "holds experiment %s; nothing sent\n", verb, n,
			    exp);
		*rc = failed > 0 ? SC_EX_IOERR : SC_EX_NOINPUT;
		return -1;
	}
	return owner;
}

/* One action verb: POST /api/experiments/EXP/<verb>. */
static int
action_run(const char *verb, int argc, char **argv)
{
	static const struct option opts[] = {
		{ "url", required_argument, NULL, 'u' },
		{ "token", required_argument, NULL, 't' },
		{ "help", no_argument, NULL, 'h' },
		{ NULL, 0, NULL, 0 },
	};
	const struct action_verb *v = action_find(verb);
	struct status_body b = { NULL, 0, ACTION_BODY_MAX, 0 };
	struct conf *conf = NULL;
	const char *url = getenv("STOPCOCK_URL");
	const char *token = getenv("STOPCOCK_TOKEN"), *path = NULL, *msg;
	const char *bases[ACTION_URLS_MAX];
	char *full = NULL, *cause = NULL, *base = NULL, *esc, *body = NULL;
	json_t *root;
	long code = 0;
	int c, rc = SC_EX_OK, nbases = 0, owner;
	size_t blen;
	CURL *e;

	optind = 1;
	while ((c = getopt_long(argc, argv, "c:u:t:h", opts, NULL)) != -1) {
		switch (c) {
		case 'c': path = optarg; break;
		case 'u':
			if (nbases == ACTION_URLS_MAX) {
				fprintf(stderr, "stopcock %s: at most %d "
				    "--url\n", verb, ACTION_URLS_MAX);
				return SC_EX_USAGE;
			}
			bases[nbases++] = url = optarg;
			break;
		case 't': token = optarg; break;
		case 'h': action_usage(stdout, verb); return SC_EX_OK;
		default: action_usage(stderr, verb); return SC_EX_USAGE;
		}
	}
	if (v == NULL || argc - optind < 1 || (v->nargs >= 0 &&
	    argc - optind - 1 != v->nargs) || (v->nargs < 0 &&
	    argc - optind < 3)) {
		action_usage(stderr, verb);
		return SC_EX_USAGE;
	}
	if (nbases > 1 && v->nargs != 2) {
		fprintf(stderr, "stopcock %s: one --url only (several are for "
		    "ack and close, sent to the daemon that holds the "
		    "experiment)\n", verb);
		return SC_EX_USAGE;
	}
	if (nbases > 1 && !proto_name_ok(argv[optind], strlen(argv[optind]))) {
		fprintf(stderr, "stopcock %s: experiment names are 1 to %d "
		    "characters from [A-Za-z0-9._:-]\n", verb, PROTO_NAME_MAX);
		return SC_EX_USAGE;
	}
	if ((body = action_body(v, argc - optind - 1, argv + optind + 1,
	    &cause)) == NULL) {
		fprintf(stderr, "stopcock %s: %s\n", verb, cause);
		free(cause);
		return SC_EX_USAGE;
	}
	if (path != NULL) {
		if (conf_load(path, &conf, &cause) != 0) {
			fprintf(stderr, "stopcock %s: %s\n", verb, cause);
			free(cause);
			return SC_EX_CONFIG;
		}
		if ((url == NULL || *url == '\0') && conf->http != NULL)
			xasprintf(&base, "http://%s", conf->http);
		if ((token == NULL || *token == '\0') && conf->http_token)
			token = conf->http_token;
	}
	if (base == NULL)
		base = xstrdup(url != NULL && *url != '\0' ? url : ACTION_URL);
	if (token == NULL || *token == '\0') {
		fprintf(stderr, "stopcock %s: no token: give --token, set "
		    "STOPCOCK_TOKEN or -c the daemon's configuration\n", verb);
		rc = SC_EX_USAGE;
		goto out;
	}
	if (curl_global_init(CURL_GLOBAL_DEFAULT) != CURLE_OK) {
		fprintf(stderr, "stopcock %s: cannot start libcurl\n", verb);
		rc = SC_EX_SOFTWARE;
		goto out;
	}
	if ((e = curl_easy_init()) == NULL ||
	    (esc = curl_easy_escape(e, argv[optind], 0)) == NULL)
		fatal("%s: cannot escape the experiment name", verb);
	if (nbases > 1) {
		if ((owner = action_owner(verb, bases, nbases, esc,
		    argv[optind], &rc)) == -1) {
			curl_free(esc);
			curl_easy_cleanup(e);
			goto done;
		}
		free(base);
		base = xstrdup(bases[owner]);
	}
	blen = strlen(base);
	while (blen > 0 && base[blen - 1] == '/')
		blen--;
	xasprintf(&full, "%.*s/api/experiments/%s/%s", (int)blen, base, esc,
	    verb);
	curl_free(esc);
	curl_easy_cleanup(e);
	if (action_post(full, token, body, &b, &code, &cause) != 0) {
		fprintf(stderr, "stopcock %s: %s\n", verb, cause);
		free(cause);
		rc = SC_EX_IOERR;
		goto done;
	}
	root = b.p != NULL ? json_loadb(b.p, b.len, 0, NULL) : NULL;
	if (code != 200) {
		msg = json_string_value(json_object_get(root, "error"));
		fprintf(stderr, "stopcock %s: %s: HTTP %ld%s%s\n", verb, full,
		    code, msg != NULL ? ": " : "", msg != NULL ? msg : "");
		rc = code == 404 ? SC_EX_NOINPUT : code == 401 || code == 403 ?
		    SC_EX_CONFIG : SC_EX_IOERR;
	} else {
		msg = json_string_value(json_object_get(root, "archive"));
		printf("%s %s%s%s%s%s\n", argv[optind], v->done, msg != NULL ?
		    "; archive " : "", msg != NULL ? msg : "", nbases > 1 ?
		    " at " : "", nbases > 1 ? base : "");
	}
	json_decref(root);
done:
	curl_global_cleanup();
out:
	free(body);
	free(full);
	free(base);
	free(b.p);
	conf_free(conf);
	return rc;
}

int
cmd_retire(int argc, char **argv)
{
	return action_run("retire", argc, argv);
}

int
cmd_ack(int argc, char **argv)
{
	return action_run("ack", argc, argv);
}

int
cmd_close(int argc, char **argv)
{
	return action_run("close", argc, argv);
}

int
cmd_epoch(int argc, char **argv)
{
	return action_run("epoch", argc, argv);
}

int
cmd_reset(int argc, char **argv)
{
	return action_run("reset", argc, argv);
}

int
cmd_plan(int argc, char **argv)
{
	return action_run("plan", argc, argv);
}
