/*
 * verdict_int.h: what verdict.c (the rule, the cheap kinds, rates,
 * closing epochs, SRM) and verdict_quantile.c (the quantile tests'
 * looks) share. Not for use outside them.
 */
#ifndef STOPCOCK_VERDICT_INT_H
#define STOPCOCK_VERDICT_INT_H

#include "engine_int.h"

/* verdict.c */
int	 verdict_grown(const struct engine *, double *last, double n,
	    double growth, double step);
double	 verdict_margin_abs(const struct conf_guardrail *, double control);
void	 verdict_cs_intersect(struct test *, double lo, double hi);
void	 verdict_set_relative(struct test *);

/* verdict_quantile.c */
int	 verdict_quantile_eval(struct engine *, struct experiment *,
	    struct test *, const struct conf_guardrail *,
	    const struct series *a, const struct series *b, double level,
	    int want_cs);
int	 verdict_quantile_detect(struct engine *, struct experiment *,
	    struct test *, const struct conf_guardrail *,
	    const struct series *a, const struct series *b);
void	 verdict_quantile_harm_bound(struct engine *, struct experiment *,
	    struct test *, const struct conf_guardrail *,
	    const struct series *a, const struct series *b, double level);

#endif
