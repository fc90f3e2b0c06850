/*
 * test_engine.c: the engine end to end on small, seeded streams: routing
 * and every rejection reason, caps, epochs, SRM, harm for each test kind,
 * the untrusted mark, and checkpoint round trips. Statistical values are
 * checked against the statistics module's closed forms (themselves
 * checked against docs/methods.md sec. 10 and scipy in test_stats and
 * tests/ref), so what is tested here is the routing and bookkeeping.
 */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>
#include <gsl/gsl_randist.h>
#include <gsl/gsl_rng.h>

#include "stopcock/conf.h"
#include "stopcock/engine.h"
#include "stopcock/proto.h"
#include "stopcock/stats.h"
#include "stopcock/util.h"

static const char *base_conf =
    "[defaults]\n"
    "alpha = 0.05\n"
    "srm_alpha = 0.001\n"
    "plan_units = 2000\n"
    "max_experiments = 3\n"
    "max_metrics = 4\n"
    "max_variants = 3\n"
    "[guardrail p99]\n"
    "metric = latency_ms\n"
    "test = quantile\n"
    "quantile = 0.99\n"
    "[guardrail render]\n"
    "metric = render_ms\n"
    "test = mean\n"
    "[guardrail errors]\n"
    "metric = server_errors\n"
    "test = proportion\n"
    "action = pause\n"
    "[guardrail crashes]\n"
    "metric = crashes\n"
    "test = rate\n";

struct seen {
	int		 n;
	int		 verdicts, harms, safes, srm, untrusted, pauses, epochs;
	char		 last_guardrail[PROTO_NAME_MAX + 1];
	enum verdict	 last_verdict;
	int		 last_untrusted;
	double		 last_p, last_lower, last_upper, last_est;
	uint64_t	 last_event;
	int		 restarts, retired;
	enum verdict	 restart_previous;
	char		 restart_reason[64];
};

static void
sink(void *arg, const struct finding *f)
{
	struct seen *s = arg;

	s->n++;
	switch (f->kind) {
	case FINDING_VERDICT:
		s->verdicts++;
		s->harms += f->verdict == VERDICT_HARM;
		s->safes += f->verdict == VERDICT_SAFE;
		snprintf(s->last_guardrail, sizeof s->last_guardrail, "%s",
		    f->guardrail);
		s->last_verdict = f->verdict;
		s->last_untrusted = f->untrusted;
		s->last_p = f->p;
		s->last_lower = f->lower;
		s->last_upper = f->upper;
		s->last_est = f->estimate;
		s->last_event = f->event;
		break;
	case FINDING_SRM:
		s->srm++;
		break;
	case FINDING_UNTRUSTED:
		s->untrusted++;
		break;
	case FINDING_PAUSE:
		s->pauses++;
		break;
	case FINDING_EPOCH:
		s->epochs++;
		break;
	case FINDING_RESTART:
		s->restarts++;
		s->restart_previous = f->previous;
		snprintf(s->restart_reason, sizeof s->restart_reason, "%s",
		    f->reason ? f->reason : "");
		snprintf(s->last_guardrail, sizeof s->last_guardrail, "%s",
		    f->guardrail);
		break;
	case FINDING_RETIRED:
		s->retired++;
		break;
	}
}

static struct conf *
load(const char *extra)
{
	struct conf *c;
	char *text, *cause = NULL;

	xasprintf(&text, "%s%s", base_conf, extra ? extra : "");
	if (conf_parse(text, "test.conf", &c, &cause) != 0)
		fail_msg("config: %s", cause);
	free(text);
	return c;
}

struct fx {
	struct conf	*conf;
	struct engine	*eng;
	struct seen	 seen;
	uint64_t	 event;
	double		 now;
};

static int
setup(void **state)
{
	struct fx *fx = xcalloc(1, sizeof *fx);
	uint8_t key[16] = { 1, 2, 3 };

	fx->conf = load(NULL);
	fx->eng = engine_new(fx->conf, key);
	engine_set_sink(fx->eng, sink, &fx->seen);
	fx->now = 1700000000;
	*state = fx;
	return 0;
}

static int
teardown(void **state)
{
	struct fx *fx = *state;

	engine_free(fx->eng);
	conf_free(fx->conf);
	free(fx);
	return 0;
}

/* Apply one protocol line; returns the engine's verdict on it. */
static enum engine_reject feed(struct fx *, const char *, ...)
    SC_PRINTF(2, 3);

static enum engine_reject
feed(struct fx *fx, const char *fmt, ...)
{
	char line[PROTO_LINE_MAX + 1];
	struct record r;
	va_list ap;

	va_start(ap, fmt);
	vsnprintf(line, sizeof line, fmt, ap);
	va_end(ap);
	assert_int_equal(proto_parse(line, strlen(line), &r), PROTO_OK);
	fx->now += 0.01;
	return engine_apply(fx->eng, &r, fx->now, ++fx->event);
}

static void
test_rejections(void **state)
{
	struct fx *fx = *state;
	struct engine_counters c;

	assert_int_equal(feed(fx, "expose shop A"), ENGINE_E_UNPLANNED);
	assert_int_equal(feed(fx, "plan shop A=50 B=50"), ENGINE_OK);
	assert_int_equal(feed(fx, "expose shop C"), ENGINE_E_VARIANT);
	assert_int_equal(feed(fx, "count shop A server_errors 1 2"), ENGINE_OK);
	/* server_errors is read by a proportion guardrail: K <= N */
	assert_int_equal(feed(fx, "count shop A server_errors 3 2"),
	    ENGINE_E_K_GT_N);
	/* a rate metric may have K > N (events over exposure) */
	assert_int_equal(feed(fx, "count shop A crashes 3 2"), ENGINE_OK);
	/* render_ms is read by a mean guardrail: observe only */
	assert_int_equal(feed(fx, "count shop A render_ms 1 2"),
	    ENGINE_E_MISMATCH);
	assert_int_equal(feed(fx, "observe shop A server_errors 1"),
	    ENGINE_E_MISMATCH);
	assert_int_equal(feed(fx, "observe shop A latency_ms 12"), ENGINE_OK);
	assert_int_equal(feed(fx, "observe shop A other 1"), ENGINE_OK);
	/* max_metrics = 4: server_errors, crashes, latency_ms, other */
	assert_int_equal(feed(fx, "observe shop A fifth 1"), ENGINE_E_METRICS);
	assert_int_equal(feed(fx, "plan big A=1 B=1 C=1 D=1"),
	    ENGINE_E_VARIANTS);
	assert_int_equal(feed(fx, "plan e2 A=1 B=1"), ENGINE_OK);
	assert_int_equal(feed(fx, "plan e3 A=1 B=1"), ENGINE_OK);
	assert_int_equal(feed(fx, "plan e4 A=1 B=1"), ENGINE_E_EXPERIMENTS);
	/* a flood of new names past the caps costs counters, not memory */
	{
		struct engine_counters before, after;
		int i;

		engine_counters(fx->eng, &before);
		for (i = 0; i < 20000; i++) {
			assert_int_equal(feed(fx, "plan flood%d A=1 B=1", i),
			    ENGINE_E_EXPERIMENTS);
			assert_int_equal(feed(fx, "observe shop A m%d 1", i),
			    ENGINE_E_METRICS);
		}
		engine_counters(fx->eng, &after);
		assert_int_equal(after.bytes, before.bytes);
		assert_int_equal(after.rejected[ENGINE_E_EXPERIMENTS],
		    before.rejected[ENGINE_E_EXPERIMENTS] + 20000);
	}
	engine_counters(fx->eng, &c);
	assert_int_equal(c.experiments, 3);
	assert_int_equal(c.rejected[ENGINE_E_MISMATCH], 2);
	assert_int_equal(c.rejected[ENGINE_E_EXPERIMENTS], 20001);
	assert_int_equal(c.applied[PROTO_PLAN], 3);
	assert_string_equal(engine_reason(ENGINE_E_K_GT_N), "k_exceeds_n");
}

static void
test_epochs(void **state)
{
	struct fx *fx = *state;
	json_t *j;

	assert_int_equal(feed(fx, "plan ramp control=90 treatment=10"), 0);
	assert_int_equal(feed(fx, "expose ramp control 9"), 0);
	/* the same plan again is not a new epoch */
	assert_int_equal(feed(fx, "plan ramp control=90 treatment=10"), 0);
	assert_int_equal(fx->seen.epochs, 0);
	assert_int_equal(feed(fx, "plan ramp control=50 treatment=50"), 0);
	assert_int_equal(fx->seen.epochs, 1);
	j = engine_json_experiment(fx->eng, "ramp");
	assert_non_null(j);
	assert_int_equal(json_integer_value(json_object_get(j, "epoch")), 2);
	/* exposures restart with the epoch: never pooled across weights */
	assert_int_equal(json_integer_value(json_object_get(json_array_get(
	    json_object_get(j, "arms"), 0), "exposures")), 0);
	assert_int_equal(json_array_size(json_object_get(j, "epochs")), 2);
	json_decref(j);
	assert_null(engine_json_experiment(fx->eng, "nope"));
}

