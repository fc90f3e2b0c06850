/*
 * simreport.c: the figures of `stopcock simulate`, summarised over runs:
 * rates with Monte Carlo standard errors (SE = sqrt(p (1 - p) / R)), the
 * bound level + 3 SE that a valid test stays under, detection-time
 * quantiles (undetected runs count as never), the fixed-horizon size in
 * units, records and seconds. One JSON document; the text report is
 * rendered from it, so both always agree.
 */
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <jansson.h>

#include "stopcock/util.h"
#include "simulate.h"

/* ---- summary ---- */

struct sim_sum {
	uint64_t	harm, safe, naive, cov_n, cov_miss, refused;
	double		p50, p90, u50, u90;	/* records, units; NAN: beyond */
};

static int
simreport_cmp_u64(const void *a, const void *b)
{
	uint64_t x = *(const uint64_t *)a, y = *(const uint64_t *)b;

	return x < y ? -1 : x > y;
}

/* The q-quantile of the detection times, undetected runs counting as
 * never (NAN when the quantile falls among them). */
static double
simreport_time_quantile(uint64_t *v, uint64_t n, double q)
{
	uint64_t idx = (uint64_t)ceil(q * (double)n);

	if (idx == 0)
		idx = 1;
	return v[idx - 1] == UINT64_MAX ? NAN : (double)v[idx - 1];
}

/* i < 0: the SRM check. */
static void
simreport_summarise(const struct sim *sim, int i, struct sim_sum *sum)
{
	uint64_t *rec = xreallocarray(NULL, sim->runs, sizeof *rec);
	uint64_t *units = xreallocarray(NULL, sim->runs, sizeof *units);
	uint64_t r, h, u;

	memset(sum, 0, sizeof *sum);
	for (r = 0; r < sim->runs; r++) {
		const struct sim_run *run = &sim->res[r];

		if (i < 0) {
			h = run->srm_rec;
			u = run->srm_units;
			sum->naive += run->srm_naive;
		} else {
			h = run->t[i].harm_rec;
			u = run->t[i].harm_units;
			sum->naive += run->t[i].naive;
			sum->safe += run->t[i].safe_rec != 0;
			if (sim->t[i].truth_known) {
				sum->cov_n++;
				sum->cov_miss += run->t[i].cov_miss;
			}
		}
		sum->refused += run->refused;
		sum->harm += h != 0;
		rec[r] = h ? h : UINT64_MAX;
		units[r] = h ? u : UINT64_MAX;
	}
	qsort(rec, sim->runs, sizeof *rec, simreport_cmp_u64);
	qsort(units, sim->runs, sizeof *units, simreport_cmp_u64);
	sum->p50 = simreport_time_quantile(rec, sim->runs, 0.5);
	sum->p90 = simreport_time_quantile(rec, sim->runs, 0.9);
	sum->u50 = simreport_time_quantile(units, sim->runs, 0.5);
	sum->u90 = simreport_time_quantile(units, sim->runs, 0.9);
	free(rec);
	free(units);
}

static double
simreport_se(double p, uint64_t n)
{
	return n > 0 ? sqrt(p * (1 - p) / (double)n) : NAN;
}

/* JSON number or null. */
static json_t *
simreport_num(double v)
{
	return isfinite(v) ? json_real(v) : json_null();
}

static double
simreport_secs(const struct sim *sim, double records)
{
	return sim->s.rate > 0 ? records / sim->s.rate : NAN;
}

static void
simreport_human_time(char *buf, size_t size, double secs)
{
	if (!isfinite(secs))
		snprintf(buf, size, "-");
	else if (secs < 120)
		snprintf(buf, size, "%.1f s", secs);
	else if (secs < 7200)
		snprintf(buf, size, "%.1f min", secs / 60);
	else if (secs < 172800)
		snprintf(buf, size, "%.1f h", secs / 3600);
	else
		snprintf(buf, size, "%.1f d", secs / 86400);
}

/* Records of a stream that holds this many units. */
static double
simreport_units_to_records(const struct sim *sim, double units)
{
	return ceil(units) * scenario_records_per_unit(&sim->s) + 1;
}

