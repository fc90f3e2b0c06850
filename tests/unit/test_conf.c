/*
 * test_conf.c: the configuration parser. The shipped example must load;
 * an empty file must give conf_new's defaults, which must be the values
 * the documentation promises; a table of broken files must each yield
 * the right "name:line: message"; several errors are all reported; any
 * error yields no configuration; margins, plans, secrets, long lines,
 * conf_dup and conf_guardrail_for each get their own cases.
 */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include <cmocka.h>

#include "stopcock/conf.h"
#include "stopcock/util.h"

/* 1 when some line of text starts with want. */
static int
has_line(const char *text, const char *want)
{
	const char *s = text;
	size_t n = strlen(want);

	while (s != NULL && *s != '\0') {
		if (strncmp(s, want, n) == 0)
			return 1;
		if ((s = strchr(s, '\n')) != NULL)
			s++;
	}
	return 0;
}

static int
count_lines(const char *text)
{
	int n = 1;

	for (; *text != '\0'; text++)
		n += *text == '\n';
	return n;
}

/* Parse text that must be good. */
static struct conf *
good(const char *text)
{
	struct conf *c = NULL;
	char *cause = NULL;

	if (conf_parse(text, "t.conf", &c, &cause) != 0) {
		print_error("unexpected error: %s\n", cause);
		free(cause);
		fail();
	}
	assert_non_null(c);
	return c;
}

/* Parse text that must fail; returns the cause (caller frees). */
static char *
bad(const char *text)
{
	struct conf *c = (struct conf *)&c;	/* must be reset to NULL */
	char *cause = NULL;

	assert_int_equal(conf_parse(text, "t.conf", &c, &cause), -1);
	assert_null(c);
	assert_non_null(cause);
	assert_true(cause[strlen(cause) - 1] != '\n');
	return cause;
}

static void
test_example_file(void **state)
{
	const struct conf_guardrail *g;
	const struct conf_experiment *e;
	struct conf *c = NULL;
	char *cause = NULL;

	if (conf_load("conf/stopcock.conf", &c, &cause) != 0) {
		print_error("%s\n", cause);
		fail();
	}
	assert_string_equal(c->path, "conf/stopcock.conf");
	assert_int_equal(c->nguardrails, 6);
	g = &c->guardrails[0];
	assert_string_equal(g->name, "checkout_p99");
	assert_string_equal(g->metric, "latency_ms");
	assert_int_equal(g->test, TEST_QUANTILE);
	assert_true(g->quantile == 0.99);
	assert_int_equal(g->harm, HARM_INCREASE);
	assert_true(g->margin == 0.05);
	assert_int_equal(g->margin_relative, 1);
	assert_int_equal(g->action, ACTION_ALERT);
	g = &c->guardrails[2];
	assert_string_equal(g->name, "api_errors");
	assert_int_equal(g->test, TEST_PROPORTION);
	assert_int_equal(g->action, ACTION_PAUSE);
	g = &c->guardrails[3];
	assert_int_equal(g->test, TEST_RATE);
	assert_string_equal(g->metric, "crashes");
	g = &c->guardrails[5];
	assert_int_equal(g->harm, HARM_DECREASE);
	assert_true(g->plan_units == 50000);

	assert_int_equal(c->nexperiments, 2);
	e = conf_experiment_find(c, "courier_eta");
	assert_non_null(e);
	assert_int_equal(e->narms, 3);
	assert_string_equal(e->arms[0].name, "control");
	assert_string_equal(e->arms[2].name, "batched");
	assert_null(conf_experiment_find(c, "nope"));

	assert_string_equal(c->tcp, "127.0.0.1:7720");
	assert_string_equal(c->udp, "127.0.0.1:7720");
	assert_string_equal(c->unix_path, "/run/stopcock/events.sock");
	assert_string_equal(c->http, "127.0.0.1:7721");
	assert_string_equal(c->redis_address, "127.0.0.1:6379");
	assert_null(c->http_token);
	assert_null(c->pause_url);
	assert_true(c->remind_every == 4 * 3600);
	assert_true(c->pause_alpha == 0.005);
	assert_int_equal(c->pause_dry_run, 1);
	assert_int_equal(c->nwebhooks, 2);
	assert_string_equal(c->webhooks[0].secret,
	    "whsec_c3RvcGNvY2stZXhhbXBsZS1zZWNyZXQtMDAx");
	assert_null(c->webhooks[1].secret);
	assert_true(c->webhooks[1].timeout == 5);
	conf_free(c);
}

/* The documented defaults (conf.h, conf/stopcock.conf, conf_help). */
static void
check_defaults(const struct conf *c)
{
	assert_true(c->alpha == 0.05);
	assert_true(c->srm_alpha == 0.001);
	assert_true(c->plan_units == 10000);
	assert_true(c->rate_concentration == 0);
	assert_true(c->sketch_accuracy == 0.01);
	assert_int_equal(c->sketch_buckets, 512);
	assert_int_equal(c->history_points, 120);
	assert_int_equal(c->tick_budget, 500);
	assert_int_equal(c->max_experiments, 10000);
	assert_int_equal(c->max_variants, 8);
	assert_int_equal(c->max_metrics, 16);
	assert_int_equal(c->nguardrails, 0);
	assert_int_equal(c->nexperiments, 0);
	assert_null(c->tcp);
	assert_null(c->udp);
	assert_null(c->unix_path);
	assert_null(c->http);
	assert_string_equal(c->state_dir, "/var/lib/stopcock");
	assert_true(c->tick == 1);
	assert_true(c->checkpoint_every == 5);
	assert_int_equal(c->max_clients, 256);
	assert_int_equal(c->client_buffer, 1048576);
	assert_null(c->http_token);
	assert_string_equal(c->public_url, "http://127.0.0.1:7721");
	assert_null(c->redis_address);
	assert_string_equal(c->redis_stream, "stopcock:events");
	assert_string_equal(c->redis_group, "stopcock");
	assert_string_equal(c->redis_consumer, "%h");
	assert_string_equal(c->redis_dead_letter, "stopcock:dead");
	assert_int_equal(c->redis_max_deliveries, 5);
	assert_true(c->redis_claim_idle == 60);
	assert_int_equal(c->redis_batch, 256);
	assert_true(c->redis_block == 2);
	assert_false(c->redis_ha);
	assert_true(c->redis_lease_ttl == 10);
	assert_null(c->redis_lease_key);
	assert_null(c->redis_state_key);
	assert_null(c->kafka_brokers);
	assert_string_equal(c->kafka_topic, "stopcock.records");
	assert_string_equal(c->kafka_group, "stopcock");
	assert_string_equal(c->kafka_state_topic, "stopcock.state");
	assert_string_equal(c->kafka_client_id, "stopcockd-%h");
	assert_string_equal(c->kafka_instance_id, "%h");
	assert_true(c->kafka_commit_every == 5);
	assert_true(c->kafka_session_timeout == 45);
	assert_int_equal(c->kafka_max_message, 1048576);
	assert_true(c->remind_every == 0);
	assert_null(c->pause_url);
	assert_null(c->pause_secret);
	assert_string_equal(c->pause_redis_key, "stopcock:paused:%e");
	assert_string_equal(c->pause_redis_channel, "stopcock:pauses");
	assert_true(c->pause_alpha == 0);
	assert_int_equal(c->pause_dry_run, 0);
	assert_int_equal(c->pause_on_srm, 0);
	assert_int_equal(c->pause_max_per_hour, 6);
	assert_string_equal(c->syslog_ident, "stopcockd");
	assert_string_equal(c->syslog_facility, "daemon");
	assert_int_equal(c->nwebhooks, 0);
}