/*
 * SRM: a 50/50 plan receiving 53/47 traffic must fire, and the engine's
 * batch updates over complete intervals must equal the closed-form
 * Bayes factor of all counts once every interval is complete (the
 * Dirichlet-multinomial factor depends on the counts only).
 */
static void
test_srm(void **state)
{
	struct fx *fx = *state;
	json_t *j;
	double counts[2] = { 0, 0 }, theta0[2] = { .5, .5 }, a0[2], k0;
	int i;

	assert_int_equal(feed(fx, "plan srm control=1 treatment=1"), 0);
	for (i = 0; i < 40000 && fx->seen.srm == 0; i++) {
		int arm = (i % 100) < 53 ? 0 : 1;
		feed(fx, "expose srm %s", arm ? "treatment" : "control");
		counts[arm]++;
	}
	assert_int_equal(fx->seen.srm, 1);
	assert_int_equal(fx->seen.untrusted, 1);
	engine_finish(fx->eng, fx->now);
	j = engine_json_experiment(fx->eng, "srm");
	k0 = stats_dm_k0(2000 * 2, 0.001);
	a0[0] = a0[1] = k0 / 2;
	assert_float_equal(json_real_value(json_object_get(json_object_get(j,
	    "srm"), "log_e")), stats_dm_log_bf(2, counts, theta0, a0), 1e-6);
	assert_true(json_real_value(json_object_get(json_object_get(j, "srm"),
	    "p")) <= 0.001);
	assert_true(json_is_true(json_object_get(j, "untrusted")));
	json_decref(j);
}

/*
 * Exposures in per-arm batches: each second 250 of one arm, then 250 of
 * the other, a 50/50 plan followed exactly. Read per record, the factor
 * peaks at log BF 98.8 inside the first second (docs/methods.md, SRM;
 * [L] scipy.special.gammaln); read per complete interval it never rises
 * above 0. The test must stay quiet, and an exposure behind the
 * watermark must be counted as late, not applied.
 */
static void
test_srm_batches(void **state)
{
	struct fx *fx = *state;
	struct engine_counters c;
	json_t *j, *srm;
	double t0 = 1700000000;
	int sec, i;

	assert_int_equal(feed(fx, "@%.3f plan batch control=1 treatment=1",
	    t0), 0);
	for (sec = 0; sec < 600; sec++) {
		double t = t0 + sec;
		/* one exposure from a host whose clock is a year ahead must
		 * not close every interval before its time */
		if (sec == 10)
			assert_int_equal(feed(fx, "@%.3f expose batch control",
			    t0 + 3.2e7), 0);
		for (i = 0; i < 250; i++)
			assert_int_equal(feed(fx, "@%.3f expose batch %s", t,
			    sec % 2 ? "treatment" : "control"), 0);
		for (i = 0; i < 250; i++)
			assert_int_equal(feed(fx, "@%.3f expose batch %s", t,
			    sec % 2 ? "control" : "treatment"), 0);
	}
	/* ten minutes behind the newest: beyond the 30-second lateness */
	assert_int_equal(feed(fx, "@%.3f expose batch control", t0), 0);
	engine_finish(fx->eng, t0 + 600);
	assert_int_equal(fx->seen.srm, 0);
	j = engine_json_experiment(fx->eng, "batch");
	srm = json_object_get(j, "srm");
	/* the always-valid p is 1 exactly when the running max stayed <= 0 */
	assert_true(json_number_value(json_object_get(srm, "p")) == 1);
	assert_int_equal(json_integer_value(json_array_get(json_object_get(
	    json_object_get(j, "late"), "srm_exposures"), 0)), 1);
	engine_counters(fx->eng, &c);
	/* the stale one behind the watermark and the one far ahead */
	assert_int_equal(c.srm_late, 2);
	assert_int_equal(json_integer_value(json_array_get(json_object_get(
	    json_object_get(j, "late"), "srm_ahead"), 0)), 1);
	json_decref(j);
}

/*
 * Event time for metric records: render_ms falls over the first minutes
 * in both arms alike (a cold start), and the treatment's records are
 * delivered 25 s behind the control's. Compared in arrival order the
 * treatment holds older, slower requests and looks harmful; up to the
 * watermark common to both arms it does not. A record later than the
 * lateness is applied at once and counted, never dropped.
 */
static void
test_aligned_arms(void **state)
{
	struct fx *fx = *state;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	struct engine_counters c;
	double t0 = 1700000000, t, held_seen = 0;
	json_t *j;
	int s, i;

	gsl_rng_set(rng, 11);
	assert_int_equal(feed(fx, "@%.3f plan cold control=1 treatment=1",
	    t0), 0);
	for (s = 0; s < 300; s++)
		for (i = 0; i < 10; i++) {
			t = t0 + s + i / 10.0;
			assert_int_equal(feed(fx, "@%.3f observe cold control "
			    "render_ms %.4f", t, 100 + 300 * exp(-(t - t0) /
			    60) + gsl_ran_gaussian(rng, 5)), 0);
			if (t - 25 < t0)
				continue;
			assert_int_equal(feed(fx, "@%.3f observe cold "
			    "treatment render_ms %.4f", t - 25, 100 + 300 *
			    exp(-(t - 25 - t0) / 60) + gsl_ran_gaussian(rng,
			    5)), 0);
			engine_counters(fx->eng, &c);
			if ((double)c.held > held_seen)
				held_seen = (double)c.held;
		}
	/* the control waits for the treatment: about 25 s of its records */
	assert_true(held_seen >= 200 && held_seen <= 300);
	assert_int_equal(fx->seen.harms, 0);
	/* 60 s behind the newest record: beyond the 30-second lateness */
	assert_int_equal(feed(fx, "@%.3f observe cold control render_ms 100",
	    t0 + 240), 0);
	engine_counters(fx->eng, &c);
	assert_int_equal(c.metric_late, 1);
	/* the metric falls silent for longer than the lateness: a tick
	 * applies what it held, and records that come later are on time */
	fx->now += 31;
	engine_tick(fx->eng, fx->now);
	engine_counters(fx->eng, &c);
	assert_int_equal(c.held, 0);
	assert_int_equal(feed(fx, "@%.3f observe cold control render_ms 100",
	    t0 + 301), 0);
	assert_int_equal(feed(fx, "@%.3f observe cold treatment render_ms 100",
	    t0 + 301), 0);
	engine_counters(fx->eng, &c);
	assert_int_equal(c.metric_late, 1);
	engine_finish(fx->eng, fx->now);
	engine_counters(fx->eng, &c);
	assert_int_equal(c.held, 0);
	j = engine_json_experiment(fx->eng, "cold");
	assert_non_null(j);
	json_decref(j);
	assert_int_equal(fx->seen.harms, 0);
	gsl_rng_free(rng);
}

/*
 * Records naming the previous epoch (epoch=) after a ramp step count in
 * that epoch while it is closing (epoch_grace, 10 min by default), and
 * its evidence joins the experiment's: a treatment harmful on the late
 * records of epoch 1 is found after the step. The closing epoch is in the
 * state image; after the grace such records are refused and counted.
 */
static void
test_closing_epoch(void **state)
{
	struct fx *fx = *state;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	uint8_t key[16] = { 1, 2, 3 };
	struct engine_counters c;
	struct engine *copy;
	char *cause = NULL;
	json_t *a, *b, *j, *late;
	int i;

	gsl_rng_set(rng, 5);
	assert_int_equal(feed(fx, "plan ramp control=50 treatment=50"), 0);
	for (i = 0; i < 100; i++) {
		feed(fx, "observe ramp control render_ms %.4f",
		    100 + gsl_ran_gaussian(rng, 10));
		feed(fx, "observe ramp treatment render_ms %.4f",
		    100 + gsl_ran_gaussian(rng, 10));
	}
	assert_int_equal(feed(fx, "plan ramp control=40 treatment=60"), 0);
	for (i = 0; i < 400 && fx->seen.harms == 0; i++) {
		assert_int_equal(feed(fx, "observe ramp control render_ms %.4f "
		    "epoch=1", 100 + gsl_ran_gaussian(rng, 10)), 0);
		assert_int_equal(feed(fx, "observe ramp treatment render_ms "
		    "%.4f epoch=1", 108 + gsl_ran_gaussian(rng, 10)), 0);
		if (i == 150) {
			/* the closing epoch survives a checkpoint */
			a = engine_save(fx->eng);
			copy = engine_restore(fx->conf, key, a, &cause);
			if (copy == NULL)
				fail_msg("restore: %s", cause);
			b = engine_save(copy);
			assert_true(json_equal(a, b));
			json_decref(a);
			json_decref(b);
			engine_free(copy);
		}
	}
	/* found on epoch 1's late records, reported by the live epoch */
	assert_int_equal(fx->seen.harms, 1);
	assert_string_equal(fx->seen.last_guardrail, "render");
	/* the alert shows the estimate its evidence came from: about +8 */
	assert_true(fx->seen.last_est > 2 && fx->seen.last_est < 14);
	j = engine_json_experiment(fx->eng, "ramp");
	late = json_object_get(j, "late");
	assert_int_equal(json_integer_value(json_object_get(late,
	    "closed_epoch_records")), 0);
	assert_int_equal(json_integer_value(json_object_get(json_object_get(
	    late, "closing_epoch"), "records")), 2 * i);
	json_decref(j);
	engine_counters(fx->eng, &c);
	assert_int_equal(c.closing_records, (uint64_t)(2 * i));
	/* past the grace the epoch is closed for good */
	engine_tick(fx->eng, fx->now + 601);
	assert_int_equal(feed(fx, "observe ramp control render_ms 100 "
	    "epoch=1"), ENGINE_E_CLOSED_EPOCH);
	j = engine_json_experiment(fx->eng, "ramp");
	late = json_object_get(j, "late");
	assert_true(json_is_null(json_object_get(late, "closing_epoch")));
	assert_int_equal(json_integer_value(json_object_get(late,
	    "closed_epoch_records")), 1);
	json_decref(j);
	gsl_rng_free(rng);
}