static json_t *
simreport_block(const struct sim *sim, const struct sim_sum *sum,
    int effect, double level, double fixed_units)
{
	json_t *o = json_object(), *x;
	double R = (double)sim->runs, rate = (double)sum->harm / R;
	double se0 = sqrt(level * (1 - level) / R), nr;

	json_object_set_new(o, "harm_runs", json_integer((json_int_t)sum->harm));
	json_object_set_new(o, "harm_rate", json_real(rate));
	json_object_set_new(o, "harm_se", simreport_num(simreport_se(rate, sim->runs)));
	if (!effect) {
		x = json_object();
		json_object_set_new(x, "rate", json_real(rate));
		json_object_set_new(x, "se", simreport_num(simreport_se(rate, sim->runs)));
		json_object_set_new(x, "level", json_real(level));
		json_object_set_new(x, "bound", json_real(level + SIM_Z3 * se0));
		json_object_set_new(x, "ok", json_boolean(rate <= level +
		    SIM_Z3 * se0));
		json_object_set_new(o, "false_alarm", x);
	} else {
		x = json_object();
		json_object_set_new(x, "probability", json_real(rate));
		json_object_set_new(x, "se", simreport_num(simreport_se(rate, sim->runs)));
		json_object_set_new(x, "median_records", simreport_num(sum->p50));
		json_object_set_new(x, "p90_records", simreport_num(sum->p90));
		json_object_set_new(x, "median_units", simreport_num(sum->u50));
		json_object_set_new(x, "p90_units", simreport_num(sum->u90));
		json_object_set_new(x, "median_seconds",
		    simreport_num(simreport_secs(sim, sum->p50)));
		json_object_set_new(x, "p90_seconds",
		    simreport_num(simreport_secs(sim, sum->p90)));
		json_object_set_new(o, "detection", x);
		x = json_object();
		nr = simreport_units_to_records(sim, fixed_units);
		json_object_set_new(x, "power", json_real(sim->power));
		json_object_set_new(x, "units", simreport_num(ceil(fixed_units)));
		json_object_set_new(x, "records", simreport_num(nr));
		json_object_set_new(x, "seconds", simreport_num(simreport_secs(sim, nr)));
		json_object_set_new(o, "fixed_horizon", x);
	}
	x = json_object();
	rate = (double)sum->naive / R;
	json_object_set_new(x, "looks", json_integer(sim->looks));
	json_object_set_new(x, "rate", json_real(rate));
	json_object_set_new(x, "se", simreport_num(simreport_se(rate, sim->runs)));
	json_object_set_new(o, "naive", x);
	return o;
}

static json_t *
simreport_arms(const struct proto_arm *arms, int narms)
{
	json_t *a = json_array(), *o;
	int i;

	for (i = 0; i < narms; i++) {
		o = json_object();
		json_object_set_new(o, "variant", json_string(arms[i].name));
		json_object_set_new(o, "weight", json_real(arms[i].weight));
		json_array_append_new(a, o);
	}
	return a;
}

