/*
 * chart.c: SVG charts drawn from the engine's JSON view of an experiment.
 * A test chart shows the effect estimate over time inside its shaded
 * confidence sequence, with the zero line, the margin line and a marker
 * where the verdict fired; the SRM chart shows the log evidence against
 * its log(1/alpha) threshold with each epoch's start. The daemon serves
 * these documents to its page and `stopcock replay --report` writes them
 * to files, so both show the same picture.
 *
 * Pure: the caller hands in JSON and gets a string back. Presentation
 * attributes (not CSS classes alone) carry the styling, so a chart is a
 * self-contained document; classes name the parts for the page and the
 * tests. Points outside the plot are clamped to its edge rather than
 * clipped, which keeps the documents free of ids that would collide when
 * several charts are inlined into one page.
 */
#include <math.h>
#include <stdarg.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <time.h>

#include "stopcock/chart.h"
#include "stopcock/util.h"

#define CHART_W		640
#define CHART_H		320
#define CHART_X0	68.0	/* plot box */
#define CHART_X1	620.0
#define CHART_Y0	48.0
#define CHART_Y1	242.0
#define CHART_POINTS_MAX 100000	/* history rows drawn, a bound on output */

#define CHART_INK	"#1b1b1b"
#define CHART_MUTED	"#5c5c5c"
#define CHART_GRID	"#e3e3e3"
#define CHART_LINE	"#1d3f6e"
#define CHART_BAND	"#9db4d3"
#define CHART_HARM	"#b3261e"
/* amber: a verdict whose epoch lost its trust (SRM) */
#define CHART_UNTRUSTED "#b26a00"
#define CHART_SAFE	"#1e6b34"
#define CHART_FONT	"font-family=\"sans-serif\""
/* A white outline under labels keeps them legible over lines. */
#define CHART_HALO	"stroke=\"#ffffff\" stroke-width=\"3\" " \
			"paint-order=\"stroke\""

struct chart_buf {
	char	*p;
	size_t	 len, cap;
};

struct chart_pt {
	double	t;
	double	v[4];		/* test: estimate, lower, upper, p;
				   srm: log_e, p */
};

/* Data space to pixel space. */
struct chart_frame {
	double	tmin, tmax;
	double	vmin, vmax;
	int	elapsed;	/* times are not wall clock: label as elapsed */
};

static void
chart_grow(struct chart_buf *b, size_t more)
{
	size_t cap;

	if (b->len + more + 1 <= b->cap)
		return;
	cap = b->cap ? b->cap : 4096;
	while (cap < b->len + more + 1)
		cap *= 2;
	b->p = xreallocarray(b->p, cap, 1);
	b->cap = cap;
}

static void SC_PRINTF(2, 3)
chart_printf(struct chart_buf *b, const char *fmt, ...)
{
	va_list ap;
	int n;

	va_start(ap, fmt);
	n = vsnprintf(NULL, 0, fmt, ap);
	va_end(ap);
	if (n < 0)
		fatal("chart: bad format");
	chart_grow(b, (size_t)n);
	va_start(ap, fmt);
	vsnprintf(b->p + b->len, (size_t)n + 1, fmt, ap);
	va_end(ap);
	b->len += (size_t)n;
}

static void
chart_puts(struct chart_buf *b, const char *s)
{
	size_t n = strlen(s);

	chart_grow(b, n);
	memcpy(b->p + b->len, s, n + 1);
	b->len += n;
}

static void
chart_escape_into(struct chart_buf *b, const char *s)
{
	for (; s != NULL && *s != '\0'; s++) {
		unsigned char c = (unsigned char)*s;

		switch (c) {
		case '&': chart_puts(b, "&amp;"); break;
		case '<': chart_puts(b, "&lt;"); break;
		case '>': chart_puts(b, "&gt;"); break;
		case '"': chart_puts(b, "&quot;"); break;
		case '\'': chart_puts(b, "&#39;"); break;
		default:
			/* XML 1.0 allows no C0 controls but tab and newline. */
			if ((c < 0x20 && c != '\t' && c != '\n') || c == 0x7f)
				chart_puts(b, "\xef\xbf\xbd");
			else {
				chart_grow(b, 1);
				b->p[b->len++] = (char)c;
				b->p[b->len] = '\0';
			}
		}
	}
}