/* A clearly slower treatment: the mean guardrail must find harm, with
 * the CS beyond zero and the estimate inside it. */
static void
test_mean_harm(void **state)
{
	struct fx *fx = *state;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	int i;

	gsl_rng_set(rng, 7);
	feed(fx, "plan m control=50 treatment=50");
	for (i = 0; i < 4000 && fx->seen.harms == 0; i++) {
		feed(fx, "observe m control render_ms %.6f",
		    100 + gsl_ran_gaussian(rng, 10));
		feed(fx, "observe m treatment render_ms %.6f",
		    105 + gsl_ran_gaussian(rng, 10));
	}
	gsl_rng_free(rng);
	assert_int_equal(fx->seen.harms, 1);
	assert_string_equal(fx->seen.last_guardrail, "render");
	assert_true(fx->seen.last_p <= 0.05 / 4);
	assert_true(fx->seen.last_lower > 0);
	assert_true(fx->seen.last_est >= fx->seen.last_lower &&
	    fx->seen.last_est <= fx->seen.last_upper);
	assert_int_equal(fx->seen.last_untrusted, 0);
	/* found at the record that completed the evidence */
	assert_true(fx->seen.last_event + 1 >= fx->event &&
	    fx->seen.last_event <= fx->event);
}

/* Clustered errors: the proportion guardrail fires harm and, being a
 * pause guardrail, a pause finding once p falls under pause_alpha. */
static void
test_proportion_harm_and_pause(void **state)
{
	struct fx *fx = *state;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	int i, n;

	gsl_rng_set(rng, 11);
	feed(fx, "plan p control=50 treatment=50");
	for (i = 0; i < 20000 && fx->seen.pauses == 0; i++) {
		n = 1 + (int)gsl_ran_poisson(rng, 4);
		feed(fx, "count p control server_errors %u %d",
		    gsl_ran_binomial(rng, 0.02, (unsigned)n), n);
		feed(fx, "count p treatment server_errors %u %d",
		    gsl_ran_binomial(rng, 0.04, (unsigned)n), n);
	}
	gsl_rng_free(rng);
	assert_int_equal(fx->seen.harms, 1);
	assert_int_equal(fx->seen.pauses, 1);
	assert_string_equal(fx->seen.last_guardrail, "errors");
}

/* Crash rate doubles in the treatment: the rate test fires harm, with
 * its lower bound (inverted from the same one-sided test) above zero. */
static void
test_rate_harm(void **state)
{
	struct fx *fx = *state;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	int i;

	gsl_rng_set(rng, 5);
	feed(fx, "plan r control=50 treatment=50");
	for (i = 0; i < 20000 && fx->seen.harms == 0; i++) {
		feed(fx, "count r control crashes %u 0.5",
		    gsl_ran_poisson(rng, 0.01));
		feed(fx, "count r treatment crashes %u 0.5",
		    gsl_ran_poisson(rng, 0.02));
		/* rate tests run on the tick, not per record */
		if (i % 100 == 99)
			engine_tick(fx->eng, fx->now);
	}
	gsl_rng_free(rng);
	assert_int_equal(fx->seen.harms, 1);
	assert_string_equal(fx->seen.last_guardrail, "crashes");
	assert_true(fx->seen.last_lower > 0);
}

/* p99 latency 30% higher: found at a tick, not on apply. */
static void
test_quantile_harm_on_tick(void **state)
{
	struct fx *fx = *state;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	int i;

	gsl_rng_set(rng, 3);
	feed(fx, "plan q control=50 treatment=50");
	for (i = 0; i < 30000; i++) {
		feed(fx, "observe q control latency_ms %.4f",
		    exp(4 + 0.5 * gsl_ran_gaussian(rng, 1)));
		feed(fx, "observe q treatment latency_ms %.4f",
		    1.3 * exp(4 + 0.5 * gsl_ran_gaussian(rng, 1)));
	}
	gsl_rng_free(rng);
	assert_int_equal(fx->seen.harms, 0);
	engine_tick(fx->eng, fx->now);
	assert_int_equal(fx->seen.harms, 1);
	assert_string_equal(fx->seen.last_guardrail, "p99");
	assert_true(fx->seen.last_lower > 0);
}

/*
 * A quantile's windowed view: the change, over the last hour of record
 * time, in the share of values beyond the control's frozen p99. The
 * treatment turns 30% slower half way: its share beyond the threshold
 * grows from 1% to 3.58% (lognormal sigma 0.5: P(Z > z_0.99 - ln(1.3) /
 * 0.5) = scipy.stats.norm.sf(2.32635 - 0.52473) = 0.03580), so the last
 * hour (which holds only the slow half) reads about +2.58 points. The
 * threshold is frozen from 500 records, so it is the p98.5 to p99.5 (rank
 * uncertain by about sqrt(5) records): between +1.51 and +3.49 points by
 * the same formula at those quantiles (scipy), hence the range.
 */
static void
test_quantile_windows(void **state)
{
	struct fx *fx = *state;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	double t0 = 1700000000, t;
	const json_t *tj = NULL, *w, *v;
	json_t *j;
	size_t k;
	int i;

	gsl_rng_set(rng, 21);
	feed(fx, "@%.0f plan qw control=50 treatment=50", t0);
	for (i = 0; i < 40000; i++) {
		/* one record per arm every 0.25 s: 10000 s, the slow half
		 * starts at 5000 s, well over an hour before the end */
		t = t0 + i * 0.25;
		/* the caller's clock is the record time, as in replay */
		fx->now = t - 0.01;
		feed(fx, "@%.3f observe qw control latency_ms %.4f", t,
		    exp(4 + 0.5 * gsl_ran_gaussian(rng, 1)));
		feed(fx, "@%.3f observe qw treatment latency_ms %.4f", t,
		    (i >= 20000 ? 1.3 : 1) * exp(4 + 0.5 *
		    gsl_ran_gaussian(rng, 1)));
		if (i % 200 == 0)
			engine_tick(fx->eng, fx->now);
	}
	engine_tick(fx->eng, fx->now);
	gsl_rng_free(rng);
	j = engine_json_experiment(fx->eng, "qw");
	json_array_foreach(json_object_get(j, "tests"), k, v)
		if (strcmp(json_string_value(json_object_get(v, "guardrail")),
		    "p99") == 0)
			tj = v;
	assert_non_null(tj);
	assert_string_equal(json_string_value(json_object_get(tj,
	    "recent_measure")), "share_beyond");
	assert_true(json_number_value(json_object_get(tj,
	    "recent_threshold")) > 0);
	w = json_array_get(json_object_get(tj, "recent"), 0);
	/* 14400 records per arm in the hour: +-0.25 points of noise */
	assert_true(json_number_value(json_object_get(w, "estimate")) > 0.012);
	assert_true(json_number_value(json_object_get(w, "estimate")) < 0.040);
	json_decref(j);
}

/*
 * Plausible values (issue 12, item 2): a guardrail's min and max refuse,
 * and count, values no test should see (a forged 1e9 ms latency, a
 * negative one), whatever guardrail kind reads the metric; the values
 * around them count as usual.
 */