json_t *
simreport_json(const struct sim *sim, double alpha_total)
{
	json_t *root = json_object(), *tests = json_array(), *o, *e;
	const struct conf_guardrail *g;
	const struct scenario_metric *m;
	struct sim_sum sum;
	uint64_t fam = 0, r, refused = 0;
	double R = (double)sim->runs, rate, se0;
	int i;

	json_object_set_new(root, "experiment", json_string(sim->s.experiment));
	json_object_set_new(root, "runs", json_integer((json_int_t)sim->runs));
	json_object_set_new(root, "records_per_run",
	    json_integer((json_int_t)sim->s.records));
	json_object_set_new(root, "records_per_unit",
	    json_integer(scenario_records_per_unit(&sim->s)));
	json_object_set_new(root, "rate", json_real(sim->s.rate));
	json_object_set_new(root, "tick_records",
	    json_integer((json_int_t)sim->tick_every));
	json_object_set_new(root, "seed", json_integer((json_int_t)sim->seed));
	json_object_set_new(root, "jobs", json_integer(sim->jobs));
	json_object_set_new(root, "arms", simreport_arms(sim->s.arms,
	    sim->s.narms));
	if (sim->s.ramp_at > 0) {
		o = json_object();
		json_object_set_new(o, "at", json_real(sim->s.ramp_at));
		json_object_set_new(o, "arms", simreport_arms(sim->s.ramp_arms,
		    sim->s.narms));
		json_object_set_new(root, "ramp", o);
	} else
		json_object_set_new(root, "ramp", json_null());
	json_object_set_new(root, "srm_loss", json_real(sim->s.srm_loss));
	for (i = 0; i < sim->ntests; i++) {
		g = &sim->conf->guardrails[sim->t[i].g];
		m = &sim->s.metrics[sim->t[i].metric];
		simreport_summarise(sim, i, &sum);
		refused = sum.refused;
		o = simreport_block(sim, &sum, sim->t[i].effect, sim->t[i].level,
		    sim->t[i].fixed_units);
		json_object_set_new(o, "guardrail", json_string(g->name));
		json_object_set_new(o, "metric", json_string(g->metric));
		json_object_set_new(o, "test", json_string(conf_test_name(g->test)));
		json_object_set_new(o, "quantile", g->test == TEST_QUANTILE ?
		    json_real(g->quantile) : json_null());
		json_object_set_new(o, "harm", json_string(g->harm ==
		    HARM_INCREASE ? "increase" : "decrease"));
		json_object_set_new(o, "margin", json_real(g->margin));
		json_object_set_new(o, "margin_relative",
		    json_boolean(g->margin_relative));
		json_object_set_new(o, "variant",
		    json_string(sim->s.arms[sim->t[i].arm].name));
		json_object_set_new(o, "level", json_real(sim->t[i].level));
		if (m->effect != 0 && sim->t[i].arm == sim->s.effect_arm) {
			/* the metric's effect; "false_alarm" above when it
			 * stays inside the margin */
			e = json_object();
			json_object_set_new(e, "value", json_real(m->effect));
			json_object_set_new(e, "relative",
			    json_boolean(m->effect_relative));
			json_object_set_new(e, "above", m->effect_above > 0 ?
			    json_real(m->effect_above) : json_null());
			json_object_set_new(o, "effect", e);
		} else
			json_object_set_new(o, "effect", json_null());
		json_object_set_new(o, "safe_rate", json_real((double)sum.safe /
		    R));
		if (sum.cov_n > 0) {
			e = json_object();
			rate = 1 - (double)sum.cov_miss / (double)sum.cov_n;
			json_object_set_new(e, "rate", json_real(rate));
			json_object_set_new(e, "se", json_real(simreport_se(rate,
			    sum.cov_n)));
			json_object_set_new(e, "runs",
			    json_integer((json_int_t)sum.cov_n));
			json_object_set_new(e, "target", json_real(1 -
			    sim->t[i].level));
			json_object_set_new(o, "coverage", e);
		} else
			json_object_set_new(o, "coverage", json_null());
		json_array_append_new(tests, o);
	}
	json_object_set_new(root, "tests", tests);
	simreport_summarise(sim, -1, &sum);
	refused = sum.refused;
	o = simreport_block(sim, &sum, sim->s.srm_loss > 0, sim->srm_level,
	    sim->srm_fixed_units);
	json_object_set_new(o, "level", json_real(sim->srm_level));
	json_object_set_new(root, "srm", o);
	for (r = 0; r < sim->runs; r++)
		fam += sim->res[r].any_false;
	o = json_object();
	rate = (double)fam / R;
	se0 = sqrt(alpha_total * (1 - alpha_total) / R);
	json_object_set_new(o, "alpha", json_real(alpha_total));
	json_object_set_new(o, "false_alarm_rate", json_real(rate));
	json_object_set_new(o, "se", simreport_num(simreport_se(rate, sim->runs)));
	json_object_set_new(o, "bound", json_real(alpha_total + SIM_Z3 * se0));
	json_object_set_new(root, "family", o);
	json_object_set_new(root, "refused_records",
	    json_integer((json_int_t)refused));
	return root;
}

/* ---- text report (rendered from the JSON, so both agree) ---- */

static double
simreport_jnum(const json_t *o, const char *key)
{
	const json_t *v = json_object_get(o, key);

	return json_is_number(v) ? json_number_value(v) : NAN;
}