static void
test_defaults(void **state)
{
	struct conf *c;

	c = conf_new();
	check_defaults(c);
	assert_null(c->path);
	conf_free(c);
	c = good("");
	check_defaults(c);
	conf_free(c);
	c = good("# only comments\n; and blanks\n\n   \n[daemon]\n");
	check_defaults(c);
	conf_free(c);
}

static void
test_section_defaults(void **state)
{
	struct conf *c;
	const struct conf_guardrail *g;

	c = good("[guardrail g]\nmetric = m\ntest = mean\n"
	    "[experiment e]\n[webhook w]\nurl = https://h.example/x\n");
	g = &c->guardrails[0];
	assert_int_equal(g->harm, HARM_INCREASE);
	assert_true(g->margin == 0);
	assert_int_equal(g->margin_relative, 0);
	assert_int_equal(g->action, ACTION_ALERT);
	assert_true(g->plan_units == 0);
	assert_int_equal(g->line, 1);
	assert_int_equal(c->experiments[0].narms, 0);
	assert_true(c->experiments[0].alpha == 0);
	assert_int_equal(c->experiments[0].line, 4);
	assert_true(c->webhooks[0].timeout == 5);
	assert_int_equal(c->webhooks[0].max_attempts, 8);
	assert_int_equal(c->webhooks[0].queue, 1000);
	assert_null(c->webhooks[0].secret);
	assert_int_equal(c->webhooks[0].line, 5);
	conf_free(c);
}

struct ecase {
	const char	*label;
	const char	*text;
	const char	*want;	/* a line of the cause starts with this */
};

#define GQ "[guardrail g]\nmetric = m\n"