static void
test_implausible(void **state)
{
	struct fx *fx = *state;
	struct engine_counters c;

	engine_free(fx->eng);
	conf_free(fx->conf);
	fx->conf = load("[guardrail render_cap]\nmetric = render_ms\n"
	    "test = quantile\nquantile = 0.9\nmin = 0\nmax = 60000\n");
	fx->eng = engine_new(fx->conf, (const uint8_t *)"0123456789abcdef");
	engine_set_sink(fx->eng, sink, &fx->seen);
	assert_int_equal(feed(fx, "plan pl control=1 treatment=1"), 0);
	assert_int_equal(feed(fx, "observe pl control render_ms 120"), 0);
	assert_int_equal(feed(fx, "observe pl treatment render_ms 1e9"),
	    ENGINE_E_IMPLAUSIBLE);
	assert_int_equal(feed(fx, "observe pl treatment render_ms -5"),
	    ENGINE_E_IMPLAUSIBLE);
	assert_int_equal(feed(fx, "observe pl treatment render_ms 60000"), 0);
	/* a metric no bounded guardrail reads takes any finite value */
	assert_int_equal(feed(fx, "observe pl treatment latency_ms 1e9"), 0);
	engine_counters(fx->eng, &c);
	assert_int_equal(c.rejected[ENGINE_E_IMPLAUSIBLE], 2);
	assert_string_equal(engine_reason(ENGINE_E_IMPLAUSIBLE), "implausible");
}

/* declared_only: plan records may plan only experiments the config
 * declares (forged plans cannot fill max_experiments); the operator's
 * plan action is not bound by it. */
static void
test_declared_only(void **state)
{
	struct fx *fx = *state;
	char *cause = NULL, *text;
	struct proto_arm arms[2] = { { "control", 1 }, { "b", 1 } };

	engine_free(fx->eng);
	conf_free(fx->conf);
	xasprintf(&text, "[defaults]\ndeclared_only = yes\n%s[experiment "
	    "known]\n", base_conf + strlen("[defaults]\n"));
	if (conf_parse(text, "test.conf", &fx->conf, &cause) != 0)
		fail_msg("config: %s", cause);
	free(text);
	fx->eng = engine_new(fx->conf, (const uint8_t *)"0123456789abcdef");
	engine_set_sink(fx->eng, sink, &fx->seen);
	assert_int_equal(feed(fx, "plan known control=1 b=1"), 0);
	assert_int_equal(feed(fx, "plan forged control=1 b=1"),
	    ENGINE_E_UNDECLARED);
	assert_int_equal(feed(fx, "expose forged control"),
	    ENGINE_E_UNPLANNED);
	assert_int_equal(engine_plan(fx->eng, "by_hand", arms, 2, fx->now,
	    &cause), 0);
	free(cause);
}

/* One line from an input that is (untrusted 1) or is not trusted. */
static enum engine_reject
feed_from(struct engine *eng, int untrusted, double now, uint64_t ev,
    const char *line)
{
	struct record r;

	assert_int_equal(proto_parse(line, strlen(line), &r), PROTO_OK);
	assert_int_equal(r.untrusted, 0);	/* the parser trusts no one */
	r.untrusted = (uint8_t)untrusted;
	return engine_apply(eng, &r, now, ev);
}

/*
 * Shards (a daemon's Kafka partitions): a configured experiment is
 * planned by its first record, not in every shard at creation; shards
 * sharing an engine_pool hold max experiments together, and an engine
 * that leaves the pool gives its count back.
 */
static void
test_shard_pool(void **state)
{
	static const char *text = "[experiment planned]\n"
	    "plan = control=50 b=50\n";
	struct conf *c = load(text);
	uint8_t key[16] = { 4 };
	struct engine_pool pool = { 0, 3 };
	struct engine *plain, *s1, *s2;
	struct engine_counters ec;
	json_t *st;

	plain = engine_new(c, key);
	s1 = engine_new_shard(c, key);
	s2 = engine_new_shard(c, key);
	engine_counters(plain, &ec);
	assert_int_equal(ec.experiments, 1);	/* planned at creation */
	engine_counters(s1, &ec);
	assert_int_equal(ec.experiments, 0);	/* not in a shard */
	engine_set_pool(s1, &pool);
	engine_set_pool(s2, &pool);
	assert_int_equal(feed_from(s1, 0, 10, 1, "expose planned b"),
	    ENGINE_OK);
	engine_counters(s1, &ec);
	assert_int_equal(ec.experiments, 1);	/* its first record planned it */
	assert_int_equal(feed_from(s1, 0, 10, 2, "expose stranger b"),
	    ENGINE_E_UNPLANNED);		/* only configured ones */
	assert_int_equal(feed_from(s2, 0, 10, 3, "plan x1 a=50 b=50"),
	    ENGINE_OK);
	assert_int_equal(feed_from(s1, 0, 10, 4, "plan x2 a=50 b=50"),
	    ENGINE_OK);
	assert_int_equal(pool.used, 3);
	/* full across the two: a third shard experiment is refused */
	assert_int_equal(feed_from(s2, 0, 10, 5, "plan x3 a=50 b=50"),
	    ENGINE_E_EXPERIMENTS);
	/* nor may s2 plan the configured one (s1 holds it) */
	assert_int_equal(feed_from(s2, 0, 10, 6, "expose planned b"),
	    ENGINE_E_EXPERIMENTS);
	assert_int_equal(pool.used, 3);
	engine_counters(s2, &ec);
	assert_int_equal(ec.experiments, 1);
	/* a shard restored from its image is still a shard */
	st = engine_save(s1);
	engine_set_pool(s1, NULL);
	assert_int_equal(pool.used, 1);
	engine_free(s1);
	s1 = engine_restore_shard(c, key, st, &(char *){ NULL });
	assert_non_null(s1);
	json_decref(st);
	engine_counters(s1, &ec);
	assert_int_equal(ec.experiments, 2);	/* planned and x2, no more */
	engine_set_pool(s1, &pool);
	assert_int_equal(pool.used, 3);
	engine_free(s1);			/* leaves the pool */
	engine_free(s2);
	assert_int_equal(pool.used, 0);
	engine_free(plain);
	conf_free(c);
}

static long long
untrusted_of(const struct engine *eng, const char *id)
{
	json_t *x = engine_json_experiment(eng, id);
	long long n;

	assert_non_null(x);
	n = json_integer_value(json_object_get(x, "untrusted_records"));
	json_decref(x);
	return n;
}

/*
 * Untrusted records never reach an experiment a guardrail may pause
 * (untrusted_input), unless its section accepts them; where they are
 * applied they are counted, and the count survives the state image.
 */
static void
test_untrusted(void **state)
{
	static const char *text =
	    "[guardrail errs]\nmetric = errs\ntest = proportion\n"
	    "harm = increase\naction = pause\n\n"
	    "[guardrail slow]\nmetric = slow_ms\ntest = mean\n"
	    "harm = increase\n\n"
	    "[experiment quiet]\nplan = control=50 b=50\nguardrails = slow\n"
	    "\n[experiment guarded]\nplan = control=50 b=50\n\n"
	    "[experiment opened]\nplan = control=50 b=50\n"
	    "accept_untrusted = yes\n";
	uint8_t key[16] = { 9 };
	struct engine_counters c;
	struct engine *eng, *copy;
	struct conf *conf;
	json_t *img;
	char *cause = NULL;
	double now = 1700000000;
	uint64_t ev = 0;

	(void)state;
	if (conf_parse(text, "untrusted.conf", &conf, &cause) != 0)
		fail_msg("config: %s", cause);
	eng = engine_new(conf, key);
	/* a new experiment whose family (every guardrail) may pause */
	assert_int_equal(feed_from(eng, 1, now, ++ev,
	    "plan forged control=1 b=1"), ENGINE_E_UNTRUSTED);
	/* one whose family only alerts may be planned */
	assert_int_equal(feed_from(eng, 1, now, ++ev,
	    "plan alerting control=1 b=1 guardrails=slow"), ENGINE_OK);
	assert_int_equal(feed_from(eng, 1, now, ++ev,
	    "expose alerting b"), ENGINE_OK);
	assert_int_equal(feed_from(eng, 1, now, ++ev,
	    "expose quiet control"), ENGINE_OK);
	assert_int_equal(feed_from(eng, 1, now, ++ev,
	    "observe quiet control slow_ms 12.5"), ENGINE_OK);
	assert_int_equal(feed_from(eng, 1, now, ++ev,
	    "expose guarded control"), ENGINE_E_UNTRUSTED);
	assert_int_equal(feed_from(eng, 1, now, ++ev,
	    "count guarded b errs 1 1"), ENGINE_E_UNTRUSTED);
	assert_int_equal(feed_from(eng, 0, now, ++ev,
	    "expose guarded control"), ENGINE_OK);
	assert_int_equal(feed_from(eng, 1, now, ++ev,
	    "expose opened control"), ENGINE_OK);
	assert_int_equal(feed_from(eng, 0, now, ++ev,
	    "expose opened b"), ENGINE_OK);
	assert_int_equal(untrusted_of(eng, "quiet"), 2);
	assert_int_equal(untrusted_of(eng, "alerting"), 1);
	assert_int_equal(untrusted_of(eng, "guarded"), 0);
	assert_int_equal(untrusted_of(eng, "opened"), 1);
	engine_counters(eng, &c);
	assert_int_equal(c.rejected[ENGINE_E_UNTRUSTED], 3);
	assert_string_equal(engine_reason(ENGINE_E_UNTRUSTED),
	    "untrusted_input");

	img = engine_save(eng);
	copy = engine_restore(conf, key, img, &cause);
	assert_non_null(copy);
	assert_int_equal(untrusted_of(copy, "quiet"), 2);
	assert_int_equal(untrusted_of(copy, "opened"), 1);
	/* a new epoch starts the count afresh */
	assert_int_equal(feed_from(copy, 0, now, ++ev,
	    "plan quiet control=60 b=40"), ENGINE_OK);
	assert_int_equal(untrusted_of(copy, "quiet"), 0);
	json_decref(img);
	engine_free(copy);
	engine_free(eng);
	conf_free(conf);
}