static void
simreport_print_block(const struct sim *sim, const json_t *o, FILE *fp)
{
	const json_t *x;
	char t50[32], t90[32];

	if ((x = json_object_get(o, "false_alarm")) != NULL)
		fprintf(fp, "  false alarms      %.4f +- %.4f  (a valid test "
		    "stays <= %.4f: %s)\n", simreport_jnum(x, "rate"), simreport_jnum(x, "se"),
		    simreport_jnum(x, "bound"), json_is_true(json_object_get(x, "ok")) ?
		    "ok" : "EXCEEDED");
	if ((x = json_object_get(o, "detection")) != NULL) {
		fprintf(fp, "  detected          %.4f +- %.4f  within %llu "
		    "records\n", simreport_jnum(x, "probability"), simreport_jnum(x, "se"),
		    (unsigned long long)sim->s.records);
		simreport_human_time(t50, sizeof t50, simreport_jnum(x, "median_seconds"));
		simreport_human_time(t90, sizeof t90, simreport_jnum(x, "p90_seconds"));
		if (isfinite(simreport_jnum(x, "median_records")))
			fprintf(fp, "  time to harm      median %.0f records "
			    "(%s), 90th percentile ", simreport_jnum(x, "median_records"),
			    t50);
		else
			fprintf(fp, "  time to harm      median beyond the "
			    "horizon, 90th percentile ");
		if (isfinite(simreport_jnum(x, "p90_records")))
			fprintf(fp, "%.0f records (%s)\n", simreport_jnum(x,
			    "p90_records"), t90);
		else
			fprintf(fp, "beyond the horizon\n");
		x = json_object_get(o, "fixed_horizon");
		simreport_human_time(t50, sizeof t50, simreport_jnum(x, "seconds"));
		if (isfinite(simreport_jnum(x, "records")))
			fprintf(fp, "  fixed horizon     %.0f records (%s) for "
			    "%.0f%% power, one look only\n", simreport_jnum(x, "records"),
			    t50, 100 * sim->power);
		else
			fprintf(fp, "  fixed horizon     none: the effect does "
			    "not exceed the margin\n");
	}
	x = json_object_get(o, "naive");
	snprintf(t50, sizeof t50, "naive, %d looks", sim->looks);
	fprintf(fp, "  %-17s %.4f +- %.4f  (z-test at the same level at "
	    "each look)\n", t50, simreport_jnum(x, "rate"), simreport_jnum(x, "se"));
}

void
simreport_print(const struct sim *sim, const json_t *root, FILE *fp)
{
	const json_t *t, *x;
	size_t i;
	int j;

	fprintf(fp, "stopcock simulate: %llu runs of %llu records, seed "
	    "%llu, %d job%s\n", (unsigned long long)sim->runs,
	    (unsigned long long)sim->s.records,
	    (unsigned long long)sim->seed, sim->jobs, sim->jobs > 1 ? "s" : "");
	fprintf(fp, "plan:");
	for (j = 0; j < sim->s.narms; j++)
		fprintf(fp, " %s=%g", sim->s.arms[j].name,
		    sim->s.arms[j].weight);
	if (sim->s.ramp_at > 0) {
		fprintf(fp, ", after %g of the records", sim->s.ramp_at);
		for (j = 0; j < sim->s.narms; j++)
			fprintf(fp, " %s=%g", sim->s.ramp_arms[j].name,
			    sim->s.ramp_arms[j].weight);
	}
	fprintf(fp, "; %d records per unit; %g records/s; tick every %llu "
	    "records\n", scenario_records_per_unit(&sim->s), sim->s.rate,
	    (unsigned long long)sim->tick_every);
	json_array_foreach(json_object_get(root, "tests"), i, t) {
		fprintf(fp, "\n%s on %s: %s", json_string_value(
		    json_object_get(t, "guardrail")), json_string_value(
		    json_object_get(t, "variant")), json_string_value(
		    json_object_get(t, "test")));
		if (isfinite(simreport_jnum(t, "quantile")))
			fprintf(fp, " %g", simreport_jnum(t, "quantile"));
		fprintf(fp, " of %s, level %.4g\n", json_string_value(
		    json_object_get(t, "metric")), simreport_jnum(t, "level"));
		simreport_print_block(sim, t, fp);
		if ((x = json_object_get(t, "coverage")) != NULL &&
		    !json_is_null(x))
			fprintf(fp, "  CS coverage       %.4f +- %.4f  (target "
			    ">= %.4f)\n", simreport_jnum(x, "rate"), simreport_jnum(x, "se"),
			    simreport_jnum(x, "target"));
	}
	t = json_object_get(root, "srm");
	fprintf(fp, "\nsample ratio mismatch, level %.4g\n", simreport_jnum(t, "level"));
	simreport_print_block(sim, t, fp);
	t = json_object_get(root, "family");
	fprintf(fp, "\nany false alarm in the experiment: %.4f +- %.4f "
	    "(alpha %.4g, bound %.4f)\n", simreport_jnum(t, "false_alarm_rate"),
	    simreport_jnum(t, "se"), simreport_jnum(t, "alpha"), simreport_jnum(t, "bound"));
	if (simreport_jnum(root, "refused_records") > 0)
		fprintf(fp, "warning: the engine refused %.0f records\n",
		    simreport_jnum(root, "refused_records"));
}
