/*
 * engines.c: the daemon's engines. d->engine holds the experiments whose
 * records come from sockets, Redis and the HTTP plans (and is what the
 * local checkpoint saves); each Kafka input partition the daemon owns
 * has its own engine (kafka_in.c creates it on assignment and frees it
 * on revocation, so a rebalance moves exactly that partition's
 * experiments). Whatever shows or acts on "the daemon's experiments"
 * (the API, /metrics, the tick, reload, retirement) goes through the
 * list here, so it sees every engine without knowing where they came
 * from. Index 0 is always d->engine.
 *
 * The partitions' engines share one engine_pool, so max_experiments
 * bounds the experiments of all of them together, not each: keys spread
 * over many partitions cannot multiply the memory a daemon holds.
 * (d->engine, which then holds only plans made over HTTP, keeps its own
 * max_experiments.)
 */
#include <stdlib.h>
#include <string.h>

#include "stopcock/log.h"
#include "daemon.h"

#define ENGINES_MAX	8192	/* beyond d->engine; Kafka holds 4096 */

struct engines {
	struct engine	**e;
	size_t		  n;
	size_t		  cap;
	struct engine_pool pool;	/* the partitions' engines' */
};

struct engines *
engines_new(void)
{
	return xcalloc(1, sizeof(struct engines));
}

/* The engines themselves belong to whoever added them. */
void
engines_free(struct engines *es)
{
	if (es == NULL)
		return;
	free(es->e);
	free(es);
}

void
engines_add(struct daemon *d, struct engine *e)
{
	struct engines *es = d->engines;

	if (es->n >= ENGINES_MAX)
		fatalx("engines: more than %d engines", ENGINES_MAX);
	if (es->n == es->cap) {
		es->cap = es->cap == 0 ? 16 : es->cap * 2;
		es->e = xreallocarray(es->e, es->cap, sizeof *es->e);
	}
	es->e[es->n++] = e;
	engine_set_sink(e, dispatch_finding, d->dispatch);
	es->pool.max = d->conf->max_experiments;
	engine_set_pool(e, &es->pool);
}

void
engines_remove(struct daemon *d, struct engine *e)
{
	struct engines *es = d->engines;
	size_t i;

	/* queued findings may point into the engine about to go */
	dispatch_drain(d->dispatch);
	for (i = 0; i < es->n; i++)
		if (es->e[i] == e) {
			engine_set_pool(e, NULL);
			memmove(es->e + i, es->e + i + 1,
			    (es->n - i - 1) * sizeof *es->e);
			es->n--;
			return;
		}
}

struct engine *
engines_at(struct daemon *d, size_t i)
{
	if (i == 0)
		return d->engine;
	return i - 1 < d->engines->n ? d->engines->e[i - 1] : NULL;
}

static void
engines_noop(void *arg, const struct finding *f)
{
}

struct engine *
engines_find(struct daemon *d, const char *experiment)
{
	struct engine *e;
	size_t i;

	for (i = 0; (e = engines_at(d, i)) != NULL; i++)
		if (engine_foreach_in(e, experiment, engines_noop, NULL) == 0)
			return e;
	return NULL;
}

json_t *
engines_json_list(struct daemon *d)
{
	json_t *all = json_array(), *one;
	struct engine *e;
	size_t i;

	for (i = 0; (e = engines_at(d, i)) != NULL; i++) {
		one = engine_json_list(e);
		json_array_extend(all, json_object_get(one, "experiments"));
		json_decref(one);
	}
	return json_pack("{s:o}", "experiments", all);
}

void
engines_counters(struct daemon *d, struct engine_counters *sum)
{
	struct engine_counters c;
	struct engine *e;
	size_t i;
	int k;

	memset(sum, 0, sizeof *sum);
	for (i = 0; (e = engines_at(d, i)) != NULL; i++) {
		engine_counters(e, &c);
		for (k = 0; k < 4; k++)
			sum->applied[k] += c.applied[k];
		for (k = 0; k < ENGINE_NREJECT; k++)
			sum->rejected[k] += c.rejected[k];
		sum->experiments += c.experiments;
		sum->series += c.series;
		sum->tests += c.tests;
		sum->bytes += c.bytes;
		sum->findings += c.findings;
		sum->grouped_series += c.grouped_series;
		sum->srm_late += c.srm_late;
		sum->metric_late += c.metric_late;
		sum->held_forced += c.held_forced;
		sum->held += c.held;
		sum->closing_records += c.closing_records;
	}
}

void
engines_tick(struct daemon *d, double now)
{
	struct engine *e;
	size_t i;

	for (i = 0; (e = engines_at(d, i)) != NULL; i++)
		engine_tick(e, now);
}

/*
 * Reload: every engine takes the new configuration. The main engine
 * decides (its refusal refuses the reload); the partitions' engines
 * hold the same guardrails, so a refusal there is logged, and that
 * engine keeps its old configuration.
 */
int
engines_reconfigure(struct daemon *d, const struct conf *nc, char **cause)
{
	struct engine *e;
	char *why = NULL;
	size_t i;

	if (engine_reconfigure(d->engine, nc, cause) != 0)
		return -1;
	d->engines->pool.max = nc->max_experiments;
	for (i = 1; (e = engines_at(d, i)) != NULL; i++)
		if (engine_reconfigure(e, nc, &why) != 0) {
			log_warnx("reload: a partition's engine kept its "
			    "configuration: %s", why);
			free(why);
			why = NULL;
		}
	return 0;
}

/* An operator changed e (plan, epoch, reset, retire): its owner saves it
 * at its next commit, not only after its next record. */
void
engines_touched(struct daemon *d, struct engine *e)
{
	if (e != d->engine && d->kafka != NULL)
		kafka_in_touched(d->kafka, e);
}
