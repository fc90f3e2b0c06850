/*
 * alert_text.c: the words of an alert, built from its finding: the one
 * human sentence of its summary (what happened, where, how sure; for a
 * safe verdict the bound that rules harm out rather than a p-value, which
 * there measures the evidence against harm) and the key=value fields of
 * its syslog line. Pure: no state, no I/O; alert.c owns the alerts.
 */
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "daemon.h"
#include "alert_int.h"

/* A bounded line builder: appends stop at the end, never overflow. */
struct alert_text_line {
	char	buf[ALERT_LINE_MAX];
	size_t	len;
};

static void alert_text_printf(struct alert_text_line *, const char *, ...)
    SC_PRINTF(2, 3);

static void
alert_text_printf(struct alert_text_line *l, const char *fmt, ...)
{
	va_list ap;
	int n;

	if (l->len >= sizeof l->buf - 1)
		return;
	va_start(ap, fmt);
	n = vsnprintf(l->buf + l->len, sizeof l->buf - l->len, fmt, ap);
	va_end(ap);
	if (n < 0)
		return;
	l->len += (size_t)n;
	if (l->len >= sizeof l->buf)
		l->len = sizeof l->buf - 1;
}

static void
alert_text_num(struct alert_text_line *l, const char *key, double v)
{
	if (isfinite(v))
		alert_text_printf(l, " %s=%.6g", key, v);
	else
		alert_text_printf(l, " %s=nan", key);
}

static const char *
alert_text_arm_role(const struct finding *f, const char *variant)
{
	if (f->control != NULL && strcmp(variant, f->control) == 0)
		return "control";
	if (f->variant != NULL && strcmp(variant, f->variant) == 0)
		return "treatment";
	return NULL;
}

/* One human sentence: what happened, where, how sure. */
char *
alert_text_summary(const struct finding *f, enum alert_kind kind,
    const char *reason, const char *unit)
{
	struct alert_text_line l;
	const char *sp = *unit != '\0' ? " " : "";
	int i, increase;

	l.len = 0;
	l.buf[0] = '\0';
	if (alert_text_srm(kind)) {
		alert_text_printf(&l, "Sample ratio mismatch in experiment %s "
		    "epoch %u:", f->experiment, f->epoch);
		for (i = 0; i < f->narms; i++)
			alert_text_printf(&l, "%s %s %llu exposures "
			    "(weight %g)",
			    i == 0 ? "" : ",", f->arms[i].variant,
			    (unsigned long long)f->arms[i].exposures,
			    f->arms[i].weight);
		alert_text_printf(&l, "; p=%.3g. Every verdict of this "
		    "epoch is "
		    "untrustworthy until the assignment is fixed and a new "
		    "epoch starts", f->p);
		return xstrdup(l.buf);
	}
	if (kind == ALERT_PAUSE || kind == ALERT_PAUSE_DRY_RUN) {
		alert_text_printf(&l, "%s experiment %s: %s",
		    kind == ALERT_PAUSE ? "Paused" :
		    "Dry run: would have paused", f->experiment,
		    reason != NULL ? reason : "pause guardrail");
		return xstrdup(l.buf);
	}
	alert_text_printf(&l, "guardrail %s %s for %s vs %s in experiment %s: "
	    "effect %+.4g%s%s", f->guardrail, kind == ALERT_SAFE ?
	    "is safe" : "shows harm", f->variant ? f->variant : "?",
	    f->control ? f->control : "?", f->experiment, f->estimate, sp,
	    unit);
	if (isfinite(f->rel_estimate))
		alert_text_printf(&l, " (%+.1f%%)", 100 * f->rel_estimate);
	alert_text_printf(&l, ", confidence sequence [%.4g, %.4g]%s%s",
	    f->lower,
	    f->upper, sp, unit);
	if (kind == ALERT_SAFE) {
		/* The bound that rules harm out says more than a p-value,
		 * which here measures the evidence against harm. */
		increase = f->harm == NULL || strcmp(f->harm, "decrease") != 0;
		alert_text_printf(&l, ": the effect is %s %+.4g%s%s, "
		    "inside the "
		    "margin of %s%.4g%s%s, alpha %.3g of %d tests",
		    increase ? "at most" : "at least", increase ? f->upper :
		    f->lower, sp, unit, increase ? "+" : "-", f->margin, sp,
		    unit, f->alpha, f->family);
	} else
		alert_text_printf(&l, ", p=%.3g, alpha %.3g of %d tests", f->p,
		    f->alpha, f->family);
	if (f->untrusted)
		alert_text_printf(&l, "; UNTRUSTED: sample ratio mismatch "
		    "in this "
		    "epoch");
	if (f->untrusted_records > 0)
		alert_text_printf(&l, "; %llu records from untrusted inputs "
		    "in this epoch: auto-pause does not act on it",
		    (unsigned long long)f->untrusted_records);
	return xstrdup(l.buf);
}