char *
chart_xml_escape(const char *s)
{
	struct chart_buf b = { NULL, 0, 0 };

	chart_grow(&b, 0);
	b.p[0] = '\0';
	chart_escape_into(&b, s);
	return b.p;
}

/* A JSON number (integer or real) or NAN for null, absent or anything
 * else. */
static double
chart_num(const json_t *j)
{
	if (j != NULL && json_is_number(j))
		return json_number_value(j);
	return NAN;
}

static const char *
chart_str(const json_t *obj, const char *key, const char *dflt)
{
	const char *s = json_string_value(json_object_get(obj, key));

	return s != NULL ? s : dflt;
}

/* Rows of a history array; rows that are not arrays or lack a finite
 * time are dropped. Returns the number kept. */
static size_t
chart_rows(const json_t *hist, int width, struct chart_pt **out)
{
	struct chart_pt *pts;
	size_t i, n, kept = 0;
	int k;

	n = json_is_array(hist) ? json_array_size(hist) : 0;
	if (n > CHART_POINTS_MAX)
		n = CHART_POINTS_MAX;
	pts = xcalloc(n ? n : 1, sizeof *pts);
	for (i = 0; i < n; i++) {
		const json_t *row = json_array_get(hist, i);
		struct chart_pt *p = &pts[kept];

		if (!json_is_array(row))
			continue;
		p->t = chart_num(json_array_get(row, 0));
		if (!isfinite(p->t))
			continue;
		for (k = 0; k < 4; k++)
			p->v[k] = k < width ?
			    chart_num(json_array_get(row, (size_t)k + 1)) : NAN;
		kept++;
	}
	*out = pts;
	return kept;
}

static double
chart_x(const struct chart_frame *f, double t)
{
	double u = (t - f->tmin) / (f->tmax - f->tmin);

	if (!(u >= 0))
		u = 0;
	if (u > 1)
		u = 1;
	return CHART_X0 + u * (CHART_X1 - CHART_X0);
}

static double
chart_y(const struct chart_frame *f, double v)
{
	double u = (v - f->vmin) / (f->vmax - f->vmin);

	if (!(u >= 0))
		u = 0;
	if (u > 1)
		u = 1;
	return CHART_Y1 - u * (CHART_Y1 - CHART_Y0);
}

/* A step of 1, 2 or 5 x 10^k giving about n ticks over span. */
static double
chart_nice_step(double span, int n)
{
	double raw = span / n, mag, r;

	if (!(raw > 0) || !isfinite(raw))
		return 1;
	mag = pow(10, floor(log10(raw)));
	r = raw / mag;
	if (r < 1.5)
		return mag;
	if (r < 3.5)
		return 2 * mag;
	if (r < 7.5)
		return 5 * mag;
	return 10 * mag;
}

static void
chart_fmt_value(char *buf, size_t size, double v, double step)
{
	int decimals;

	if (fabs(v) < step * 1e-6)
		v = 0;		/* no "-0.000" from rounding */
	if (step >= 1e6 || step < 1e-4) {
		snprintf(buf, size, "%.3g", v);
		return;
	}
	decimals = step >= 1 ? 0 : (int)ceil(-log10(step) - 1e-9);
	snprintf(buf, size, "%.*f", decimals, v);
}

/* Times before 2001 are taken as elapsed seconds (simulations, tests);
 * later ones as wall clock, shown in UTC. */
static void
chart_fmt_time(char *buf, size_t size, const struct chart_frame *f,
    double t, double step)
{
	struct tm tm;
	time_t tt;
	long s;

	if (f->elapsed) {
		s = lround(t - f->tmin);
		if (step < 60)
			snprintf(buf, size, "+%lds", s);
		else if (step < 86400)
			snprintf(buf, size, "+%ld:%02ld", s / 3600,
			    (s / 60) % 60);
		else
			snprintf(buf, size, "+%ldd", s / 86400);
		return;
	}
	tt = (time_t)floor(t);
	if (gmtime_r(&tt, &tm) == NULL) {
		snprintf(buf, size, "?");
		return;
	}
	if (step < 60)
		strftime(buf, size, "%H:%M:%S", &tm);
	else if (step < 86400)
		strftime(buf, size, "%H:%M", &tm);
	else
		strftime(buf, size, "%m-%d", &tm);
}