static const struct ecase ecases[] = {
	/* structure */
	{ "unknown key", "[daemon]\nfoo = 1\n",
	  "t.conf:2: unknown key 'foo' in [daemon]" },
	{ "unknown key named", "[guardrail g]\nmetric = m\ntest = mean\n"
	  "colour = red\n",
	  "t.conf:4: unknown key 'colour' in [guardrail g]" },
	{ "unknown section", "[daemon]\ntick = 1s\n[dameon]\ntick = 2s\n",
	  "t.conf:3: unknown section [dameon]" },
	{ "duplicate key", "[daemon]\ntick = 1s\n\ntick = 2s\n",
	  "t.conf:4: duplicate key 'tick' in [daemon] (first at line 2)" },
	{ "duplicate section", "[daemon]\n[redis]\n[daemon]\n",
	  "t.conf:3: duplicate section [daemon] (first at line 1)" },
	{ "duplicate guardrail", GQ "test = mean\n" GQ "test = mean\n",
	  "t.conf:4: duplicate section [guardrail g] (first at line 1)" },
	{ "duplicate experiment", "[experiment e]\n[experiment e]\n",
	  "t.conf:2: duplicate section [experiment e] (first at line 1)" },
	{ "duplicate webhook", "[webhook w]\nurl = http://a.example\n"
	  "[webhook w]\nurl = http://b.example\n",
	  "t.conf:3: duplicate section [webhook w] (first at line 1)" },
	{ "key outside", "alpha = 0.1\n[defaults]\n",
	  "t.conf:1: key 'alpha' is outside any section" },
	{ "no separator", "[daemon]\njust words\n",
	  "t.conf:2: expected 'key = value', '[section]' or a comment" },
	{ "comment before separator", "[daemon]\ntick ; = 1s\n",
	  "t.conf:2: expected 'key = value', '[section]' or a comment" },
	{ "no key", "[daemon]\n= 1s\n", "t.conf:2: missing key before '='" },
	{ "no bracket", "[daemon\n", "t.conf:1: section header without ']'" },
	{ "text after header", "[daemon] tick = 1\n",
	  "t.conf:1: unexpected text after ']'" },
	{ "empty header", "[ ]\n", "t.conf:1: empty section header []" },
	{ "unnamed guardrail", "[guardrail]\n",
	  "t.conf:1: section [guardrail] needs a name: [guardrail NAME]" },
	{ "named daemon", "[daemon main]\n",
	  "t.conf:1: section [daemon] takes no name" },
	{ "two names", "[guardrail a b]\n",
	  "t.conf:1: section header [guardrail ...] has more than one name" },
	{ "bad guardrail name", "[guardrail a/b]\n",
	  "t.conf:1: bad guardrail name 'a/b': use 1-64 of" },
	{ "long guardrail name", "[guardrail "
	  "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa]\n",
	  "t.conf:1: bad guardrail name" },
	{ "empty value", "[daemon]\ntcp =\n",
	  "t.conf:2: empty value for 'tcp' in [daemon]" },
	{ "control byte", "[daemon]\ntick = 1\001s\n",
	  "t.conf:2: control character 0x01" },

	/* numbers */
	{ "not a number", "[defaults]\nalpha = abc\n",
	  "t.conf:2: bad value 'abc' for 'alpha' in [defaults]: expected a "
	  "number in (0, 0.5]" },
	{ "alpha too big", "[defaults]\nalpha = 0.6\n",
	  "t.conf:2: bad value '0.6' for 'alpha' in [defaults]: expected a "
	  "number in (0, 0.5]" },
	{ "alpha zero", "[defaults]\nalpha = 0\n",
	  "t.conf:2: bad value '0' for 'alpha'" },
	{ "alpha nan", "[defaults]\nalpha = nan\n",
	  "t.conf:2: bad value 'nan' for 'alpha'" },
	{ "trailing junk", "[defaults]\nalpha = 0.05x\n",
	  "t.conf:2: bad value '0.05x' for 'alpha'" },
	{ "experiment alpha", "[experiment e]\nalpha = 0.7\n",
	  "t.conf:2: bad value '0.7' for 'alpha' in [experiment e]: expected "
	  "a number in 0 or (0, 0.5]" },
	{ "buckets low", "[defaults]\nsketch_buckets = 8\n",
	  "t.conf:2: bad value '8' for 'sketch_buckets' in [defaults]: "
	  "expected a whole number in [16, 4096]" },
	{ "buckets negative", "[defaults]\nsketch_buckets = -16\n",
	  "t.conf:2: bad value '-16' for 'sketch_buckets'" },
	{ "buckets fraction", "[defaults]\nsketch_buckets = 16.5\n",
	  "t.conf:2: bad value '16.5' for 'sketch_buckets'" },
	{ "variants over proto", "[defaults]\nmax_variants = 17\n",
	  "t.conf:2: bad value '17' for 'max_variants' in [defaults]: "
	  "expected a whole number in [2, 16]" },
	{ "tick too long", "[daemon]\ntick = 2h\n",
	  "t.conf:2: bad value '2h' for 'tick' in [daemon]: expected a "
	  "duration such as 250ms, 5s, 2m or 1h in [10ms, 1h]" },
	{ "tick no unit word", "[daemon]\ntick = soon\n",
	  "t.conf:2: bad value 'soon' for 'tick'" },
	{ "bool", "[pause]\ndry_run = maybe\n",
	  "t.conf:2: bad value 'maybe' for 'dry_run' in [pause]: expected "
	  "yes, no, true, false, on, off, 1 or 0" },
	{ "enum", GQ "test = median\n",
	  "t.conf:3: bad value 'median' for 'test' in [guardrail g]: expected "
	  "one of mean|proportion|rate|quantile" },
	{ "harm", GQ "test = mean\nharm = up\n",
	  "t.conf:4: bad value 'up' for 'harm' in [guardrail g]: expected one "
	  "of increase|decrease" },
	{ "action", GQ "test = mean\naction = stop\n",
	  "t.conf:4: bad value 'stop' for 'action'" },
	{ "pause alpha half", "[pause]\npause_alpha = 0.5\n",
	  "t.conf:2: bad value '0.5' for 'pause_alpha'" },
	{ "margin negative", GQ "test = mean\nmargin = -1\n",
	  "t.conf:4: bad value '-1' for 'margin' in [guardrail g]: expected a "
	  "number >= 0, or a percentage like 5%" },
	{ "margin spaced percent", GQ "test = mean\nmargin = 5 %\n",
	  "t.conf:4: bad value '5 %' for 'margin'" },
	{ "margin lone percent", GQ "test = mean\nmargin = %\n",
	  "t.conf:4: bad value '%' for 'margin'" },
	{ "margin word percent", GQ "test = mean\nmargin = five%\n",
	  "t.conf:4: bad value 'five%' for 'margin'" },

	/* addresses, paths, strings */
	{ "hostport no port", "[daemon]\ntcp = 127.0.0.1\n",
	  "t.conf:2: bad value '127.0.0.1' for 'tcp' in [daemon]: expected "
	  "host:port or [v6]:port, port 1-65535" },
	{ "hostport empty host", "[daemon]\nudp = :7720\n",
	  "t.conf:2: bad value ':7720' for 'udp'" },
	{ "hostport port 0", "[daemon]\nhttp = localhost:0\n",
	  "t.conf:2: bad value 'localhost:0' for 'http'" },
	{ "hostport port big", "[daemon]\nhttp = localhost:65536\n",
	  "t.conf:2: bad value 'localhost:65536' for 'http'" },
	{ "hostport bare v6", "[daemon]\ntcp = ::1:7720\n",
	  "t.conf:2: bad value '::1:7720' for 'tcp'" },
	{ "hostport empty v6", "[daemon]\ntcp = []:7720\n",
	  "t.conf:2: bad value '[]:7720' for 'tcp'" },
	{ "unix relative", "[daemon]\nunix = run/events.sock\n",
	  "t.conf:2: bad value 'run/events.sock' for 'unix' in [daemon]: "
	  "expected an absolute path, up to 107 bytes" },
	{ "unix too long", "[daemon]\nunix = /aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa"
	  "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa"
	  "aaaaaaaaaa\n", "t.conf:2: bad value '/aaaa" },
	{ "redis address", "[redis]\naddress = redis\n",
	  "t.conf:2: bad value 'redis' for 'address' in [redis]: expected "
	  "host:port, [v6]:port or an absolute socket path" },
	{ "url scheme", "[daemon]\npublic_url = ftp://h.example/\n",
	  "t.conf:2: bad value 'ftp://h.example/' for 'public_url' in "
	  "[daemon]: expected an http:// or https:// URL" },
	{ "url no host", "[pause]\nurl = https:///x\n",
	  "t.conf:2: bad value 'https:///x' for 'url'" },
	{ "token short", "[daemon]\nhttp_token = short\n",
	  "t.conf:2: bad value (hidden) for 'http_token' in [daemon]: "
	  "expected 16-1024 bytes without blanks" },
	{ "token blank", "[daemon]\nhttp_token = sixteen chars long!\n",
	  "t.conf:2: bad value (hidden) for 'http_token'" },
	{ "consumer escape", "[redis]\nconsumer = %x\n",
	  "t.conf:2: bad value '%x' for 'consumer' in [redis]: expected text "
	  "without blanks; %h is the only escape" },
	{ "redis key escape", "[pause]\nredis_key = paused:%h\n",
	  "t.conf:2: bad value 'paused:%h' for 'redis_key'" },
	{ "stream blank", "[redis]\nstream = two words\n",
	  "t.conf:2: bad value 'two words' for 'stream'" },
	{ "redis ha without address", "[redis]\nha = yes\n",
	  "t.conf:2: [redis] ha = yes needs [redis] address" },
	{ "redis ha host consumer", "[redis]\naddress = 127.0.0.1:6379\n"
	  "ha = yes\n", "t.conf:3: [redis] ha = yes: every daemon must read "
	  "as the same consumer; set [redis] consumer to a name without %h" },
	{ "redis ha with tcp", "[daemon]\ntcp = 127.0.0.1:7000\n[redis]\n"
	  "address = 127.0.0.1:6379\nconsumer = one\nha = yes\n",
	  "t.conf:6: [redis] ha = yes: Redis must be the daemon's only record "
	  "input" },
	{ "redis ha same keys", "[redis]\naddress = 127.0.0.1:6379\n"
	  "consumer = one\nha = yes\nlease_key = k\nstate_key = k\n",
	  "t.conf:4: [redis] lease_key and state_key are both k" },
	{ "redis lease_ttl short", "[redis]\nlease_ttl = 0.5s\n",
	  "t.conf:2: bad value '0.5s' for 'lease_ttl'" },
	{ "kafka brokers no port", "[kafka]\nbrokers = k1:9092,k2\n",
	  "t.conf:2: bad value 'k1:9092,k2' for 'brokers' in [kafka]: "
	  "expected host:port[,host:port...], port 1-65535" },
	{ "kafka brokers empty item", "[kafka]\nbrokers = k1:9092,,k2:9092\n",
	  "t.conf:2: bad value 'k1:9092,,k2:9092' for 'brokers'" },
	{ "kafka brokers trailing comma", "[kafka]\nbrokers = k1:9092,\n",
	  "t.conf:2: bad value 'k1:9092,' for 'brokers'" },
	{ "kafka brokers port 0", "[kafka]\nbrokers = k1:0\n",
	  "t.conf:2: bad value 'k1:0' for 'brokers'" },
	{ "kafka topic slash", "[kafka]\ntopic = records/eu\n",
	  "t.conf:2: bad value 'records/eu' for 'topic' in [kafka]: expected "
	  "a topic name of 1-249 of A-Z a-z 0-9 . _ -" },
	{ "kafka topic dotdot", "[kafka]\nstate_topic = ..\n",
	  "t.conf:2: bad value '..' for 'state_topic'" },
	{ "kafka instance escape", "[kafka]\ninstance_id = d-%p\n",
	  "t.conf:2: bad value 'd-%p' for 'instance_id'" },
	{ "kafka commit zero", "[kafka]\ncommit_every = 0\n",
	  "t.conf:2: bad value '0' for 'commit_every'" },
	{ "kafka max_message small", "[kafka]\nmax_message = 100\n",
	  "t.conf:2: bad value '100' for 'max_message'" },
	{ "kafka beside tcp", "[daemon]\ntcp = 127.0.0.1:7720\n"
	  "[kafka]\nbrokers = k1:9092\n",
	  "t.conf:4: [kafka] brokers is set: Kafka must be the daemon's only "
	  "record input" },
	{ "kafka beside redis", "[kafka]\nbrokers = k1:9092\n"
	  "[redis]\naddress = 127.0.0.1:6379\n",
	  "t.conf:2: [kafka] brokers is set: Kafka must be the daemon's only" },
	{ "kafka state topic is topic", "[kafka]\nbrokers = k1:9092\n"
	  "topic = t\nstate_topic = t\n",
	  "t.conf:2: [kafka] topic and state_topic are both t; the state needs "
	  "its own compacted topic" },
	{ "facility", "[syslog]\nfacility = kern\n",
	  "t.conf:2: bad value 'kern' for 'facility' in [syslog]: expected "
	  "daemon, user or local0..local7" },
	{ "ident long", "[syslog]\nident = "
	  "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa\n",
	  "t.conf:2: bad value 'aaaa" },
	{ "metric name", "[guardrail g]\nmetric = latency ms\ntest = mean\n",
	  "t.conf:2: bad value 'latency ms' for 'metric' in [guardrail g]: "
	  "expected a name of 1-64 of" },

	/* secrets */
	{ "secret prefix", "[webhook w]\nurl = http://h.example\n"
	  "secret = c2VjcmV0\n",
	  "t.conf:3: bad value (hidden) for 'secret' in [webhook w]: "
	  "expected whsec_ followed by base64" },
	{ "secret empty", "[webhook w]\nurl = http://h.example\n"
	  "secret = whsec_\n", "t.conf:3: bad value (hidden) for 'secret'" },
	{ "secret length", "[webhook w]\nurl = http://h.example\n"
	  "secret = whsec_c2VjcmV\n",
	  "t.conf:3: bad value (hidden) for 'secret'" },
	{ "secret alphabet", "[webhook w]\nurl = http://h.example\n"
	  "secret = whsec_c2Vj-mV0\n",
	  "t.conf:3: bad value (hidden) for 'secret'" },
	{ "secret inner pad", "[webhook w]\nurl = http://h.example\n"
	  "secret = whsec_c2=jcmV0\n",
	  "t.conf:3: bad value (hidden) for 'secret'" },
	{ "secret triple pad", "[webhook w]\nurl = http://h.example\n"
	  "secret = whsec_c===\n",
	  "t.conf:3: bad value (hidden) for 'secret'" },
	{ "pause secret", "[pause]\nsecret = hunter2\n",
	  "t.conf:2: bad value (hidden) for 'secret' in [pause]" },

	/* plans */
	{ "plan one arm", "[experiment e]\nplan = control=100\n",
	  "t.conf:2: bad value 'control=100' for 'plan' in [experiment e]: " },
	{ "plan duplicate arm", "[experiment e]\nplan = a=1 b=1 a=1\n",
	  "t.conf:2: bad value 'a=1 b=1 a=1' for 'plan'" },
	{ "plan zero weight", "[experiment e]\nplan = a=1 b=0\n",
	  "t.conf:2: bad value 'a=1 b=0' for 'plan'" },
	{ "plan negative weight", "[experiment e]\nplan = a=1 b=-1\n",
	  "t.conf:2: bad value 'a=1 b=-1' for 'plan'" },
	{ "plan bad name", "[experiment e]\nplan = a=1 b/c=1\n",
	  "t.conf:2: bad value 'a=1 b/c=1' for 'plan'" },
	{ "plan no weight", "[experiment e]\nplan = a b\n",
	  "t.conf:2: bad value 'a b' for 'plan'" },
	{ "plan infinite", "[experiment e]\nplan = a=1 b=inf\n",
	  "t.conf:2: bad value 'a=1 b=inf' for 'plan'" },
	{ "plan 17 arms", "[experiment e]\nplan = a=1 b=1 c=1 d=1 e=1 f=1 g=1 "
	  "h=1 i=1 j=1 k=1 l=1 m=1 n=1 o=1 p=1 q=1\n",
	  "t.conf:2: bad value 'a=1 b=1" },

	/* rules inside a section */
	{ "missing metric", "[guardrail g]\ntest = mean\n",
	  "t.conf:1: [guardrail g] is missing required key 'metric'" },
	{ "missing test", "[guardrail g]\nmetric = m\n",
	  "t.conf:1: [guardrail g] is missing required key 'test'" },
	{ "missing quantile", GQ "test = quantile\n[daemon]\n",
	  "t.conf:1: [guardrail g] has test = quantile but no quantile "
	  "(such as quantile = 0.99)" },
	{ "quantile for mean", GQ "test = mean\nquantile = 0.5\n",
	  "t.conf:4: quantile is only for test = quantile, not mean, in "
	  "[guardrail g]" },
	{ "quantile one", GQ "test = quantile\nquantile = 1\n",
	  "t.conf:4: bad value '1' for 'quantile' in [guardrail g]: expected "
	  "a number in (0, 1)" },
	{ "min not below max", GQ "test = mean\nmin = 5\nmax = 5\n",
	  "t.conf:1: [guardrail g]: min (5) must be below max (5)" },
	{ "webhook without url", "[webhook w]\ntimeout = 1s\n",
	  "t.conf:1: [webhook w] is missing required key 'url'" },

	/* rules across sections */
	{ "pause alpha vs default", "[pause]\n\npause_alpha = 0.05\n",
	  "t.conf:3: pause_alpha 0.05 must be below [defaults] alpha 0.05" },
	{ "pause alpha vs experiment", "[experiment e]\nalpha = 0.01\n"
	  "[pause]\npause_alpha = 0.02\n",
	  "t.conf:4: pause_alpha 0.02 must be below alpha 0.01 of experiment "
	  "e (line 1)" },
	{ "observe and count", "[guardrail x]\nmetric = latency_ms\n"
	  "test = mean\n[guardrail y]\nmetric = latency_ms\n"
	  "test = proportion\n",
	  "t.conf:4: metric latency_ms is used by an observe test (guardrail "
	  "x) and a count test (guardrail y)" },
	{ "count then observe", "[guardrail y]\nmetric = latency_ms\n"
	  "test = rate\n[guardrail x]\nmetric = latency_ms\n"
	  "test = quantile\nquantile = 0.9\n",
	  "t.conf:4: metric latency_ms is used by an observe test (guardrail "
	  "x) and a count test (guardrail y)" },
	{ "plan over max_variants", "[defaults]\nmax_variants = 2\n"
	  "[experiment e]\nplan = a=1 b=1 c=1\n",
	  "t.conf:3: experiment e plans 3 arms, more than max_variants (2)" },
	{ "experiments over cap", "[defaults]\nmax_experiments = 1\n"
	  "[experiment a]\n[experiment b]\n",
	  "t.conf:4: more [experiment] sections than max_experiments (1)" },
	/* producers and signed inputs */
	{ "producer without secret", "[producer ferry]\n",
	  "t.conf:1: [producer ferry] has no secret: set secret or "
	  "secret_file" },
	{ "signed without producers", "[daemon]\ntcp_signed = yes\n",
	  "t.conf: an input requires signed batches" },
	{ "producer bad secret", "[producer ferry]\nsecret = abc\n",
	  "t.conf:2: bad value (hidden) for 'secret' in [producer ferry]" },
	{ "duplicate producer", "[producer p]\nsecret = whsec_YWJj\n"
	  "[producer p]\nsecret = whsec_YWJj\n",
	  "t.conf:3: duplicate section [producer p] (first at line 1)" },
	{ "unix_mode not octal", "[daemon]\nunix_mode = 0668\n",
	  "t.conf:2: bad value '0668' for 'unix_mode' in [daemon]: expected "
	  "octal permission bits 0-777" },
	{ "unix_mode too big", "[daemon]\nunix_mode = 1777\n",
	  "t.conf:2: bad value '1777' for 'unix_mode'" },
	{ "signature_tolerance zero", "[daemon]\nsignature_tolerance = 0\n",
	  "t.conf:2: bad value '0' for 'signature_tolerance'" },
	/* Alertmanager takes alerts: news that is no alert is refused,
	 * and the error lists what it does take. */
	{ "alertmanager retired", "[alertmanager]\nkinds = harm retired\n",
	  "t.conf:2: bad value 'harm retired' for 'kinds' in [alertmanager]: "
	  "unknown kind 'retired': expected words of harm safe srm pause "
	  "pause_dry_run reminder acknowledged resolved" },
	{ "webhook kind twice", "[webhook w]\nurl = http://h.example/\n"
	  "kinds = restarted harm restarted\n",
	  "t.conf:3: bad value 'restarted harm restarted' for 'kinds' in "
	  "[webhook w]: kind given twice 'restarted': expected words of harm "
	  "safe srm pause pause_dry_run reminder acknowledged resolved "
	  "restarted retired" },
};