/* Save, restore, save again: the same image; and both engines then
 * evolve identically under the same further records. */
static void
test_save_restore(void **state)
{
	struct fx *fx = *state;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	struct engine *copy;
	json_t *a, *b;
	char *cause = NULL;
	uint8_t key[16] = { 9 };
	struct record r;
	char line[256];
	int i;

	gsl_rng_set(rng, 1);
	feed(fx, "plan s control=50 treatment=50");
	for (i = 0; i < 3000; i++) {
		feed(fx, "expose s %s", i % 2 ? "control" : "treatment");
		/* units of three records each: unit groups, the quantile's
		 * exceedance groups and the detector all enter the image */
		feed(fx, "observe s %s latency_ms %.3f unit=u%d",
		    i % 2 ? "control" : "treatment",
		    exp(3 + gsl_ran_gaussian(rng, 1)), i / 6 * 2 + i % 2);
		feed(fx, "count s %s server_errors %d 3 unit=u%d",
		    i % 2 ? "control" : "treatment", i % 7 == 0,
		    i / 6 * 2 + i % 2);
	}
	engine_tick(fx->eng, fx->now);
	a = engine_save(fx->eng);
	assert_non_null(json_object_get(json_array_get(json_object_get(
	    json_array_get(json_object_get(json_array_get(json_object_get(a,
	    "experiments"), 0), "metrics"), 0), "series"), 0), "groups"));
	copy = engine_restore(fx->conf, key, a, &cause);
	if (copy == NULL)
		fail_msg("restore: %s", cause);
	b = engine_save(copy);
	assert_true(json_equal(a, b));
	json_decref(b);
	for (i = 0; i < 500; i++) {
		snprintf(line, sizeof line, "observe s treatment latency_ms %.3f",
		    exp(3.2 + gsl_ran_gaussian(rng, 1)));
		assert_int_equal(proto_parse(line, strlen(line), &r), PROTO_OK);
		engine_apply(fx->eng, &r, fx->now + i, 99999 + (uint64_t)i);
		engine_apply(copy, &r, fx->now + i, 99999 + (uint64_t)i);
	}
	engine_tick(fx->eng, fx->now + 600);
	engine_tick(copy, fx->now + 600);
	json_decref(a);
	a = engine_save(fx->eng);
	b = engine_save(copy);
	assert_true(json_equal(a, b));
	json_decref(a);
	json_decref(b);
	engine_free(copy);
	gsl_rng_free(rng);

	/* foreign and damaged images are refused, never half-loaded */
	a = json_pack("{s:s, s:i, s:[]}", "format", "something-else",
	    "version", 1, "experiments");
	assert_null(engine_restore(fx->conf, key, a, &cause));
	free(cause);
	cause = NULL;
	json_decref(a);
	a = json_pack("{s:s, s:i, s:[{s:s}]}", "format", "stopcock-engine",
	    "version", 1, "experiments", "id", "bad name!");
	assert_null(engine_restore(fx->conf, key, a, &cause));
	assert_non_null(cause);
	free(cause);
	json_decref(a);
}

/* Reload: tallies survive, a changed guardrail's test restarts. */
static void
test_reconfigure(void **state)
{
	struct fx *fx = *state;
	struct conf *c2;
	char *cause = NULL;
	json_t *j;
	int i;

	feed(fx, "plan rc control=50 treatment=50");
	for (i = 0; i < 100; i++)
		feed(fx, "expose rc %s", i % 2 ? "control" : "treatment");
	c2 = load("[guardrail extra]\nmetric = checkout_ms\ntest = mean\n");
	assert_int_equal(engine_reconfigure(fx->eng, c2, &cause), 0);
	j = engine_json_experiment(fx->eng, "rc");
	assert_int_equal(json_integer_value(json_object_get(json_array_get(
	    json_object_get(j, "arms"), 1), "exposures")), 50);
	/* 5 guardrails x 1 treatment arm */
	assert_int_equal(json_integer_value(json_object_get(j, "family")), 5);
	assert_int_equal(json_array_size(json_object_get(j, "guardrails")), 5);
	json_decref(j);
	conf_free(c2);
}

/* The base configuration with up to two edits (from -> to). */
static struct conf *
load_edit(const char *from, const char *to, const char *from2,
    const char *to2)
{
	struct conf *c;
	const char *at;
	char *text, *next, *cause = NULL;

	at = strstr(base_conf, from);
	assert_non_null(at);
	xasprintf(&text, "%.*s%s%s", (int)(at - base_conf), base_conf, to,
	    at + strlen(from));
	if (from2 != NULL) {
		at = strstr(text, from2);
		assert_non_null(at);
		xasprintf(&next, "%.*s%s%s", (int)(at - text), text, to2,
		    at + strlen(from2));
		free(text);
		text = next;
	}
	if (conf_parse(text, "test.conf", &c, &cause) != 0)
		fail_msg("config: %s", cause);
	free(text);
	return c;
}

/* The image entry of one test (guardrail x variant), borrowed. */
static json_t *
image_test(json_t *image, const char *guardrail)
{
	json_t *tests = json_object_get(json_array_get(json_object_get(image,
	    "experiments"), 0), "tests"), *t;
	size_t i;

	json_array_foreach(tests, i, t)
		if (strcmp(json_string_value(json_object_get(t, "guardrail")),
		    guardrail) == 0)
			return t;
	return NULL;
}

/*
 * Issue 13, item 1: a reload that leaves every guardrail as it was keeps
 * the whole state exactly (the verdict, its evidence, the epoch still
 * closing and the records held for the watermark); one that changes a
 * margin restarts that guardrail alone and says so with the verdict it
 * held; one that removes a guardrail says so too. Never a silent drop.
 */