/* Time ticks land on whole minutes, hours or days. */
static double
chart_time_step(double span)
{
	static const double steps[] = { 1, 2, 5, 10, 15, 30, 60, 120, 300,
	    600, 900, 1800, 3600, 7200, 10800, 21600, 43200, 86400,
	    2 * 86400, 7 * 86400, 14 * 86400, 28 * 86400 };
	size_t i;

	for (i = 0; i < SC_NELEM(steps); i++)
		if (span / steps[i] <= 6)
			return steps[i];
	return chart_nice_step(span, 6);
}

static void
chart_time_range(struct chart_frame *f, const struct chart_pt *pts,
    size_t n)
{
	size_t i;

	f->tmin = INFINITY;
	f->tmax = -INFINITY;
	for (i = 0; i < n; i++) {
		if (pts[i].t < f->tmin)
			f->tmin = pts[i].t;
		if (pts[i].t > f->tmax)
			f->tmax = pts[i].t;
	}
	if (n == 0) {
		f->tmin = 0;
		f->tmax = 60;
	}
}

static void
chart_time_finish(struct chart_frame *f)
{
	if (!(f->tmax > f->tmin)) {
		f->tmin -= 30;
		f->tmax += 30;
	}
	f->elapsed = f->tmin < 978307200.0;	/* 2001-01-01 */
}

/* Widen [lo, hi] by a little and round to ticks. */
static void
chart_value_finish(struct chart_frame *f, double lo, double hi)
{
	double span, step;

	if (!isfinite(lo) || !isfinite(hi)) {
		lo = -1;
		hi = 1;
	}
	span = hi - lo;
	if (!(span > 0)) {
		span = fabs(hi) > 0 ? fabs(hi) : 1;
		lo -= span / 2;
		hi += span / 2;
		span = hi - lo;
	}
	lo -= span * 0.06;
	hi += span * 0.06;
	step = chart_nice_step(hi - lo, 5);
	f->vmin = floor(lo / step) * step;
	f->vmax = ceil(hi / step) * step;
}

static void
chart_open(struct chart_buf *b, const char *label)
{
	chart_printf(b, "<svg xmlns=\"http://www.w3.org/2000/svg\" "
	    "viewBox=\"0 0 %d %d\" width=\"%d\" height=\"%d\" role=\"img\" "
	    "aria-label=\"", CHART_W, CHART_H, CHART_W, CHART_H);
	chart_escape_into(b, label);
	chart_printf(b, "\" " CHART_FONT " font-size=\"13\">\n<title>");
	chart_escape_into(b, label);
	chart_printf(b, "</title>\n<rect class=\"bg\" x=\"0\" y=\"0\" "
	    "width=\"%d\" height=\"%d\" fill=\"#ffffff\"/>\n", CHART_W,
	    CHART_H);
}