static void
test_errors(void **state)
{
	size_t i;
	char *cause;
	int failed = 0;

	for (i = 0; i < SC_NELEM(ecases); i++) {
		cause = bad(ecases[i].text);
		if (!has_line(cause, ecases[i].want)) {
			print_error("case '%s': want a line starting\n  %s\n"
			    "got\n  %s\n", ecases[i].label, ecases[i].want,
			    cause);
			failed++;
		}
		free(cause);
	}
	assert_int_equal(failed, 0);
}

/* Values that look odd but are right must pass. */
static void
test_accepted(void **state)
{
	struct conf *c;

	c = good("[daemon]\ntcp = [::1]:7720\nudp = *:9\n"
	    "http = localhost:65535\nunix = /tmp/s.sock\n"
	    "http_token = 0123456789abcdef\n"
	    "public_url = https://status.larder-lane.example:8443/x?y#z\n"
	    "tick = 250ms\ncheckpoint_every = 0.5\n"
	    "[redis]\naddress = /run/redis.sock\nconsumer = worker-%h\n"
	    "[pause]\ndry_run = on\nallow_srm = TRUE\n"
	    "secret = whsec_YQ==\nredis_key = p:%e\n"
	    "[alerts]\nremind = 1d\n"
	    "[syslog]\nfacility = local7\n"
	    "[experiment e]\nalpha = 0\n");
	assert_string_equal(c->tcp, "[::1]:7720");
	assert_string_equal(c->udp, "*:9");
	assert_true(c->tick == 0.25);
	assert_true(c->checkpoint_every == 0.5);
	assert_string_equal(c->redis_address, "/run/redis.sock");
	assert_int_equal(c->pause_dry_run, 1);
	assert_true(c->remind_every == 86400);
	assert_string_equal(c->syslog_facility, "local7");
	assert_string_equal(c->pause_secret, "whsec_YQ==");
	assert_int_equal(c->pause_on_srm, 1);
	conf_free(c);

	c = good("[kafka]\nbrokers = 127.0.0.1:39092,[::1]:39093,k3.example:9092\n"
	    "topic = shop.events_v2\nstate_topic = shop-state\n"
	    "instance_id =\ncommit_every = 250ms\nsession_timeout = 6s\n");
	assert_string_equal(c->kafka_brokers,
	    "127.0.0.1:39092,[::1]:39093,k3.example:9092");
	assert_string_equal(c->kafka_topic, "shop.events_v2");
	assert_string_equal(c->kafka_state_topic, "shop-state");
	assert_null(c->kafka_instance_id);
	assert_true(c->kafka_commit_every == 0.25);
	assert_true(c->kafka_session_timeout == 6);
	conf_free(c);

	/* Pause's Redis key and channel can be turned off; nothing else. */
	c = good("[pause]\nredis_key =\nredis_channel =\n");
	assert_null(c->pause_redis_key);
	assert_null(c->pause_redis_channel);
	conf_free(c);
}