static void
test_reload_keeps_verdicts(void **state)
{
	struct fx *fx = *state;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	struct engine_counters c;
	struct conf *same, *changed, *removed;
	char *cause = NULL;
	json_t *a, *b, *ta, *tb;
	const char *g;
	int i, harms;

	gsl_rng_set(rng, 13);
	feed(fx, "plan r control=50 treatment=50");
	for (i = 0; i < 50; i++) {
		feed(fx, "observe r control render_ms %.4f",
		    100 + gsl_ran_gaussian(rng, 10));
		feed(fx, "observe r treatment render_ms %.4f",
		    100 + gsl_ran_gaussian(rng, 10));
	}
	/* a ramp step: epoch 1 stays open for epoch= records */
	feed(fx, "plan r control=40 treatment=60");
	for (i = 0; i < 4000 && fx->seen.harms == 0; i++) {
		feed(fx, "observe r control render_ms %.4f",
		    100 + gsl_ran_gaussian(rng, 10));
		feed(fx, "observe r treatment render_ms %.4f",
		    110 + gsl_ran_gaussian(rng, 10));
	}
	assert_int_equal(fx->seen.harms, 1);
	assert_int_equal(feed(fx, "observe r control render_ms 100 epoch=1"),
	    ENGINE_OK);
	/* treatment records ahead of the control's wait for the watermark */
	for (i = 0; i < 5; i++)
		assert_int_equal(feed(fx, "@%.3f observe r treatment "
		    "render_ms 111", fx->now + 20), ENGINE_OK);
	engine_counters(fx->eng, &c);
	assert_true(c.held > 0);

	same = load(NULL);
	a = engine_save(fx->eng);
	assert_int_equal(engine_reconfigure(fx->eng, same, &cause), 0);
	b = engine_save(fx->eng);
	assert_true(json_equal(a, b));
	assert_int_equal(fx->seen.restarts, 0);
	/* the closing epoch still takes its records */
	assert_int_equal(feed(fx, "observe r control render_ms 100 epoch=1"),
	    ENGINE_OK);
	json_decref(a);
	json_decref(b);

	/* a new margin on render: that test alone starts afresh */
	a = engine_save(fx->eng);
	changed = load_edit("test = mean\n", "test = mean\nmargin = 1\n",
	    NULL, NULL);
	assert_int_equal(engine_reconfigure(fx->eng, changed, &cause), 0);
	b = engine_save(fx->eng);
	assert_int_equal(fx->seen.restarts, 1);
	assert_string_equal(fx->seen.last_guardrail, "render");
	assert_int_equal(fx->seen.restart_previous, VERDICT_HARM);
	assert_string_equal(fx->seen.restart_reason, "margin changed");
	assert_int_equal(json_integer_value(json_object_get(image_test(b,
	    "render"), "verdict")), VERDICT_UNDECIDED);
	/* the API says which test restarted, why, and what it held */
	{
		json_t *x = engine_json_experiment(fx->eng, "r"), *t, *rs;
		size_t k;
		int seen = 0;
		json_array_foreach(json_object_get(x, "tests"), k, t) {
			rs = json_object_get(t, "restarted");
			if (strcmp(json_string_value(json_object_get(t,
			    "guardrail")), "render") != 0) {
				assert_null(rs);
				continue;
			}
			seen++;
			assert_string_equal(json_string_value(json_object_get(
			    rs, "reason")), "margin changed");
			assert_string_equal(json_string_value(json_object_get(
			    rs, "previous")), "harm");
		}
		assert_int_equal(seen, 1);
		json_decref(x);
	}
	for (i = 0; i < 3; i++) {
		g = (const char *[]){ "p99", "errors", "crashes" }[i];
		ta = image_test(a, g);
		tb = image_test(b, g);
		assert_non_null(ta);
		assert_non_null(tb);
		assert_true(json_equal(ta, tb));
	}
	json_decref(a);
	json_decref(b);
	/* the new evidence decides: still +10 ms, beyond a 1 ms margin */
	harms = fx->seen.harms;
	for (i = 0; i < 4000 && fx->seen.harms == harms; i++) {
		feed(fx, "observe r control render_ms %.4f",
		    100 + gsl_ran_gaussian(rng, 10));
		feed(fx, "observe r treatment render_ms %.4f",
		    110 + gsl_ran_gaussian(rng, 10));
	}
	assert_int_equal(fx->seen.harms, harms + 1);

	/* a removed guardrail: its last state is reported, then it goes */
	removed = load_edit("test = mean\n", "test = mean\nmargin = 1\n",
	    "[guardrail crashes]\nmetric = crashes\ntest = rate\n", "");
	assert_int_equal(engine_reconfigure(fx->eng, removed, &cause), 0);
	assert_int_equal(fx->seen.restarts, 2);
	assert_string_equal(fx->seen.last_guardrail, "crashes");
	assert_string_equal(fx->seen.restart_reason, "guardrail removed");
	a = engine_save(fx->eng);
	assert_null(image_test(a, "crashes"));
	json_decref(a);
	conf_free(same);
	conf_free(changed);
	conf_free(removed);
	gsl_rng_free(rng);
}

/*
 * Issue 13, item 4: with max_experiments = 3 a fourth experiment is
 * refused until one is retired; the retired one comes back whole as an
 * archive (its exposures, its held records applied), says so in a
 * finding, and is gone (its records are unplanned again).
 */
static void
test_retire(void **state)
{
	struct fx *fx = *state;
	json_t *archive = NULL, *st;
	char *cause = NULL;
	double t0;
	int i;

	assert_int_equal(feed(fx, "plan a control=50 treatment=50"), 0);
	assert_int_equal(feed(fx, "plan b control=50 treatment=50"), 0);
	assert_int_equal(feed(fx, "plan c control=50 treatment=50"), 0);
	assert_int_equal(feed(fx, "plan d control=50 treatment=50"),
	    ENGINE_E_EXPERIMENTS);
	for (i = 0; i < 10; i++)
		feed(fx, "expose b %s", i % 2 ? "control" : "treatment");
	/* waiting for the control's records to catch up */
	assert_int_equal(feed(fx, "@%.3f observe b treatment render_ms 7",
	    fx->now + 20), 0);
	assert_int_equal(engine_retire(fx->eng, "nope", NULL, fx->now,
	    &archive, &cause), -1);
	assert_null(archive);
	assert_non_null(cause);
	free(cause);
	assert_int_equal(engine_retire(fx->eng, "b", "operator", fx->now,
	    &archive, &cause), 0);
	assert_int_equal(fx->seen.retired, 1);
	assert_string_equal(json_string_value(json_object_get(archive,
	    "format")), "stopcock-archive");
	assert_string_equal(json_string_value(json_object_get(archive,
	    "experiment")), "b");
	st = json_object_get(archive, "state");
	assert_string_equal(json_string_value(json_object_get(st, "id")), "b");
	assert_int_equal(json_integer_value(json_object_get(json_array_get(
	    json_object_get(st, "arms"), 1), "exposures")), 5);
	json_decref(archive);
	/* the held record was applied before the archive was taken */
	{
		struct engine_counters c;
		engine_counters(fx->eng, &c);
		assert_int_equal(c.held, 0);
		assert_int_equal(c.experiments, 2);
	}
	assert_int_equal(feed(fx, "expose b control"), ENGINE_E_UNPLANNED);
	assert_int_equal(feed(fx, "plan d control=50 treatment=50"), 0);
	/* idle: in the tick's clock, the one no record reached for longest
	 * (nothing is idle before a tick has said what time it is) */
	assert_null(engine_idle(fx->eng, fx->now + 1e6, 3600));
	t0 = fx->now;
	engine_tick(fx->eng, t0);
	assert_int_equal(feed(fx, "expose a control"), 0);
	engine_tick(fx->eng, t0 + 100);
	assert_int_equal(feed(fx, "expose c control"), 0);
	assert_int_equal(feed(fx, "expose d control"), 0);
	assert_null(engine_idle(fx->eng, t0 + 3600, 0));
	assert_null(engine_idle(fx->eng, t0 + 3599, 3600));
	assert_string_equal(engine_idle(fx->eng, t0 + 3600, 3600), "a");
	/* a record stamped long ago still says the experiment is alive */
	engine_tick(fx->eng, t0 + 3600);
	assert_int_equal(feed(fx, "@1000 expose a control"), 0);
	assert_null(engine_idle(fx->eng, t0 + 3600, 3600));
	assert_string_equal(engine_idle(fx->eng, t0 + 3700, 3600), "c");

	/* one planned in the configuration is never idle */
	{
		uint8_t key[16] = { 4 };
		struct conf *pc = load("[experiment pinned]\n"
		    "plan = control=50 treatment=50\n");
		struct engine *pe = engine_new(pc, key);
		struct record r;
		const char *line = "plan other control=50 treatment=50";

		engine_tick(pe, t0);
		assert_int_equal(proto_parse(line, strlen(line), &r), PROTO_OK);
		assert_int_equal(engine_apply(pe, &r, t0, 1), ENGINE_OK);
		assert_string_equal(engine_idle(pe, t0 + 7200, 3600), "other");
		assert_int_equal(engine_retire(pe, "other", "idle", t0 + 7200,
		    &archive, &cause), 0);
		json_decref(archive);
		assert_null(engine_idle(pe, t0 + 7200, 3600));
		engine_free(pe);
		conf_free(pc);
	}
}

/* An experiment's family size and the guardrails of its tests. */
static int
family_of(struct engine *eng, const char *id, char *names, size_t size)
{
	json_t *j = engine_json_experiment(eng, id), *t;
	size_t i;
	int fam;

	assert_non_null(j);
	fam = (int)json_integer_value(json_object_get(j, "family"));
	names[0] = '\0';
	json_array_foreach(json_object_get(j, "guardrails"), i, t)
		snprintf(names + strlen(names), size - strlen(names), "%s%s",
		    i ? " " : "", json_string_value(json_object_get(t,
		    "name")));
	json_decref(j);
	return fam;
}

/*
 * Issue 13, item 5: the family is fixed when an experiment is planned,
 * by its plan's guardrails= or its [experiment] section's list, else
 * every configured guardrail; tests of the others do not exist and the
 * alpha split counts only the family (Bonferroni: alpha / family, so
 * 0.05 / 2 = 0.025 for two guardrails and one treatment arm).
 */