/* Grid, tick labels and axis captions. */
static void
chart_axes(struct chart_buf *b, const struct chart_frame *f,
    const char *ycaption)
{
	char label[64];
	double step, v, t, y, x;
	int i;

	step = chart_nice_step(f->vmax - f->vmin, 5);
	chart_puts(b, "<g class=\"axis-y\">\n");
	for (i = 0, v = f->vmin; v <= f->vmax + step * 1e-6 && i < 40;
	    i++, v = f->vmin + i * step) {
		y = chart_y(f, v);
		chart_fmt_value(label, sizeof label, v, step);
		chart_printf(b, "<line x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" "
		    "y2=\"%.1f\" stroke=\"" CHART_GRID "\"/>"
		    "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"end\" "
		    "fill=\"" CHART_MUTED "\">%s</text>\n", CHART_X0, y,
		    CHART_X1, y, CHART_X0 - 6, y + 4, label);
	}
	chart_printf(b, "<text x=\"14\" y=\"%.1f\" fill=\"" CHART_MUTED "\" "
	    "text-anchor=\"middle\" transform=\"rotate(-90 14 %.1f)\">",
	    (CHART_Y0 + CHART_Y1) / 2, (CHART_Y0 + CHART_Y1) / 2);
	chart_escape_into(b, ycaption);
	chart_puts(b, "</text>\n</g>\n<g class=\"axis-x\">\n");

	step = chart_time_step(f->tmax - f->tmin);
	t = f->elapsed ? f->tmin : ceil(f->tmin / step) * step;
	for (i = 0; t <= f->tmax + 1e-9 && i < 40; i++, t += step) {
		x = chart_x(f, t);
		chart_fmt_time(label, sizeof label, f, t, step);
		chart_printf(b, "<line x1=\"%.1f\" y1=\"%.1f\" x2=\"%.1f\" "
		    "y2=\"%.1f\" stroke=\"" CHART_GRID "\"/>"
		    "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"middle\" "
		    "fill=\"" CHART_MUTED "\">%s</text>\n", x, CHART_Y0, x,
		    CHART_Y1 + 4, x, CHART_Y1 + 18, label);
	}
	chart_printf(b, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"middle\" "
	    "fill=\"" CHART_MUTED "\">%s</text>\n", (CHART_X0 + CHART_X1) / 2,
	    CHART_Y1 + 34, f->elapsed ? "time since first point" :
	    "time (UTC)");
	chart_printf(b, "<rect x=\"%.1f\" y=\"%.1f\" width=\"%.1f\" "
	    "height=\"%.1f\" fill=\"none\" stroke=\"#9a9a9a\"/>\n</g>\n",
	    CHART_X0, CHART_Y0, CHART_X1 - CHART_X0, CHART_Y1 - CHART_Y0);
}

static void
chart_title(struct chart_buf *b, const char *title, const char *right,
    const char *right_colour)
{
	chart_printf(b, "<text class=\"title\" x=\"%.1f\" y=\"22\" "
	    "font-size=\"15\" font-weight=\"bold\" fill=\"" CHART_INK "\">",
	    CHART_X0 - 50);
	chart_escape_into(b, title);
	chart_printf(b, "</text>\n<text class=\"status\" x=\"%.1f\" y=\"40\" "
	    "text-anchor=\"end\" font-weight=\"bold\" fill=\"%s\">", CHART_X1,
	    right_colour);
	chart_escape_into(b, right);
	chart_puts(b, "</text>\n");
}

/* One polyline per run of points where column k is finite. */
static void
chart_line(struct chart_buf *b, const struct chart_frame *f,
    const struct chart_pt *pts, size_t n, int k, const char *cls)
{
	size_t i, run, first;

	for (i = 0; i < n; ) {
		if (!isfinite(pts[i].v[k])) {
			i++;
			continue;
		}
		for (run = i; run < n && isfinite(pts[run].v[k]); run++)
			;
		if (run - i == 1)
			chart_printf(b, "<circle class=\"%s\" cx=\"%.1f\" "
			    "cy=\"%.1f\" r=\"2.5\" fill=\"" CHART_LINE "\"/>\n",
			    cls, chart_x(f, pts[i].t), chart_y(f, pts[i].v[k]));
		else {
			chart_printf(b, "<polyline class=\"%s\" fill=\"none\" "
			    "stroke=\"" CHART_LINE "\" stroke-width=\"2\" "
			    "stroke-linejoin=\"round\" points=\"", cls);
			for (first = i; i < run; i++)
				chart_printf(b, "%s%.1f,%.1f",
				    i == first ? "" : " ",
				    chart_x(f, pts[i].t),
				    chart_y(f, pts[i].v[k]));
			chart_puts(b, "\"/>\n");
		}
		i = run;
	}
}

/* One polygon per run of points with both bounds finite. */
static void
chart_band(struct chart_buf *b, const struct chart_frame *f,
    const struct chart_pt *pts, size_t n)
{
	size_t i, j, run;

#define CHART_BOUNDED(p) (isfinite((p).v[1]) && isfinite((p).v[2]))
	for (i = 0; i < n; ) {
		if (!CHART_BOUNDED(pts[i])) {
			i++;
			continue;
		}
		for (run = i; run < n && CHART_BOUNDED(pts[run]); run++)
			;
		chart_puts(b, "<polygon class=\"band\" fill=\"" CHART_BAND
		    "\" fill-opacity=\"0.45\" stroke=\"" CHART_BAND "\" "
		    "points=\"");
		for (j = i; j < run; j++)
			chart_printf(b, "%.1f,%.1f ", chart_x(f, pts[j].t),
			    chart_y(f, pts[j].v[2]));
		for (j = run; j > i; j--)
			chart_printf(b, "%.1f,%.1f ", chart_x(f, pts[j - 1].t),
			    chart_y(f, pts[j - 1].v[1]));
		b->p[b->len - 1] = '"';
		chart_puts(b, "/>\n");
		i = run;
	}
#undef CHART_BOUNDED
}