static void
test_multiple_errors(void **state)
{
	char *cause;

	cause = bad("[defaults]\nalpha = 2\n"
	    "[daemon]\nfoo = bar\ntick = 1s\ntick = 1s\n"
	    "[nowhere]\nanything = goes\n"
	    "[guardrail g]\ntest = quantile\n");
	assert_true(has_line(cause, "t.conf:2: bad value '2' for 'alpha'"));
	assert_true(has_line(cause, "t.conf:4: unknown key 'foo'"));
	assert_true(has_line(cause, "t.conf:6: duplicate key 'tick'"));
	assert_true(has_line(cause, "t.conf:7: unknown section [nowhere]"));
	assert_true(has_line(cause, "t.conf:9: [guardrail g] is missing "
	    "required key 'metric'"));
	assert_true(has_line(cause, "t.conf:9: [guardrail g] has test = "
	    "quantile but no quantile"));
	/* Keys of a refused section add nothing: exactly six errors. */
	assert_int_equal(count_lines(cause), 6);
	free(cause);
}

static void
test_error_cap(void **state)
{
	char *text, *cause;
	size_t i, len = 0;

	text = xmalloc(500 * 16 + 32);
	len += sprintf(text, "[daemon]\n");
	for (i = 0; i < 500; i++)
		len += sprintf(text + len, "k%zu = 1\n", i);
	cause = bad(text);
	assert_int_equal(count_lines(cause), 101);
	assert_true(has_line(cause, "t.conf:102: too many errors; giving up"));
	free(cause);
	free(text);
}