static void
test_family(void **state)
{
	struct fx *fx = *state;
	uint8_t key[16] = { 1, 2, 3 };
	struct conf *c2, *c3;
	struct engine *eng, *copy;
	char names[256], *cause = NULL;
	json_t *j, *a, *b;

	assert_int_equal(feed(fx, "plan all control=50 treatment=50"), 0);
	assert_int_equal(family_of(fx->eng, "all", names, sizeof names), 4);
	assert_int_equal(feed(fx, "plan two control=50 treatment=50 "
	    "guardrails=render,errors"), 0);
	assert_int_equal(family_of(fx->eng, "two", names, sizeof names), 2);
	assert_string_equal(names, "render errors");
	j = engine_json_experiment(fx->eng, "two");
	assert_float_equal(json_number_value(json_object_get(json_array_get(
	    json_object_get(j, "tests"), 0), "alpha")), 0.05 / 2, 1e-12);
	json_decref(j);
	/* a guardrail nobody configured: the plan is refused, counted */
	assert_int_equal(feed(fx, "plan bad control=50 treatment=50 "
	    "guardrails=render,nope"), ENGINE_E_GUARDRAIL);
	assert_string_equal(engine_reason(ENGINE_E_GUARDRAIL),
	    "unknown_guardrail");
	/* a ramp step cannot choose another family after the data */
	assert_int_equal(feed(fx, "plan two control=40 treatment=60 "
	    "guardrails=p99"), 0);
	assert_int_equal(family_of(fx->eng, "two", names, sizeof names), 2);
	assert_string_equal(names, "render errors");
	/* a checkpoint keeps it */
	a = engine_save(fx->eng);
	copy = engine_restore(fx->conf, key, a, &cause);
	if (copy == NULL)
		fail_msg("restore: %s", cause);
	b = engine_save(copy);
	assert_true(json_equal(a, b));
	assert_int_equal(family_of(copy, "two", names, sizeof names), 2);
	json_decref(a);
	json_decref(b);
	engine_free(copy);
	/* a reload that removes errors drops its test, not its share */
	c2 = load_edit("[guardrail errors]\nmetric = server_errors\n"
	    "test = proportion\naction = pause\n", "", NULL, NULL);
	assert_int_equal(engine_reconfigure(fx->eng, c2, &cause), 0);
	assert_int_equal(family_of(fx->eng, "two", names, sizeof names), 2);
	assert_string_equal(names, "render");
	assert_int_equal(family_of(fx->eng, "all", names, sizeof names), 3);
	conf_free(c2);

	/* the [experiment] section's list */
	c3 = load("[experiment cfg]\nguardrails = p99 crashes\n");
	eng = engine_new(c3, key);
	assert_int_equal(engine_plan(eng, "cfg", (struct proto_arm[]){
	    { "control", 50 }, { "treatment", 25 }, { "other", 25 } }, 3,
	    fx->now, &cause), 0);
	/* two guardrails x two treatment arms */
	assert_int_equal(family_of(eng, "cfg", names, sizeof names), 4);
	assert_string_equal(names, "p99 p99 crashes crashes");
	engine_free(eng);
	conf_free(c3);
}

/* A guardrail's own plan_units tunes its mixture, not the default's: the
 * same data give a different confidence sequence, and the tuning the
 * experiment reports names the guardrail's value. */
static void
test_guardrail_plan_units(void **state)
{
	struct fx *fx = *state;
	struct conf *c2 = load("[guardrail render2]\nmetric = render_ms\n"
	    "test = mean\nplan_units = 500000\n");
	uint8_t key[16] = { 4 };
	struct engine *e2 = engine_new(c2, key);
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	struct record r;
	char line[128];
	json_t *j, *t, *tn;
	double w[2] = { 0, 0 };
	size_t i;
	int k;

	gsl_rng_set(rng, 2);
	snprintf(line, sizeof line, "plan u control=1 treatment=1");
	proto_parse(line, strlen(line), &r);
	engine_apply(e2, &r, 1, 1);
	for (k = 0; k < 2000; k++) {
		snprintf(line, sizeof line, "observe u %s render_ms %.4f",
		    k % 2 ? "control" : "treatment",
		    100 + gsl_ran_gaussian(rng, 10));
		proto_parse(line, strlen(line), &r);
		engine_apply(e2, &r, 2, (uint64_t)k + 2);
	}
	j = engine_json_experiment(e2, "u");
	json_array_foreach(json_object_get(j, "tests"), i, t) {
		const char *g = json_string_value(json_object_get(t,
		    "guardrail"));
		double width = json_real_value(json_object_get(t, "upper")) -
		    json_real_value(json_object_get(t, "lower"));
		if (strcmp(g, "render") == 0)
			w[0] = width;
		else if (strcmp(g, "render2") == 0)
			w[1] = width;
	}
	assert_true(w[0] > 0 && w[1] > 0 && fabs(w[0] - w[1]) > 1e-6 * w[0]);
	json_array_foreach(json_object_get(json_object_get(j, "tuning"),
	    "guardrails"), i, tn)
		if (strcmp(json_string_value(json_object_get(tn, "guardrail")),
		    "render2") == 0)
			assert_true(json_real_value(json_object_get(tn,
			    "plan_units")) == 500000);
	json_decref(j);
	gsl_rng_free(rng);
	engine_free(e2);
	conf_free(c2);
	(void)fx;
}

/*
 * Safe speaks of the past: a guardrail judged safe on a healthy stretch
 * must still raise harm when the treatment turns bad later, and the
 * change detector must find it well before the diluted running test
 * could (the cumulative mean difference stays below the margin here).
 */
static void
test_late_harm_after_safe(void **state)
{
	struct fx *fx = *state;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	struct seen before;
	int i;

	engine_free(fx->eng);
	conf_free(fx->conf);
	fx->conf = load("[guardrail late]\nmetric = load_ms\ntest = mean\n"
	    "harm = increase\nmargin = 2\n");
	fx->eng = engine_new(fx->conf, (const uint8_t *)"0123456789abcdef");
	engine_set_sink(fx->eng, sink, &fx->seen);
	gsl_rng_set(rng, 11);
	feed(fx, "plan late control=50 treatment=50");
	for (i = 0; i < 60000; i++) {
		feed(fx, "observe late control load_ms %.4f",
		    100 + gsl_ran_gaussian(rng, 10));
		feed(fx, "observe late treatment load_ms %.4f",
		    100 + gsl_ran_gaussian(rng, 10));
	}
	assert_int_equal(fx->seen.safes, 1);
	assert_int_equal(fx->seen.harms, 0);
	before = fx->seen;
	/* a bad build: +6 ms, three times the margin, after 60,000 pairs */
	for (i = 0; i < 20000 && fx->seen.harms == 0; i++) {
		feed(fx, "observe late control load_ms %.4f",
		    100 + gsl_ran_gaussian(rng, 10));
		feed(fx, "observe late treatment load_ms %.4f",
		    106 + gsl_ran_gaussian(rng, 10));
	}
	gsl_rng_free(rng);
	assert_int_equal(fx->seen.harms, 1);
	assert_int_equal(fx->seen.last_verdict, VERDICT_HARM);
	assert_string_equal(fx->seen.last_guardrail, "late");
	/* found within 20,000 pairs, while the epoch's mean difference
	 * 6 i / (60000 + i) was still under the 2 ms margin */
	assert_true(i < 20000 && 6.0 * i / (60000 + i) < 2);
	assert_int_equal(fx->seen.safes, before.safes);
}

/*
 * Outliers in a quantile test (issue 12, item 3): 1% of records at 1e7,
 * 1e9 and 1e300 in turn. Before the sketch's edges, 1% at 1e7 in one arm
 * folded that arm's body into one bucket (p90 read 361.5 for 108.1) and
 * harm was declared at p = 2.7e-132. Three experiments, p50 and p90
 * guardrails with a 5% margin, lognormal(4.6, 0.5) latencies:
 *   null: the outliers in both arms: no harm;
 *   one: in the treatment only; its true p90 is the body's
 *        0.9 / 0.99 quantile, exp(0.5 (z(0.90909) - z(0.9))) = 1.027 times
 *        the control's (z from scipy.stats.norm.ppf: 1.33518, 1.28155),
 *        p50 1.006 times: inside the margin, so no harm;
 *   real: both arms with outliers, the treatment's body 1.3 times
 *        slower: harm on both guardrails (outliers do not hide it).
 */
struct outlier_seen {
	int	harm[3][2];	/* experiment x guardrail (p50, p90) */
	double	p[3][2];
};

static void
outlier_sink(void *arg, const struct finding *f)
{
	struct outlier_seen *o = arg;
	int e, g;

	if (f->kind != FINDING_VERDICT)
		return;
	e = strcmp(f->experiment, "null") == 0 ? 0 :
	    strcmp(f->experiment, "one") == 0 ? 1 : 2;
	g = strcmp(f->guardrail, "p50") == 0 ? 0 : 1;
	if (f->verdict == VERDICT_HARM) {
		o->harm[e][g]++;
		o->p[e][g] = f->p;
	}
}