/* A horizontal reference line with a label at its right end. */
static void
chart_hline(struct chart_buf *b, const struct chart_frame *f, double v,
    const char *cls, const char *colour, const char *dash,
    const char *label)
{
	double y = chart_y(f, v);

	chart_printf(b, "<line class=\"%s\" x1=\"%.1f\" y1=\"%.1f\" "
	    "x2=\"%.1f\" y2=\"%.1f\" stroke=\"%s\" stroke-width=\"1.5\"",
	    cls, CHART_X0, y, CHART_X1, y, colour);
	if (dash != NULL)
		chart_printf(b, " stroke-dasharray=\"%s\"", dash);
	chart_puts(b, "/>\n");
	if (label != NULL) {
		chart_printf(b, "<text class=\"%s-label\" x=\"%.1f\" "
		    "y=\"%.1f\" "
		    "text-anchor=\"end\" fill=\"%s\" " CHART_HALO ">", cls,
		    CHART_X1 - 4, y - 5 < CHART_Y0 + 12 ? y + 15 : y - 5,
		    colour);
		chart_escape_into(b, label);
		chart_puts(b, "</text>\n");
	}
}

/* The moment the verdict first held: a vertical rule, a dot on the
 * series at that time and the verdict in words. */
static void
chart_marker(struct chart_buf *b, const struct chart_frame *f,
    const struct chart_pt *pts, size_t n, int k, double when,
    const char *word, const char *colour)
{
	char clock[32];
	double x, step;
	size_t i;

	if (!isfinite(when))
		return;
	x = chart_x(f, when);
	step = chart_time_step(f->tmax - f->tmin);
	chart_fmt_time(clock, sizeof clock, f, when, step < 60 ? 1 : 60);
	chart_printf(b, "<g class=\"verdict\"><line x1=\"%.1f\" y1=\"%.1f\" "
	    "x2=\"%.1f\" y2=\"%.1f\" stroke=\"%s\" stroke-width=\"1.5\"/>",
	    x, CHART_Y0, x, CHART_Y1, colour);
	for (i = 0; i < n; i++)
		if (pts[i].t >= when && isfinite(pts[i].v[k])) {
			chart_printf(b, "<circle cx=\"%.1f\" cy=\"%.1f\" "
			    "r=\"5\" fill=\"%s\" stroke=\"#ffffff\" "
			    "stroke-width=\"1.5\"/>", chart_x(f, pts[i].t),
			    chart_y(f, pts[i].v[k]), colour);
			break;
		}
	chart_printf(b, "<text x=\"%.1f\" y=\"%.1f\" text-anchor=\"%s\" "
	    "font-weight=\"bold\" fill=\"%s\" " CHART_HALO ">",
	    x > CHART_X1 - 160 ? x - 5 :
	    x + 5, CHART_Y0 + 14, x > CHART_X1 - 160 ? "end" : "start",
	    colour);
	chart_escape_into(b, word);
	chart_printf(b, " at %s</text></g>\n", clock);
}