/* One bad key anywhere: no configuration at all. */
static void
test_all_or_nothing(void **state)
{
	char *cause;

	cause = bad("[defaults]\nalpha = 0.01\n"
	    "[guardrail g]\nmetric = m\ntest = mean\n"
	    "[webhook w]\nurl = https://h.example\nsecret = whsec_YWJj\n"
	    "[daemon]\ntcp = 127.0.0.1:7720\nstate = /tmp/x\n"
	    "[syslog]\nident = x\nfacility = nope\n");
	assert_int_equal(count_lines(cause), 1);
	free(cause);
}

static void
test_margins(void **state)
{
	static const struct {
		const char	*text;
		double		 margin;
		int		 relative;
	} m[] = {
		{ "5%", 0.05, 1 }, { "0.5", 0.5, 0 }, { "0", 0, 0 },
		{ "0%", 0, 1 }, { "12.5%", 0.125, 1 }, { "250", 250, 0 },
		{ "150%", 1.5, 1 },
	};
	struct conf *c;
	char text[128];
	size_t i;

	for (i = 0; i < SC_NELEM(m); i++) {
		snprintf(text, sizeof text, GQ "test = mean\nmargin = %s\n",
		    m[i].text);
		c = good(text);
		assert_true(fabs(c->guardrails[0].margin - m[i].margin) <
		    1e-15);
		assert_int_equal(c->guardrails[0].margin_relative,
		    m[i].relative);
		conf_free(c);
	}
}

static void
test_plan(void **state)
{
	const struct conf_experiment *e;
	struct conf *c;

	c = good("[experiment e]\nplan = control=50 treatment=50\n"
	    "[experiment f]\nplan =  control=1   b=2.5 c=0.25 ; the split\n"
	    "srm_alpha = 0.0001\nplan_units = 3000\n");
	e = conf_experiment_find(c, "e");
	assert_int_equal(e->narms, 2);
	assert_string_equal(e->arms[0].name, "control");
	assert_string_equal(e->arms[1].name, "treatment");
	assert_true(e->arms[0].weight == 50 && e->arms[1].weight == 50);
	e = conf_experiment_find(c, "f");
	assert_int_equal(e->narms, 3);
	assert_string_equal(e->arms[2].name, "c");
	assert_true(e->arms[1].weight == 2.5 && e->arms[2].weight == 0.25);
	assert_true(e->srm_alpha == 0.0001);
	assert_true(e->plan_units == 3000);
	assert_true(e->alpha == 0);
	conf_free(c);
}

static void
test_webhooks(void **state)
{
	struct conf *c;

	c = good("[webhook a]\nurl = https://h.example/a\n"
	    "secret = whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw\n"
	    "timeout = 750ms\nmax_attempts = 1\nqueue = 1000000\n"
	    "[webhook b]\nurl = http://127.0.0.1:9/b\nsecret = whsec_YWI=\n");
	assert_int_equal(c->nwebhooks, 2);
	assert_string_equal(c->webhooks[0].secret,
	    "whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2LaLaSw");
	assert_true(c->webhooks[0].timeout == 0.75);
	assert_int_equal(c->webhooks[0].max_attempts, 1);
	assert_int_equal(c->webhooks[0].queue, 1000000);
	assert_string_equal(c->webhooks[1].secret, "whsec_YWI=");
	/* The default: everything but safe, news included, except for
	 * Alertmanager, which takes alerts only. */
	assert_int_equal(c->webhooks[0].kinds, CONF_KINDS_ALL &
	    ~(uint32_t)CONF_KIND_SAFE);
	assert_int_equal(c->syslog_kinds, CONF_KINDS_ALL &
	    ~(uint32_t)CONF_KIND_SAFE);
	assert_int_equal(c->am_kinds, CONF_KINDS_ALL &
	    ~(uint32_t)(CONF_KIND_SAFE | CONF_KIND_RESTARTED |
	    CONF_KIND_RETIRED));
	conf_free(c);

	c = good("[webhook a]\nurl = https://h.example/a\n"
	    "kinds = harm retired\n[syslog]\nkinds = restarted\n");
	assert_int_equal(c->webhooks[0].kinds, CONF_KIND_HARM |
	    CONF_KIND_RETIRED);
	assert_int_equal(c->syslog_kinds, CONF_KIND_RESTARTED);
	conf_free(c);
}

/* Section counts are capped at the header's limits. */
static void
test_section_caps(void **state)
{
	char *text, *cause, want[64];
	size_t len = 0;
	int i;

	text = xmalloc(70 * 64);
	for (i = 0; i <= CONF_GUARDRAILS_MAX; i++)
		len += sprintf(text + len, "[guardrail g%d]\nmetric = m\n"
		    "test = mean\n", i);
	cause = bad(text);
	snprintf(want, sizeof want, "t.conf:%d: too many [guardrail] "
	    "sections (at most %d)", 3 * CONF_GUARDRAILS_MAX + 1,
	    CONF_GUARDRAILS_MAX);
	assert_true(has_line(cause, want));
	assert_int_equal(count_lines(cause), 1);
	free(cause);
	free(text);
}

/* inih's line buffer is short; longer lines must still parse. */
static void
test_long_lines(void **state)
{
	char *text, *cause, url[1200];
	struct conf *c;
	int n;

	n = snprintf(url, sizeof url, "https://chat.larder-lane.example/");
	memset(url + n, 'q', 900);
	url[n + 900] = '\0';
	xasprintf(&text, "[webhook w]\n   url   =   %s   ; a long one\n"
	    "timeout = 2s\n", url);
	c = good(text);
	assert_string_equal(c->webhooks[0].url, url);
	assert_true(c->webhooks[0].timeout == 2);
	conf_free(c);
	free(text);

	/* A long unknown key is still an unknown key on its own line. */
	memset(url, 'k', 300);
	url[300] = '\0';
	xasprintf(&text, "[daemon]\n%s = 1\n", url);
	cause = bad(text);
	assert_true(has_line(cause, "t.conf:2: key is longer than") ||
	    has_line(cause, "t.conf:2: unknown key 'kkkk"));
	free(cause);
	free(text);

	text = xmalloc(5000);
	memcpy(text, "[daemon]\nstate = /", 18);
	memset(text + 18, 'a', 4200);
	strcpy(text + 18 + 4200, "\ntick = x\n");
	cause = bad(text);
	assert_true(has_line(cause, "t.conf:2: line is longer than 4096"));
	assert_true(has_line(cause, "t.conf:3: bad value 'x' for 'tick'"));
	free(cause);
	free(text);
}

