/*
 * engine_json.c: read-only views of the engine's state, as the API, the
 * page, `stopcock status` and replay print them (engine_json_list,
 * engine_json_experiment, engine_json_tuning). Views write non-finite
 * numbers as null. The checkpoint image is engine_image.c.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/util.h"
#include "engine_int.h"


struct list_ctx {
	json_t	*guardrails;
	json_t	*srm;
};

static void
list_cb(void *arg, const struct finding *f)
{
	struct list_ctx *c = arg;

	if (f->kind == FINDING_SRM) {
		c->srm = json_pack("{s:s, s:o, s:o}", "verdict",
		    verdict_name(f->verdict), "p", finding_num(f->p), "chi2_p",
		    finding_num(f->chi2_p));
		return;
	}
	json_array_append_new(c->guardrails, json_pack(
	    "{s:s, s:s, s:s, s:s, s:o, s:b}", "name", f->guardrail,
	    "variant", f->variant, "metric", f->metric, "verdict",
	    verdict_name(f->verdict), "p", finding_num(f->p), "untrusted",
	    f->untrusted));
}

static json_t *
exp_summary(const struct engine *eng, const struct experiment *e)
{
	struct list_ctx c;
	json_t *o, *arms = json_array();
	int i;

	for (i = 0; i < e->narms; i++)
		json_array_append_new(arms, json_pack("{s:s, s:o, s:I}",
		    "variant", e->arms[i].name, "weight",
		    finding_num(e->arms[i].weight), "exposures",
		    (json_int_t)e->exposures[i]));
	c.guardrails = json_array();
	c.srm = NULL;
	engine_foreach_in(eng, e->id, list_cb, &c);
	o = json_pack("{s:s, s:i, s:b, s:o, s:o, s:o}", "id", e->id, "epoch",
	    (int)e->epoch, "untrusted", e->srm_fired, "arms", arms,
	    "guardrails", c.guardrails, "srm", c.srm ? c.srm : json_null());
	json_object_set_new(o, "last_ts", finding_num(e->last_ts));
	json_object_set_new(o, "untrusted_records",
	    json_integer((json_int_t)e->untrusted_records));
	return o;
}

json_t *
engine_json_list(const struct engine *eng)
{
	json_t *a = json_array();
	uint32_t i;

	for (i = 0; i < eng->nexps; i++)
		json_array_append_new(a, exp_summary(eng, eng->exps[i]));
	return json_pack("{s:o}", "experiments", a);
}

static json_t *
hist_json(const struct hist *h, int srm)
{
	json_t *a = json_array();
	uint32_t i;

	for (i = 0; i < h->n; i++) {
		const struct hist_point *p = &h->pt[i];
		if (srm)
			json_array_append_new(a, json_pack("[o, o, o]",
			    finding_num(p->t), finding_num(p->a),
			    finding_num(p->p)));
		else
			json_array_append_new(a, json_pack("[o, o, o, o, o]",
			    finding_num(p->t), finding_num(p->a),
			    finding_num(p->b), finding_num(p->c),
			    finding_num(p->p)));
	}
	return a;
}

struct detail_ctx {
	const struct experiment	*e;
	json_t			*tests;
	json_t			*srm;
	int			 i;
};

static void
detail_cb(void *arg, const struct finding *f)
{
	struct detail_ctx *c = arg;
	json_t *o = finding_json(f);
	int j;

	if (f->kind == FINDING_SRM) {
		json_object_set_new(o, "history", hist_json(&c->e->srm_hist,
		    1));
		c->srm = o;
		return;
	}
	/* foreach_exp walks tests in order, skipping those without an arm */
	for (j = c->i; j < c->e->ntests; j++)
		if (c->e->tests[j].arm > 0)
			break;
	c->i = j + 1;
	if (j < c->e->ntests)
		json_object_set_new(o, "history",
		    hist_json(&c->e->tests[j].hist, 0));
	/* a reload restarted its evidence: when, why, what it held */
	if (j < c->e->ntests && c->e->tests[j].restart_why > 0)
		json_object_set_new(o, "restarted", json_pack("{s:o, s:s, s:s}",
		    "at", finding_num(c->e->tests[j].restart_ts), "reason",
		    engine_restart_reason(c->e->tests[j].restart_why),
		    "previous", verdict_name((enum verdict)
		    c->e->tests[j].restart_prev)));
	json_array_append_new(c->tests, o);
}

/*
 * The mixture parameters in force for an experiment with this level,
 * plan size and number of arms: all fixed before monitoring from the
 * configuration, never retuned from the data. The mean and proportion
 * mixtures' tau^2 is a multiple of the pooled per-unit variance (rule (a)
 * of docs/methods.md sec. 1), so it is given per unit of that variance.
 */