/* The legend: a row of swatches with words, so no colour stands alone. */
static void
chart_legend(struct chart_buf *b, const char *const *items, int n)
{
	double x = CHART_X0, y = CHART_H - 16;
	int i;

	chart_puts(b, "<g class=\"legend\">\n");
	for (i = 0; i + 1 < n; i += 2) {
		const char *kind = items[i], *text = items[i + 1];

		if (strcmp(kind, "line") == 0)
			chart_printf(b, "<line x1=\"%.1f\" y1=\"%.1f\" "
			    "x2=\"%.1f\" y2=\"%.1f\" stroke=\"" CHART_LINE "\" "
			    "stroke-width=\"2\"/>", x, y - 4, x + 18, y - 4);
		else if (strcmp(kind, "band") == 0)
			chart_printf(b, "<rect x=\"%.1f\" y=\"%.1f\" "
			    "width=\"18\" height=\"10\" "
			    "fill=\"" CHART_BAND "\" "
			    "fill-opacity=\"0.45\" stroke=\"" CHART_BAND "\"/>",
			    x, y - 9);
		else if (strcmp(kind, "dash") == 0)
			chart_printf(b, "<line x1=\"%.1f\" y1=\"%.1f\" "
			    "x2=\"%.1f\" y2=\"%.1f\" stroke=\"" CHART_HARM "\" "
			    "stroke-width=\"1.5\" stroke-dasharray=\"6 4\"/>",
			    x, y - 4, x + 18, y - 4);
		else if (strcmp(kind, "dot") == 0)
			chart_printf(b, "<line x1=\"%.1f\" y1=\"%.1f\" "
			    "x2=\"%.1f\" y2=\"%.1f\" "
			    "stroke=\"" CHART_MUTED "\" "
			    "stroke-width=\"1.5\" stroke-dasharray=\"2 3\"/>",
			    x, y - 4, x + 18, y - 4);
		else
			chart_printf(b, "<line x1=\"%.1f\" y1=\"%.1f\" "
			    "x2=\"%.1f\" y2=\"%.1f\" "
			    "stroke=\"" CHART_MUTED "\" "
			    "stroke-width=\"1.5\"/>", x + 9, y - 10, x + 9,
			    y + 2);
		chart_printf(b, "<text x=\"%.1f\" y=\"%.1f\" fill=\"" CHART_INK
		    "\">", x + 23, y);
		chart_escape_into(b, text);
		chart_puts(b, "</text>\n");
		x += 23 + 7.2 * (double)strlen(text) + 16;
	}
	chart_puts(b, "</g>\n");
}

static void
chart_no_data(struct chart_buf *b)
{
	chart_printf(b, "<text class=\"empty\" x=\"%.1f\" y=\"%.1f\" "
	    "text-anchor=\"middle\" fill=\"" CHART_MUTED "\" font-size=\"14\">"
	    "no data yet</text>\n", (CHART_X0 + CHART_X1) / 2,
	    (CHART_Y0 + CHART_Y1) / 2);
}

static void
chart_fmt_p(char *buf, size_t size, double p)
{
	if (!isfinite(p))
		snprintf(buf, size, "p = n/a");
	else if (p < 1e-4)
		snprintf(buf, size, "p < 0.0001");
	else
		snprintf(buf, size, "p = %.4f", p);
}