/* Inline comments, CRLF, indentation, a BOM and ':' as separator. */
static void
test_syntax_variants(void **state)
{
	struct conf *c;

	c = good("\xef\xbb\xbf[daemon]\r\n  tick = 2s ; two seconds\r\n"
	    "\tmax_clients: 12\r\n# note\r\n  [redis]  ; trailing\r\n"
	    "stream = a;b\n");
	assert_true(c->tick == 2);
	assert_int_equal(c->max_clients, 12);
	assert_string_equal(c->redis_stream, "a;b");
	conf_free(c);
}

static void
check_same(const struct conf *a, const struct conf *b)
{
#define SAME_STR(f) do {						\
	if (a->f == NULL) assert_null(b->f);				\
	else {								\
		assert_string_equal(a->f, b->f);			\
		assert_ptr_not_equal(a->f, b->f);			\
	}								\
} while (0)
#define SAME(f) assert_memory_equal(&a->f, &b->f, sizeof a->f)
	int i;

	SAME_STR(path);
	SAME(alpha); SAME(srm_alpha); SAME(plan_units);
	SAME(rate_concentration); SAME(sketch_accuracy);
	SAME(sketch_buckets); SAME(history_points); SAME(max_experiments);
	SAME(max_variants); SAME(max_metrics);
	SAME(nguardrails); SAME(guardrails);
	SAME(nexperiments); SAME(experiments);
	SAME_STR(tcp); SAME_STR(udp); SAME_STR(unix_path); SAME_STR(http);
	SAME_STR(state_dir); SAME(tick); SAME(checkpoint_every);
	SAME(max_clients); SAME(client_buffer); SAME_STR(http_token);
	SAME_STR(public_url);
	SAME_STR(redis_address); SAME_STR(redis_stream);
	SAME_STR(redis_group); SAME_STR(redis_consumer);
	SAME_STR(redis_dead_letter); SAME(redis_max_deliveries);
	SAME(redis_claim_idle); SAME(redis_batch); SAME(redis_block);
	SAME_STR(kafka_brokers); SAME_STR(kafka_topic); SAME_STR(kafka_group);
	SAME_STR(kafka_state_topic); SAME_STR(kafka_client_id);
	SAME_STR(kafka_instance_id); SAME(kafka_commit_every);
	SAME(kafka_session_timeout); SAME(kafka_max_message);
	SAME(remind_every);
	SAME_STR(pause_url); SAME_STR(pause_secret);
	SAME_STR(pause_redis_key); SAME_STR(pause_redis_channel);
	SAME(pause_alpha); SAME(pause_dry_run); SAME(pause_on_srm);
	SAME(pause_max_per_hour);
	SAME_STR(syslog_ident); SAME_STR(syslog_facility);
	SAME(nwebhooks);
	for (i = 0; i < a->nwebhooks; i++) {
		SAME_STR(webhooks[i].url);
		SAME_STR(webhooks[i].secret);
		SAME(webhooks[i].name); SAME(webhooks[i].timeout);
		SAME(webhooks[i].max_attempts); SAME(webhooks[i].queue);
		SAME(webhooks[i].line);
	}
#undef SAME
#undef SAME_STR
}

static void
test_dup(void **state)
{
	struct conf *c, *d;
	char *cause;

	assert_int_equal(conf_load("conf/stopcock.conf", &c, &cause), 0);
	d = conf_dup(c);
	check_same(c, d);
	conf_free(c);	/* the copy must not share anything */
	assert_string_equal(d->webhooks[0].url,
	    "http://127.0.0.1:7790/hooks/stopcock");
	assert_string_equal(d->tcp, "127.0.0.1:7720");
	conf_free(d);

	c = conf_new();
	d = conf_dup(c);
	check_same(c, d);
	conf_free(c);
	conf_free(d);
}

static void
test_guardrail_for(void **state)
{
	const struct conf_guardrail *g;
	struct conf *c;
	int i = 0, n = 0;

	c = good("[guardrail p99]\nmetric = latency_ms\ntest = quantile\n"
	    "quantile = 0.99\n"
	    "[guardrail errors]\nmetric = server_errors\ntest = proportion\n"
	    "[guardrail p50]\nmetric = latency_ms\ntest = quantile\n"
	    "quantile = 0.5\n"
	    "[guardrail avg]\nmetric = latency_ms\ntest = mean\n");
	while ((g = conf_guardrail_for(c, "latency_ms", &i)) != NULL) {
		switch (n++) {
		case 0:
			assert_string_equal(g->name, "p99");
			assert_int_equal(i, 1);
			break;
		case 1:
			assert_string_equal(g->name, "p50");
			assert_int_equal(i, 3);
			break;
		case 2:
			assert_string_equal(g->name, "avg");
			break;
		}
	}
	assert_int_equal(n, 3);
	assert_null(conf_guardrail_for(c, "latency_ms", &i));
	i = 0;
	g = conf_guardrail_for(c, "server_errors", &i);
	assert_string_equal(g->name, "errors");
	assert_null(conf_guardrail_for(c, "server_errors", &i));
	i = 0;
	assert_null(conf_guardrail_for(c, "unknown", &i));
	conf_free(c);
}

static void
test_test_names(void **state)
{
	assert_string_equal(conf_test_name(TEST_MEAN), "mean");
	assert_string_equal(conf_test_name(TEST_PROPORTION), "proportion");
	assert_string_equal(conf_test_name(TEST_RATE), "rate");
	assert_string_equal(conf_test_name(TEST_QUANTILE), "quantile");
}

static void
test_help(void **state)
{
	static const char *const want[] = {
		"[defaults]", "[guardrail NAME]", "[experiment NAME]",
		"[daemon]", "[redis]", "[kafka]", "[alerts]", "[pause]",
		"[syslog]", "  state_topic ", "  instance_id ",
		"[webhook NAME]", "  alpha ", "  quantile ", "  margin ",
		"  plan ", "  client_buffer ", "  consumer ", "  remind ",
		"  allow_srm ", "  facility ", "  max_attempts ",
	};
	char *buf = NULL;
	size_t size = 0, i;
	FILE *f;

	f = open_memstream(&buf, &size);
	assert_non_null(f);
	conf_help(f);
	fclose(f);
	for (i = 0; i < SC_NELEM(want); i++) {
		if (!has_line(buf, want[i]))
			print_error("help lacks %s\n", want[i]);
		assert_true(has_line(buf, want[i]));
	}
	assert_non_null(strstr(buf, "(0, 0.5]"));
	free(buf);
}