/* The key=value fields of the syslog line (after "alert raised"). */
char *
alert_text_fields(const struct finding *f, const char *id,
    enum alert_kind kind, const char *kind_name, const char *sev,
    const char *link, const char *unit)
{
	struct alert_text_line l;
	char key[PROTO_NAME_MAX + 16];
	int i, srm;

	srm = alert_text_srm(kind);
	l.len = 0;
	l.buf[0] = '\0';
	alert_text_printf(&l, "id=%s alert=%s severity=%s experiment=%s "
	    "epoch=%u guardrail=%s", id, kind_name, sev, f->experiment,
	    f->epoch, f->guardrail ? f->guardrail : "srm");
	if (!srm) {
		alert_text_printf(&l, " metric=%s test=%s variant=%s "
		    "control=%s "
		    "harm=%s verdict=%s", f->metric ? f->metric : "-",
		    f->test ? f->test : "-", f->variant ? f->variant : "-",
		    f->control ? f->control : "-", f->harm ? f->harm : "-",
		    verdict_name(f->verdict));
		alert_text_num(&l, "estimate", f->estimate);
		alert_text_num(&l, "lower", f->lower);
		alert_text_num(&l, "upper", f->upper);
		alert_text_num(&l, "rel_estimate", f->rel_estimate);
		alert_text_num(&l, "rel_lower", f->rel_lower);
		alert_text_num(&l, "rel_upper", f->rel_upper);
		if (*unit != '\0')
			alert_text_printf(&l, " unit=%s", unit);
	} else {
		alert_text_printf(&l, " verdict=srm");
		alert_text_num(&l, "chi2_p", f->chi2_p);
	}
	alert_text_num(&l, "p", f->p);
	alert_text_num(&l, "alpha", f->alpha);
	alert_text_printf(&l, " family=%d untrusted=%s untrusted_records=%llu",
	    f->family, f->untrusted ? "yes" : "no",
	    (unsigned long long)f->untrusted_records);
	/* Counts per arm: every arm for SRM, the two compared otherwise. */
	for (i = 0; i < f->narms; i++) {
		const struct finding_arm *arm = &f->arms[i];

		if (!srm && alert_text_arm_role(f, arm->variant) == NULL)
			continue;
		alert_text_printf(&l, " exposures.%s=%llu", arm->variant,
		    (unsigned long long)arm->exposures);
		if (srm)
			continue;
		snprintf(key, sizeof key, "n.%s", arm->variant);
		alert_text_num(&l, key, arm->n);
		if (f->test_kind == TEST_PROPORTION ||
		    f->test_kind == TEST_RATE) {
			snprintf(key, sizeof key, "k.%s", arm->variant);
			alert_text_num(&l, key, arm->k);
		}
	}
	if (link != NULL)
		alert_text_printf(&l, " link=%s", link);
	return xstrdup(l.buf);
}