char *
chart_test_svg(const json_t *test)
{
	struct chart_buf b = { NULL, 0, 0 };
	struct chart_frame f;
	struct chart_pt *pts;
	char *title, *legend_cs, *mlabel, *status, ptext[32], mnum[32];
	const char *guardrail, *variant, *control, *verdict, *harm, *colour;
	const char *legend[8];
	double margin, mline, alpha, lo, hi, span, blo, bhi, first_ts;
	size_t n, i;
	int k, last;

	guardrail = chart_str(test, "guardrail", "?");
	variant = chart_str(test, "variant", "?");
	control = chart_str(test, "control", "control");
	verdict = chart_str(test, "verdict", "undecided");
	harm = chart_str(test, "harm", "increase");
	margin = chart_num(json_object_get(test, "margin"));
	alpha = chart_num(json_object_get(test, "alpha"));
	first_ts = chart_num(json_object_get(test, "first_ts"));
	n = chart_rows(json_object_get(test, "history"), 4, &pts);

	/* The margin is a size; its side follows the harmful direction. */
	mline = strcmp(harm, "decrease") == 0 ? -fabs(margin) : fabs(margin);

	chart_time_range(&f, pts, n);
	if (isfinite(first_ts) && first_ts > f.tmax && n > 0)
		f.tmax = first_ts;
	chart_time_finish(&f);

	/* The scale holds zero, the margin, every estimate and the latest
	 * bounds; early bounds (often very wide) may widen it by at most
	 * the same span again, beyond that they run off the edge. */
	lo = hi = 0;
	if (isfinite(mline)) {
		lo = fmin(lo, mline);
		hi = fmax(hi, mline);
	}
	blo = INFINITY;
	bhi = -INFINITY;
	last = 1;
	for (i = n; i-- > 0; ) {
		if (isfinite(pts[i].v[0])) {
			lo = fmin(lo, pts[i].v[0]);
			hi = fmax(hi, pts[i].v[0]);
		}
		for (k = 1; k <= 2; k++) {
			if (!isfinite(pts[i].v[k]))
				continue;
			if (last) {
				lo = fmin(lo, pts[i].v[k]);
				hi = fmax(hi, pts[i].v[k]);
			}
			blo = fmin(blo, pts[i].v[k]);
			bhi = fmax(bhi, pts[i].v[k]);
		}
		if (isfinite(pts[i].v[1]) || isfinite(pts[i].v[2]))
			last = 0;
	}
	span = hi - lo > 0 ? hi - lo : fmax(fabs(hi), 1e-3);
	if (isfinite(blo))
		lo = fmax(fmin(lo, blo), lo - span);
	if (isfinite(bhi))
		hi = fmin(fmax(hi, bhi), hi + span);
	chart_value_finish(&f, lo, hi);

	xasprintf(&title, "%s \xc2\xb7 %s vs %s", guardrail, variant, control);
	chart_open(&b, title);
	chart_fmt_p(ptext, sizeof ptext, chart_num(json_object_get(test, "p")));
	if (strcmp(verdict, "harm") == 0)
		colour = CHART_HARM;
	else if (strcmp(verdict, "safe") == 0)
		colour = CHART_SAFE;
	else
		colour = CHART_MUTED;
	/* an untrustworthy epoch is never shown as good news */
	if (json_is_true(json_object_get(test, "untrusted"))) {
		colour = CHART_UNTRUSTED;
		xasprintf(&status, "%s \xc2\xb7 %s \xc2\xb7 untrustworthy "
		    "(sample ratio mismatch)", verdict, ptext);
	} else
		xasprintf(&status, "%s \xc2\xb7 %s", verdict, ptext);
	chart_title(&b, title, status, colour);
	chart_axes(&b, &f, "effect (treatment \xe2\x88\x92 control)");

	chart_band(&b, &f, pts, n);
	chart_hline(&b, &f, 0, "zero", CHART_INK, NULL, NULL);
	mlabel = NULL;
	if (isfinite(mline)) {
		snprintf(mnum, sizeof mnum, "%.4g", fabs(mline));
		xasprintf(&mlabel, "margin %s%s (harm %s)", mline > 0 ? "+" :
		    mline < 0 ? "-" : "", mnum, strcmp(harm, "decrease") == 0 ?
		    "below" : "above");
		chart_hline(&b, &f, mline, "margin", CHART_HARM, "6 4", mlabel);
	}
	chart_line(&b, &f, pts, n, 0, "estimate");
	if (n == 0)
		chart_no_data(&b);
	if (strcmp(verdict, "harm") == 0 || strcmp(verdict, "safe") == 0)
		chart_marker(&b, &f, pts, n, 0, first_ts, verdict, colour);

	if (isfinite(alpha) && alpha > 0 && alpha < 1)
		xasprintf(&legend_cs, "%.4g%% confidence sequence",
		    100 * (1 - alpha));
	else
		legend_cs = xstrdup("confidence sequence");
	legend[0] = "line";
	legend[1] = "estimate";
	legend[2] = "band";
	legend[3] = legend_cs;
	legend[4] = "dash";
	legend[5] = "margin";
	legend[6] = "rule";
	legend[7] = "verdict fired";
	chart_legend(&b, legend, 8);
	chart_puts(&b, "</svg>\n");

	free(legend_cs);
	free(mlabel);
	free(status);
	free(title);
	free(pts);
	return b.p;
}