static void
test_quantile_outliers(void **state)
{
	static const char *text =
	    "[defaults]\n"
	    "alpha = 0.05\n"
	    "plan_units = 20000\n"
	    "[guardrail p50]\n"
	    "metric = latency_ms\n"
	    "test = quantile\n"
	    "quantile = 0.5\n"
	    "margin = 5%\n"
	    "[guardrail p90]\n"
	    "metric = latency_ms\n"
	    "test = quantile\n"
	    "quantile = 0.9\n"
	    "margin = 5%\n";
	static const double out[3] = { 1e7, 1e9, 1e300 };
	static const char *exps[3] = { "null", "one", "real" };
	struct outlier_seen seen;
	struct conf *c;
	struct engine *eng;
	struct record r;
	gsl_rng *rng = gsl_rng_alloc(gsl_rng_mt19937);
	char line[PROTO_LINE_MAX + 1], *cause = NULL;
	uint8_t key[16] = { 4 };
	double now = 1700000000, x;
	uint64_t ev = 0;
	int i, e, arm, g;

	(void)state;
	if (conf_parse(text, "outliers.conf", &c, &cause) != 0)
		fail_msg("config: %s", cause);
	eng = engine_new(c, key);
	memset(&seen, 0, sizeof seen);
	engine_set_sink(eng, outlier_sink, &seen);
	gsl_rng_set(rng, 12);
	for (e = 0; e < 3; e++) {
		snprintf(line, sizeof line, "plan %s control=50 treatment=50",
		    exps[e]);
		assert_int_equal(proto_parse(line, strlen(line), &r), PROTO_OK);
		assert_int_equal(engine_apply(eng, &r, now, ++ev), ENGINE_OK);
	}
	for (i = 0; i < 20000; i++) {
		for (e = 0; e < 3; e++) {
			for (arm = 0; arm < 2; arm++) {
				x = exp(4.6 + 0.5 * gsl_ran_gaussian(rng, 1));
				if (e == 2 && arm == 1)
					x *= 1.3;
				/* every 100th record an outlier, cycling */
				if (i % 100 == 37 && (e != 1 || arm == 1))
					x = out[i / 100 % 3];
				snprintf(line, sizeof line,
				    "observe %s %s latency_ms %.17g", exps[e],
				    arm ? "treatment" : "control", x);
				assert_int_equal(proto_parse(line, strlen(line),
				    &r), PROTO_OK);
				now += 0.001;
				assert_int_equal(engine_apply(eng, &r, now,
				    ++ev), ENGINE_OK);
			}
		}
		if (i % 500 == 499)
			engine_tick(eng, now);
	}
	engine_finish(eng, now);
	for (g = 0; g < 2; g++) {
		if (seen.harm[0][g] != 0 || seen.harm[1][g] != 0)
			fail_msg("%s: false harm (null %d, p=%g; one arm %d, "
			    "p=%g)", g ? "p90" : "p50", seen.harm[0][g],
			    seen.p[0][g], seen.harm[1][g], seen.p[1][g]);
		if (seen.harm[2][g] != 1)
			fail_msg("%s: real harm not found once (%d)",
			    g ? "p90" : "p50", seen.harm[2][g]);
	}
	engine_free(eng);
	conf_free(c);
	gsl_rng_free(rng);
}

/* Exposures of arm i of experiment id. */
static long long
exposures_of(struct fx *fx, const char *id, int i)
{
	json_t *j = engine_json_experiment(fx->eng, id);
	long long n;

	assert_non_null(j);
	n = json_integer_value(json_object_get(json_array_get(
	    json_object_get(j, "arms"), (size_t)i), "exposures"));
	json_decref(j);
	return n;
}

/* A record parsed into a struct whose bytes were 0xff before: what
 * follows each name's NUL is not zero. */
static enum engine_reject
feed_dirty(struct fx *fx, const char *line)
{
	struct record r;

	memset(&r, 0xff, sizeof r);
	assert_int_equal(proto_parse(line, strlen(line), &r), PROTO_OK);
	fx->now += 0.01;
	return engine_apply(fx->eng, &r, fx->now, ++fx->event);
}

/*
 * The record path matches experiment, variant and metric names word by
 * word (engine.c name_eq): names of every length up to PROTO_NAME_MAX,
 * names that are prefixes of others or differ in their last byte only,
 * with anything after the NUL, reach exactly their own experiment, arm
 * and metric.
 */
static void
test_name_match(void **state)
{
	struct fx *fx = *state;
	static const int lens[] = { 1, 7, 8, 9, 15, 16, 17, 63, 64 };
	char a[PROTO_NAME_MAX + 1], b[PROTO_NAME_MAX + 1], line[600];
	size_t k;
	int n;

	for (k = 0; k < sizeof lens / sizeof lens[0]; k++) {
		/* a fresh engine per length: max_experiments = 3 */
		uint8_t key[16] = { 1, 2, 3 };

		engine_free(fx->eng);
		fx->eng = engine_new(fx->conf, key);
		engine_set_sink(fx->eng, sink, &fx->seen);
		n = lens[k];
		memset(a, 'e', (size_t)n);
		a[n] = '\0';
		memcpy(b, a, (size_t)n + 1);
		b[n - 1] = 'f';		/* differs in the last byte */
		/* arms: the name and the name less its last byte */
		snprintf(line, sizeof line, "plan %s %s=50 %.*s=50", a, a,
		    n - 1 > 0 ? n - 1 : 1, n > 1 ? a : "z");
		assert_int_equal(feed(fx, "%s", line), ENGINE_OK);
		snprintf(line, sizeof line, "plan %s %s=50 %s=50", b, b,
		    n > 1 ? a : "y");
		assert_int_equal(feed(fx, "%s", line), ENGINE_OK);
		/* alternate between the two experiments (no recent hit) and
		 * repeat one (the recent hit) */
		snprintf(line, sizeof line, "expose %s %s 3", a, a);
		assert_int_equal(feed_dirty(fx, line), ENGINE_OK);
		snprintf(line, sizeof line, "expose %s %s 5", b, b);
		assert_int_equal(feed_dirty(fx, line), ENGINE_OK);
		snprintf(line, sizeof line, "expose %s %s 7", b, b);
		assert_int_equal(feed_dirty(fx, line), ENGINE_OK);
		snprintf(line, sizeof line, "expose %s %s 11", a, a);
		assert_int_equal(feed_dirty(fx, line), ENGINE_OK);
		assert_int_equal(exposures_of(fx, a, 0), 14);
		assert_int_equal(exposures_of(fx, a, 1), 0);
		assert_int_equal(exposures_of(fx, b, 0), 12);
		/* b's arm is not a's, a's second arm is not its first */
		snprintf(line, sizeof line, "expose %s %s 1", a, b);
		assert_int_equal(feed_dirty(fx, line), ENGINE_E_VARIANT);
		if (n > 1) {
			snprintf(line, sizeof line, "expose %s %.*s 2", a,
			    n - 1, a);
			assert_int_equal(feed_dirty(fx, line), ENGINE_OK);
			assert_int_equal(exposures_of(fx, a, 1), 2);
		}
		/* a name one byte longer or shorter is another experiment */
		if (n < PROTO_NAME_MAX) {
			snprintf(line, sizeof line, "expose %sx %s 1", a, a);
			assert_int_equal(feed_dirty(fx, line),
			    ENGINE_E_UNPLANNED);
		}
		if (n > 1) {
			snprintf(line, sizeof line, "expose %.*s %s 1", n - 1,
			    a, a);
			assert_int_equal(feed_dirty(fx, line),
			    ENGINE_E_UNPLANNED);
		}
		/* metrics: two names differing in the last byte stay two */
		snprintf(line, sizeof line, "count %s %s %s 1 2", a, a, a);
		assert_int_equal(feed_dirty(fx, line), ENGINE_OK);
		snprintf(line, sizeof line, "count %s %s %s 1 3", a, a, b);
		assert_int_equal(feed_dirty(fx, line), ENGINE_OK);
		snprintf(line, sizeof line, "observe %s %s %s 4", a, a, a);
		assert_int_equal(feed_dirty(fx, line), ENGINE_E_MISMATCH);
	}
}

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test_setup_teardown(test_rejections, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_epochs, setup, teardown),
		cmocka_unit_test_setup_teardown(test_name_match, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_srm, setup, teardown),
		cmocka_unit_test_setup_teardown(test_srm_batches, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_late_harm_after_safe,
		    setup, teardown),
		cmocka_unit_test_setup_teardown(test_aligned_arms, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_closing_epoch, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_mean_harm, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_proportion_harm_and_pause,
		    setup, teardown),
		cmocka_unit_test_setup_teardown(test_rate_harm, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_quantile_harm_on_tick,
		    setup, teardown),
		cmocka_unit_test_setup_teardown(test_quantile_windows, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_implausible, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_declared_only, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_save_restore, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_reconfigure, setup,
		    teardown),
		cmocka_unit_test_setup_teardown(test_reload_keeps_verdicts,
		    setup, teardown),
		cmocka_unit_test_setup_teardown(test_retire, setup, teardown),
		cmocka_unit_test_setup_teardown(test_family, setup, teardown),
		cmocka_unit_test_setup_teardown(test_guardrail_plan_units,
		    setup, teardown),
		cmocka_unit_test(test_quantile_outliers),
		cmocka_unit_test(test_untrusted),
		cmocka_unit_test(test_shard_pool),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
