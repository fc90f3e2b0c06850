/*
 * engine_reconf.c: a configuration reload applied to a running engine.
 * A guardrail whose definition changed restarts its evidence (and says
 * why); a removed one drops its test; a new one starts; experiments' and
 * metrics' settings follow the new configuration.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/util.h"
#include "engine_int.h"

/*
 * What defines a guardrail's test: a reload that changes any of these
 * restarts the test's evidence; its name is its identity, and its action
 * only says what harm does, so changing it keeps the evidence. NULL when
 * the definitions agree, else what changed (for the log and webhooks).
 */
static const char *const restart_reasons[] = {
	NULL, "metric changed", "test changed", "quantile changed",
	"harm direction changed", "margin changed", "plan_units changed",
};

const char *
engine_restart_reason(int why)
{
	return why > 0 && (size_t)why < SC_NELEM(restart_reasons) ?
	    restart_reasons[why] : NULL;
}

static int
guardrail_change(const struct conf_guardrail *a, const struct conf_guardrail *b)
{
	if (strcmp(a->metric, b->metric) != 0)
		return 1;
	if (a->test != b->test)
		return 2;
	if (a->quantile != b->quantile)
		return 3;
	if (a->harm != b->harm)
		return 4;
	if (a->margin != b->margin || a->margin_relative != b->margin_relative)
		return 5;
	if (a->plan_units != b->plan_units)
		return 6;
	return 0;
}

static int
guardrail_index(const struct conf *c, const char *name)
{
	int k;

	for (k = 0; k < c->nguardrails; k++)
		if (strcmp(c->guardrails[k].name, name) == 0)
			return k;
	return -1;
}

static void
test_drop(struct test *t)
{
	hist_free(&t->hist);
	engine_groups_free(t->qg[0]);
	engine_groups_free(t->qg[1]);
	t->qg[0] = t->qg[1] = NULL;
}

/*
 * Move the tests of e (live or closing) from the old configuration's
 * guardrails to the new one's, by name. A test whose guardrail is gone is
 * dropped; one whose definition changed is dropped from a closing epoch
 * (its evidence would join a test that restarts) and, in the live
 * experiment, starts afresh in place, its old verdict and the reason left
 * in prev[] and why[] (indexed like e->tests afterwards) for the caller
 * to report.
 */
static void
reconf_tests(struct engine *eng, const struct conf *old, struct experiment *e,
    enum verdict *prev, const char **why)
{
	char variant[PROTO_NAME_MAX + 1];
	const char *change;
	struct test *t;
	enum verdict held;
	int j, k, n = 0, code;

	for (j = 0; j < e->ntests; j++) {
		t = &e->tests[j];
		k = guardrail_index(eng->conf, old->guardrails[t->g].name);
		code = k < 0 ? 0 : guardrail_change(&old->guardrails[t->g],
		    &eng->conf->guardrails[k]);
		change = engine_restart_reason(code);
		if (k < 0 || (change != NULL && e->is_closing)) {
			test_drop(t);
			continue;
		}
		if (n != j)
			e->tests[n] = *t;
		t = &e->tests[n];
		if (prev != NULL) {
			prev[n] = t->verdict;
			why[n] = change;
		}
		if (change != NULL) {
			snprintf(variant, sizeof variant, "%s", t->variant);
			held = t->verdict;
			test_drop(t);
			engine_exp_test_init(t, k, variant);
			t->dirty = 1;
			/* for the API: the test says when and why it began */
			t->restart_ts = isnan(eng->clock) ? eng->now : eng->clock;
			t->restart_why = code;
			t->restart_prev = (int)held;
		} else
			t->g = k;
		n++;
	}
	e->ntests = n;
}

/*
 * Fix e's family to the guardrails in mask (n of them in the alpha
 * split): tests of others go (a new experiment's, so nothing is lost),
 * and the level of each test follows the family.
 */