char *
chart_srm_svg(const json_t *experiment)
{
	struct chart_buf b = { NULL, 0, 0 };
	struct chart_frame f;
	struct chart_pt *pts;
	const json_t *srm, *epochs, *e;
	const char *verdict, *colour;
	char *title, *tlabel, *status, ptext[32], elabel[32];
	const char *legend[6];
	double salpha, thr, lo, hi, start, x, first_ts, span;
	size_t n, i;

	srm = json_object_get(experiment, "srm");
	epochs = json_object_get(experiment, "epochs");
	salpha = chart_num(json_object_get(experiment, "srm_alpha"));
	if (!(salpha > 0 && salpha < 1))
		salpha = chart_num(json_object_get(srm, "alpha"));
	thr = salpha > 0 && salpha < 1 ? log(1 / salpha) : NAN;
	verdict = chart_str(srm, "verdict", "undecided");
	first_ts = chart_num(json_object_get(srm, "first_ts"));
	n = chart_rows(json_object_get(srm, "history"), 2, &pts);

	chart_time_range(&f, pts, n);
	/* Epoch starts shortly before the history widen the view so the
	 * boundary shows; older ones would squash the chart and are left
	 * out. */
	span = f.tmax - f.tmin;
	for (i = 0; n > 0 && i < json_array_size(epochs); i++) {
		start = chart_num(json_object_get(json_array_get(epochs, i),
		    "started"));
		if (isfinite(start) && start < f.tmin &&
		    start >= f.tmin - fmax(span, 60) * 0.25)
			f.tmin = start;
	}
	chart_time_finish(&f);

	lo = 0;
	hi = isfinite(thr) ? thr * 1.1 : 1;
	for (i = 0; i < n; i++)
		if (isfinite(pts[i].v[0])) {
			lo = fmin(lo, pts[i].v[0]);
			hi = fmax(hi, pts[i].v[0]);
		}
	/* Evidence far below zero only says "balanced"; keep the scale on
	 * the part that matters. */
	if (isfinite(thr))
		lo = fmax(lo, -thr);
	chart_value_finish(&f, lo, hi);

	xasprintf(&title, "%s \xc2\xb7 sample ratio mismatch",
	    chart_str(experiment, "id", "?"));
	chart_open(&b, title);
	chart_fmt_p(ptext, sizeof ptext, chart_num(json_object_get(srm, "p")));
	if (strcmp(verdict, "harm") == 0) {
		colour = CHART_HARM;
		xasprintf(&status, "mismatch \xc2\xb7 %s", ptext);
	} else {
		colour = CHART_MUTED;
		xasprintf(&status, "no mismatch found \xc2\xb7 %s", ptext);
	}
	chart_title(&b, title, status, colour);
	chart_axes(&b, &f, "log evidence (log e-value)");

	chart_puts(&b, "<g class=\"epochs\">\n");
	for (i = 0; n > 0 && i < json_array_size(epochs); i++) {
		e = json_array_get(epochs, i);
		start = chart_num(json_object_get(e, "started"));
		if (!isfinite(start) || start < f.tmin || start > f.tmax)
			continue;
		x = chart_x(&f, start);
		snprintf(elabel, sizeof elabel, "epoch %.0f",
		    chart_num(json_object_get(e, "epoch")));
		chart_printf(&b, "<line class=\"epoch\" x1=\"%.1f\" "
		    "y1=\"%.1f\" x2=\"%.1f\" y2=\"%.1f\" stroke=\"" CHART_MUTED
		    "\" stroke-width=\"1.5\" stroke-dasharray=\"2 3\"/>"
		    "<text x=\"%.1f\" y=\"%.1f\" fill=\"" CHART_MUTED "\">%s"
		    "</text>\n", x, CHART_Y0, x, CHART_Y1, x + 4,
		    CHART_Y1 - 6, elabel);
	}
	chart_puts(&b, "</g>\n");
	chart_hline(&b, &f, 0, "zero", CHART_INK, NULL, NULL);
	tlabel = NULL;
	if (isfinite(thr)) {
		xasprintf(&tlabel, "threshold log(1/%g) = %.2f", salpha, thr);
		chart_hline(&b, &f, thr, "threshold", CHART_HARM, "6 4",
		    tlabel);
	}
	chart_line(&b, &f, pts, n, 0, "evidence");
	if (n == 0)
		chart_no_data(&b);
	if (strcmp(verdict, "harm") == 0)
		chart_marker(&b, &f, pts, n, 0, first_ts, "mismatch", colour);

	legend[0] = "line";
	legend[1] = "log evidence";
	legend[2] = "dash";
	legend[3] = "mismatch threshold";
	legend[4] = "dot";
	legend[5] = "epoch start";
	chart_legend(&b, legend, 6);
	chart_puts(&b, "</svg>\n");

	free(tlabel);
	free(status);
	free(title);
	free(pts);
	return b.p;
}