static json_t *
tuning_json(const struct engine *eng, double alpha, double srm_alpha,
    double plan_units, int narms, int family)
{
	const struct conf *c = eng->conf;
	double level = alpha / (family > 0 ? family : 1);
	json_t *g = json_array();
	int i;

	for (i = 0; i < c->nguardrails; i++) {
		const struct conf_guardrail *gr = &c->guardrails[i];
		double units = gr->plan_units > 0 ? gr->plan_units : plan_units;
		json_t *o = json_pack("{s:s, s:s, s:o, s:o}", "guardrail",
		    gr->name, "test", conf_test_name(gr->test), "level",
		    finding_num(level), "plan_units", finding_num(units));

		switch (gr->test) {
		case TEST_MEAN:
		case TEST_PROPORTION:
			/* one-sided tuning: alpha -> 2 alpha */
			json_object_set_new(o, "tau2_per_unit_variance",
			    finding_num(stats_msprt_tau2(1, 2 * level, units)));
			break;
		case TEST_RATE:
			json_object_set_new(o, "concentration", finding_num(
			    c->rate_concentration > 0 ? c->rate_concentration :
			    100));
			break;
		case TEST_QUANTILE:
			json_object_set_new(o, "t_opt", finding_num(units));
			json_object_set_new(o, "sketch_accuracy",
			    finding_num(c->sketch_accuracy));
			break;
		}
		json_array_append_new(g, o);
	}
	return json_pack("{s:i, s:i, s:o, s:o, s:o}", "arms", narms, "family",
	    family, "srm_concentration", finding_num(stats_dm_k0(plan_units *
	    narms, srm_alpha)), "srm_alpha", finding_num(srm_alpha),
	    "guardrails", g);
}

json_t *
engine_json_tuning(const struct engine *eng)
{
	const struct conf *c = eng->conf;

	return tuning_json(eng, c->alpha, c->srm_alpha, c->plan_units, 2,
	    c->nguardrails > 0 ? c->nguardrails : 1);
}

json_t *
engine_json_experiment(const struct engine *eng, const char *id)
{
	const struct experiment *e;
	struct detail_ctx c;
	json_t *o, *ep, *arms, *ga;
	uint32_t slot;
	int i, j;

	if (nmap_get(eng->index, id, strlen(id), &slot) != 0)
		return NULL;
	e = eng->exps[slot];
	o = exp_summary(eng, e);
	c.e = e;
	c.tests = json_array();
	c.srm = NULL;
	c.i = 0;
	engine_foreach_in(eng, id, detail_cb, &c);
	json_object_set_new(o, "tests", c.tests);
	if (c.srm)
		json_object_set_new(o, "srm", c.srm);
	json_object_set_new(o, "control", json_string(e->arms[0].name));
	json_object_set_new(o, "alpha", finding_num(e->alpha));
	json_object_set_new(o, "srm_alpha", finding_num(e->srm_alpha));
	json_object_set_new(o, "family", json_integer(e->family));
	/* which guardrails apply: fixed by the plan, or all configured */
	ga = json_array();
	for (i = 0; i < eng->conf->nguardrails; i++)
		if (!e->fam_fixed || (e->fam_mask >> i & 1))
			json_array_append_new(ga, json_string(
			    eng->conf->guardrails[i].name));
	json_object_set_new(o, "scope", json_pack("{s:s, s:o}", "rule",
	    e->fam_fixed ? "planned" : "all", "guardrails", ga));
	json_object_set_new(o, "plan_units", finding_num(e->plan_units));
	json_object_set_new(o, "tuning", tuning_json(eng, e->alpha,
	    e->srm_alpha, e->plan_units, e->narms, e->family));
	ep = json_array();
	for (i = 0; i < e->nepochs; i++) {
		arms = json_array();
		for (j = 0; j < e->epochs[i].narms; j++)
			json_array_append_new(arms, json_pack("{s:s, s:o}",
			    "variant", e->epochs[i].arms[j].name, "weight",
			    finding_num(e->epochs[i].arms[j].weight)));
		json_array_append_new(ep, json_pack("{s:i, s:o, s:o}",
		    "epoch", (int)e->epochs[i].epoch, "started",
		    finding_num(e->epochs[i].started), "arms", arms));
	}
	json_object_set_new(o, "epochs", ep);
	arms = json_array();
	for (i = 0; i < e->narms; i++)
		json_array_append_new(arms, json_integer(
		    (json_int_t)e->srm_late[i]));
	/* what was counted but not applied: exposures behind the SRM
	 * watermark (per arm), records naming a closed epoch */
	ep = json_array();
	for (i = 0; i < e->narms; i++)
		json_array_append_new(ep, json_integer(
		    (json_int_t)e->srm_ahead[i]));
	json_object_set_new(o, "late", json_pack("{s:o, s:o, s:I, s:o, s:o}",
	    "srm_exposures", arms, "srm_ahead", ep, "closed_epoch_records",
	    (json_int_t)e->late_epoch, "lateness",
	    finding_num(eng->conf->lateness), "srm_interval",
	    finding_num(eng->conf->srm_interval)));
	/* the previous epoch, still counting records that name it */
	json_object_set_new(json_object_get(o, "late"), "closing_epoch",
	    e->closing == NULL ? json_null() : json_pack("{s:i, s:o, s:I}",
	    "epoch", (int)e->closing->epoch, "until",
	    finding_num(e->closing->closing_until), "records",
	    (json_int_t)e->closing->closing_records));
	return o;
}