void
engine_family_set(struct engine *eng, struct experiment *e, uint64_t mask,
    int n)
{
	int j, k = 0;

	e->fam_fixed = 1;
	e->fam_mask = mask;
	e->fam_n = n;
	for (j = 0; j < e->ntests; j++) {
		if (!engine_exp_applies(e, e->tests[j].g)) {
			test_drop(&e->tests[j]);
			continue;
		}
		e->tests[k++] = e->tests[j];
	}
	e->ntests = k;
	engine_exp_settings(eng, e);
	engine_link_tests(eng, e);
}

/* A family's mask under the old configuration, by name under the new. */
static uint64_t
family_remap(const struct conf *old, const struct conf *c, uint64_t mask)
{
	uint64_t out = 0;
	int g, k;

	for (g = 0; g < old->nguardrails; g++)
		if ((mask >> g & 1) &&
		    (k = guardrail_index(c, old->guardrails[g].name)) >= 0)
			out |= (uint64_t)1 << k;
	return out;
}

/* A reload may ask for sketches the metrics did not keep. */
static void
reconf_metrics(struct engine *eng, struct experiment *e)
{
	struct metric *m;
	int j, k;

	for (j = 0; j < e->nmetrics; j++) {
		m = &e->metrics[j];
		engine_metric_needs(eng->conf, m);
		for (k = 0; m->arm && k < e->narms; k++)
			if (m->want_sketch && m->arm[k].sk == NULL)
				m->arm[k].sk = sketch_new(
				    eng->conf->sketch_accuracy,
				    eng->conf->sketch_buckets);
	}
}

/*
 * A reload keeps every test whose guardrail keeps its name and test
 * definition exactly as it was: evidence, verdict, running bounds,
 * detector, history, the closing epoch's part and the held records. A
 * changed definition restarts that test alone, reported as a
 * FINDING_RESTART with the verdict it held; a removed guardrail's test
 * is reported the same way with its last state, then dropped. Nothing
 * is dropped without a finding.
 */
int
engine_reconfigure(struct engine *eng, const struct conf *conf, char **cause)
{
	struct conf *old = eng->conf;
	struct experiment *e;
	struct finding f;
	enum verdict *prev;
	const char **why;
	uint32_t i;
	int j, nkept;

	/* the last word of tests whose guardrail goes, read under the old
	 * configuration that still names it */
	for (i = 0; i < eng->nexps; i++) {
		e = eng->exps[i];
		for (j = 0; j < e->ntests; j++) {
			if (e->tests[j].arm <= 0 || guardrail_index(conf,
			    old->guardrails[e->tests[j].g].name) >= 0)
				continue;
			finding_fill(eng, e, &e->tests[j], FINDING_RESTART, &f);
			f.reason = "guardrail removed";
			engine_emit(eng, &f);
		}
	}
	eng->conf = conf_dup(conf);
	for (i = 0; i < eng->nexps; i++) {
		e = eng->exps[i];
		if (e->fam_fixed)
			e->fam_mask = family_remap(old, eng->conf, e->fam_mask);
		if (e->closing != NULL && e->closing->fam_fixed)
			e->closing->fam_mask = family_remap(old, eng->conf,
			    e->closing->fam_mask);
		prev = xcalloc((size_t)e->ntests + 1, sizeof *prev);
		why = xcalloc((size_t)e->ntests + 1, sizeof *why);
		reconf_tests(eng, old, e, prev, why);
		nkept = e->ntests;
		reconf_metrics(eng, e);
		engine_exp_settings(eng, e);
		if (e->closing != NULL) {
			reconf_tests(eng, old, e->closing, NULL, NULL);
			reconf_metrics(eng, e->closing);
			engine_exp_settings(eng, e->closing);
			engine_link_tests(eng, e->closing);
		}
		engine_exp_ensure_tests(eng, e);
		/* reported once the test reads the new configuration; a
		 * test of a variant no longer planned has nothing to say */
		for (j = 0; j < nkept; j++) {
			if (why[j] == NULL || e->tests[j].arm <= 0)
				continue;
			finding_fill(eng, e, &e->tests[j], FINDING_RESTART, &f);
			f.previous = prev[j];
			f.reason = why[j];
			engine_emit(eng, &f);
		}
		free(prev);
		free(why);
	}
	conf_free(old);
	(void)cause;
	return 0;
}