static void
test_load_errors(void **state)
{
	char path[] = "/tmp/test_conf.XXXXXX", *cause, *big;
	struct conf *c = NULL;
	FILE *f;
	int fd, i;

	assert_int_equal(conf_load("/nonexistent/stopcock.conf", &c, &cause),
	    -1);
	assert_null(c);
	assert_string_equal(cause, "/nonexistent/stopcock.conf: No such file "
	    "or directory");
	free(cause);

	fd = mkstemp(path);
	assert_true(fd >= 0);
	f = fdopen(fd, "w");
	fputs("[daemon]\ntick = 1s\nmax_", f);
	fputc('\0', f);
	fputs("clients = 3\n", f);
	fclose(f);
	assert_int_equal(conf_load(path, &c, &cause), -1);
	assert_true(strstr(cause, ":3: NUL byte") != NULL);
	free(cause);

	f = fopen(path, "w");
	big = xmalloc(1024 * 1024 + 1);
	memset(big, '#', 1024 * 1024 + 1);
	for (i = 63; i < 1024 * 1024; i += 64)
		big[i] = '\n';
	fwrite(big, 1, 1024 * 1024 + 1, f);
	fclose(f);
	assert_int_equal(conf_load(path, &c, &cause), -1);
	assert_non_null(strstr(cause, "file is larger than 1048576 bytes"));
	free(cause);

	/* Exactly 1 MiB of comments is fine. */
	f = fopen(path, "w");
	fwrite(big, 1, 1024 * 1024, f);
	fclose(f);
	assert_int_equal(conf_load(path, &c, &cause), 0);
	assert_string_equal(c->path, path);
	conf_free(c);

	f = fopen(path, "w");
	fputs("[daemon]\ntick = never\n", f);
	fclose(f);
	assert_int_equal(conf_load(path, &c, &cause), -1);
	assert_true(strncmp(cause, path, strlen(path)) == 0);
	assert_non_null(strstr(cause, ":2: bad value 'never' for 'tick'"));
	free(cause);
	free(big);
	unlink(path);
}

/*
 * Issue 13, item 5: [experiment ID] guardrails names the guardrails that
 * apply to it, in any section order; an unknown or repeated name, or an
 * empty list, is an error at the experiment's line. The copy keeps it.
 */
static void
test_experiment_guardrails(void **state)
{
	static const char *g = "[guardrail lat]\nmetric = l\ntest = mean\n"
	    "[guardrail err]\nmetric = e\ntest = proportion\n";
	const struct conf_experiment *e;
	struct conf *c, *d;
	char *text, *cause;

	xasprintf(&text, "[experiment x]\nguardrails = err  lat\n%s", g);
	c = good(text);
	free(text);
	e = conf_experiment_find(c, "x");
	assert_non_null(e);
	assert_string_equal(e->guardrails, "err  lat");
	d = conf_dup(c);
	conf_free(c);
	assert_string_equal(conf_experiment_find(d, "x")->guardrails,
	    "err  lat");
	conf_free(d);
	c = good(g);
	assert_int_equal(c->nexperiments, 0);
	conf_free(c);

	xasprintf(&text, "%s[experiment x]\nguardrails = lat nope\n", g);
	cause = bad(text);
	assert_true(has_line(cause, "t.conf:7: experiment x: guardrails names "
	    "nope, which is not a [guardrail] section"));
	free(cause);
	free(text);
	xasprintf(&text, "%s[experiment x]\nguardrails = lat err lat\n", g);
	cause = bad(text);
	assert_non_null(strstr(cause, "guardrails names lat twice"));
	free(cause);
	free(text);
	xasprintf(&text, "%s[experiment x]\nguardrails =   \n", g);
	cause = bad(text);
	assert_non_null(strstr(cause, "empty value for 'guardrails'"));
	free(cause);
	free(text);
}

/* Producers, signed and trusted inputs, the unix socket's mode. */
static void
test_auth_keys(void **state)
{
	struct conf *c, *d;

	c = good("[daemon]\nunix = /run/s.sock\n");
	assert_int_equal(c->tcp_signed + c->udp_signed + c->unix_signed +
	    c->redis_signed + c->kafka_signed, 0);
	/* the safe default: only the unix socket is trusted */
	assert_int_equal(c->tcp_trusted, 0);
	assert_int_equal(c->udp_trusted, 0);
	assert_int_equal(c->unix_trusted, 1);
	assert_int_equal(c->redis_trusted, 0);
	assert_int_equal(c->kafka_trusted, 0);
	assert_true(c->signature_tolerance == 300);
	assert_int_equal(c->unix_mode, 0660);
	assert_null(c->unix_group);
	conf_free(c);

	c = good("[daemon]\nunix_signed = yes\nunix_mode = 600\n"
	    "unix_group = stopcock\nsignature_tolerance = 90s\n"
	    "[redis]\nsigned = yes\ntrusted = yes\n"
	    "[producer ferry]\nsecret = whsec_YWJj\n"
	    "previous_secret = whsec_ZGVm\n"
	    "[producer bakery]\nsecret_file = /etc/stopcock/bakery\n"
	    "[experiment e]\naccept_untrusted = yes\n");
	assert_int_equal(c->unix_signed, 1);
	assert_int_equal(c->unix_mode, 0600);
	assert_string_equal(c->unix_group, "stopcock");
	assert_true(c->signature_tolerance == 90);
	assert_int_equal(c->redis_signed, 1);
	assert_int_equal(c->redis_trusted, 1);
	assert_int_equal(c->nproducers, 2);
	assert_string_equal(c->producers[0].name, "ferry");
	assert_string_equal(c->producers[0].previous_secret, "whsec_ZGVm");
	assert_null(c->producers[0].secret_file);
	assert_string_equal(c->producers[1].secret_file,
	    "/etc/stopcock/bakery");
	assert_int_equal(c->experiments[0].accept_untrusted, 1);
	/* the copy owns its strings */
	d = conf_dup(c);
	conf_free(c);
	assert_string_equal(d->producers[0].secret, "whsec_YWJj");
	assert_string_equal(d->producers[1].secret_file,
	    "/etc/stopcock/bakery");
	conf_free(d);
}

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test(test_example_file),
		cmocka_unit_test(test_defaults),
		cmocka_unit_test(test_section_defaults),
		cmocka_unit_test(test_errors),
		cmocka_unit_test(test_auth_keys),
		cmocka_unit_test(test_accepted),
		cmocka_unit_test(test_multiple_errors),
		cmocka_unit_test(test_error_cap),
		cmocka_unit_test(test_all_or_nothing),
		cmocka_unit_test(test_margins),
		cmocka_unit_test(test_plan),
		cmocka_unit_test(test_webhooks),
		cmocka_unit_test(test_section_caps),
		cmocka_unit_test(test_long_lines),
		cmocka_unit_test(test_syntax_variants),
		cmocka_unit_test(test_dup),
		cmocka_unit_test(test_guardrail_for),
		cmocka_unit_test(test_test_names),
		cmocka_unit_test(test_help),
		cmocka_unit_test(test_load_errors),
		cmocka_unit_test(test_experiment_guardrails),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
