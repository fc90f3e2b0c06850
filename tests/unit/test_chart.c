/*
 * test_chart.c: the SVG charts are well-formed XML whatever the input
 * (empty, null-ridden, hostile names, wrong types), and carry the parts a
 * reader relies on: zero line, margin line on the harmful side, band,
 * estimate, verdict marker; SRM threshold at log(1/alpha) and epoch
 * starts. A small XML checker here balances tags, quotes and entities.
 */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>
#include <jansson.h>

#include "stopcock/chart.h"

static int
xml_entity(const char *p)
{
	return strncmp(p, "&amp;", 5) == 0 || strncmp(p, "&lt;", 4) == 0 ||
	    strncmp(p, "&gt;", 4) == 0 || strncmp(p, "&quot;", 6) == 0 ||
	    strncmp(p, "&#", 2) == 0;
}

/* 0 when s is one element with balanced tags, quoted attributes and only
 * the five predefined or numeric entities; else -1 and a reason. */
static int
xml_check(const char *s, const char **why)
{
	char stack[64][64];
	int depth = 0, roots = 0;
	const char *p = s, *q;
	size_t len;

	while (*p != '\0') {
		if (*p == '&') {
			if (!xml_entity(p)) {
				*why = "bad entity";
				return -1;
			}
			p++;
			continue;
		}
		if ((unsigned char)*p < 0x20 && *p != '\n' && *p != '\t' &&
		    *p != '\r') {
			*why = "control character";
			return -1;
		}
		if (*p == '>') {
			*why = "stray >";
			return -1;
		}
		if (*p != '<') {
			if (depth == 0 && *p != '\n' && *p != ' ') {
				*why = "text outside the root";
				return -1;
			}
			p++;
			continue;
		}
		if (p[1] == '/') {
			q = p + 2;
			len = strcspn(q, ">");
			if (q[len] != '>' || depth == 0 ||
			    strlen(stack[depth - 1]) != len ||
			    strncmp(stack[depth - 1], q, len) != 0) {
				*why = "unbalanced close tag";
				return -1;
			}
			depth--;
			p = q + len + 1;
			continue;
		}
		q = p + 1;
		len = strcspn(q, " \n\t/>");
		if (len == 0 || len >= sizeof stack[0] ||
		    depth == (int)(sizeof stack / sizeof stack[0])) {
			*why = "bad tag name";
			return -1;
		}
		if (depth == 0 && roots++ > 0) {
			*why = "two roots";
			return -1;
		}
		memcpy(stack[depth], q, len);
		stack[depth][len] = '\0';
		q += len;
		/* Attributes: name="value" with no raw < or " inside. */
		for (;;) {
			while (*q == ' ' || *q == '\n' || *q == '\t')
				q++;
			if (*q == '>' || (q[0] == '/' && q[1] == '>'))
				break;
			len = strcspn(q, "= >");
			if (len == 0 || q[len] != '=' || q[len + 1] != '"') {
				*why = "unquoted attribute";
				return -1;
			}
			q += len + 2;
			while (*q != '"' && *q != '\0') {
				if (*q == '<' ||
				    (*q == '&' && !xml_entity(q))) {
					*why = "bad attribute value";
					return -1;
				}
				q++;
			}
			if (*q != '"') {
				*why = "unterminated attribute";
				return -1;
			}
			q++;
		}
		if (*q == '/')
			p = q + 2;
		else {
			depth++;
			p = q + 1;
		}
	}
	if (depth != 0 || roots != 1) {
		*why = "unclosed element";
		return -1;
	}
	return 0;
}

static void
assert_xml(const char *svg)
{
	const char *why = "";

	if (xml_check(svg, &why) != 0) {
		fprintf(stderr, "# not well-formed: %s\n%s\n", why, svg);
		fail();
	}
	assert_null(strstr(svg, "nan"));
	assert_null(strstr(svg, "inf"));
	assert_int_equal(strncmp(svg, "<svg ", 5), 0);
}

/* The y1 of the first <line class="cls" ...>, or NAN. */
static double
line_y(const char *svg, const char *cls)
{
	char needle[64];
	const char *p;

	snprintf(needle, sizeof needle, "<line class=\"%s\"", cls);
	if ((p = strstr(svg, needle)) == NULL ||
	    (p = strstr(p, "y1=\"")) == NULL)
		return NAN;
	return strtod(p + 4, NULL);
}

static int
count(const char *s, const char *needle)
{
	int n = 0;

	while ((s = strstr(s, needle)) != NULL) {
		n++;
		s++;
	}
	return n;
}

static json_t *
load(const char *text)
{
	json_error_t err;
	json_t *j = json_loads(text, 0, &err);

	if (j == NULL) {
		fprintf(stderr, "# bad fixture: %s\n", err.text);
		fail();
	}
	return j;
}

/* A harmful arm of an invented checkout-latency scenario: the estimate
 * climbs past a 20 ms margin and the band leaves it at t = 1700000600. */
static const char *harm_test =
    "{\"guardrail\": \"checkout_p95\", \"variant\": \"green\","
    " \"control\": \"control\", \"verdict\": \"harm\","
    " \"harm\": \"increase\", \"margin\": 20, \"alpha\": 0.00833,"
    " \"p\": 0.00012, \"first_ts\": 1700000600, \"history\": ["
    " [1700000000, 5, -80, 90, 1], [1700000120, 12, -30, 55, 0.9],"
    " [1700000240, 25, -5, 50, 0.3], [1700000360, 31, 8, 49, 0.05],"
    " [1700000480, 33, 15, 47, 0.01], [1700000600, 35, 21, 46, 0.001],"
    " [1700000720, 36, 24, 45, 0.00012]]}";

static void
test_harm_chart(void **state)
{
	json_t *t = load(harm_test);
	char *svg = chart_test_svg(t);
	double zero, margin;

	assert_xml(svg);
	assert_non_null(strstr(svg,
	    "checkout_p95 \xc2\xb7 green vs control"));
	assert_int_equal(count(svg, "<line class=\"zero\""), 1);
	assert_int_equal(count(svg, "<line class=\"margin\""), 1);
	assert_int_equal(count(svg, "<polygon class=\"band\""), 1);
	assert_int_equal(count(svg, "<polyline class=\"estimate\""), 1);
	assert_int_equal(count(svg, "<g class=\"verdict\">"), 1);
	assert_non_null(strstr(svg, "harm at 22:23"));	/* 1700000600 UTC */
	assert_non_null(strstr(svg, "margin +20"));
	assert_non_null(strstr(svg, "99.17% confidence sequence"));
	/* Harm is an increase: the margin line sits above zero (SVG y grows
	 * downwards). */
	zero = line_y(svg, "zero");
	margin = line_y(svg, "margin");
	assert_true(isfinite(zero) && isfinite(margin));
	assert_true(margin < zero);
	free(svg);
	json_decref(t);
}

static void
test_margin_side_decrease(void **state)
{
	json_t *t = load(harm_test);
	char *svg;

	json_object_set_new(t, "harm", json_string("decrease"));
	json_object_set_new(t, "verdict", json_string("safe"));
	svg = chart_test_svg(t);
	assert_xml(svg);
	assert_true(line_y(svg, "margin") > line_y(svg, "zero"));
	assert_non_null(strstr(svg, "margin -20"));
	assert_non_null(strstr(svg, "safe at"));
	free(svg);
	json_decref(t);
}

/* A safe verdict in an epoch that lost its trust (SRM) is not drawn as
 * good news: amber, with the reason in words, never the safe green. */
static void
test_untrusted_not_green(void **state)
{
	json_t *t = load(harm_test);
	char *svg;

	json_object_set_new(t, "verdict", json_string("safe"));
	json_object_set_new(t, "untrusted", json_true());
	svg = chart_test_svg(t);
	assert_xml(svg);
	assert_non_null(strstr(svg, "untrustworthy (sample ratio mismatch)"));
	assert_null(strstr(svg, "#1e6b34"));
	free(svg);
	json_decref(t);
}

static void
test_undecided_has_no_marker(void **state)
{
	json_t *t = load(harm_test);
	char *svg;

	json_object_set_new(t, "verdict", json_string("undecided"));
	svg = chart_test_svg(t);
	assert_xml(svg);
	assert_null(strstr(svg, "class=\"verdict\""));
	free(svg);
	json_decref(t);
}

static void
test_empty_history(void **state)
{
	static const char *cases[] = {
		"{\"guardrail\": \"g\", \"variant\": \"v\", \"margin\": 0.5,"
		" \"history\": []}",
		"{\"guardrail\": \"g\", \"variant\": \"v\", \"margin\": 0.5}",
		"{\"guardrail\": \"g\", \"variant\": \"v\", \"margin\": 0.5,"
		" \"verdict\": \"harm\", \"first_ts\": 5, \"history\": null}",
	};
	size_t i;

	for (i = 0; i < sizeof cases / sizeof cases[0]; i++) {
		json_t *t = load(cases[i]);
		char *svg = chart_test_svg(t);

		assert_xml(svg);
		assert_non_null(strstr(svg, "no data yet"));
		assert_int_equal(count(svg, "<line class=\"zero\""), 1);
		assert_int_equal(count(svg, "<line class=\"margin\""), 1);
		assert_null(strstr(svg, "class=\"estimate\""));
		free(svg);
		json_decref(t);
	}
}

/* Nulls stand for non-finite numbers: runs break around them. */
static void
test_nulls(void **state)
{
	json_t *t = load("{\"guardrail\": \"g\", \"variant\": \"v\","
	    " \"margin\": null, \"alpha\": null, \"p\": null, \"history\": ["
	    " [10, null, null, null, null], [20, 0.1, null, 0.5, 1],"
	    " [30, 0.2, -0.3, 0.6, 0.5], [40, 0.3, -0.2, 0.5, 0.4],"
	    " [null, 1, 2, 3, 4], [50, null, -0.1, 0.4, 0.3],"
	    " [60, 0.25, -0.1, 0.4, 0.2], [\"x\"], 7, [70]]}");
	char *svg = chart_test_svg(t);

	assert_xml(svg);
	assert_int_equal(count(svg, "<polygon class=\"band\""), 1);
	/* estimate: run 20-40 as a line, 60 alone as a dot */
	assert_int_equal(count(svg, "<polyline class=\"estimate\""), 1);
	assert_int_equal(count(svg, "<circle class=\"estimate\""), 1);
	assert_null(strstr(svg, "class=\"margin\""));
	assert_non_null(strstr(svg, "p = n/a"));
	assert_non_null(strstr(svg, "time since first point"));
	free(svg);
	json_decref(t);
}

static void
test_wrong_types(void **state)
{
	json_t *cases[4];
	size_t i;

	cases[0] = json_null();
	cases[1] = json_string("not an object");
	cases[2] = load("{\"guardrail\": 5, \"history\": {\"a\": 1},"
	    " \"margin\": \"wide\", \"first_ts\": \"soon\"}");
	cases[3] = NULL;
	for (i = 0; i < 4; i++) {
		char *a = chart_test_svg(cases[i]);
		char *b = chart_srm_svg(cases[i]);

		assert_xml(a);
		assert_xml(b);
		free(a);
		free(b);
		json_decref(cases[i]);
	}
}

static void
test_names_escaped(void **state)
{
	json_t *t = load("{\"guardrail\": \"a<b>&\\\"c'\", \"variant\":"
	    " \"]]><script>x</script>\", \"control\": \"c\\u0001d\","
	    " \"history\": [[1, 0, -1, 1, 1]]}");
	char *svg = chart_test_svg(t), *e;

	assert_xml(svg);
	assert_null(strstr(svg, "<script"));
	assert_non_null(strstr(svg, "a&lt;b&gt;&amp;&quot;c&#39;"));
	assert_non_null(strstr(svg, "c\xef\xbf\xbd" "d"));
	free(svg);
	json_decref(t);

	e = chart_xml_escape("x<&>\"'\n\ty\x7f");
	assert_string_equal(e, "x&lt;&amp;&gt;&quot;&#39;\n\ty\xef\xbf\xbd");
	free(e);
}

/* SRM threshold: log(1/0.001) = 6.907755 (natural log, any table). */
static void
test_srm_chart(void **state)
{
	json_t *x = load("{\"id\": \"exp<1>\", \"srm_alpha\": 0.001,"
	    " \"epochs\": [{\"epoch\": 1, \"started\": 1000},"
	    " {\"epoch\": 2, \"started\": 1900}, {\"epoch\": 3,"
	    " \"started\": 99999}], \"srm\": {\"verdict\": \"harm\","
	    " \"p\": 0.0004, \"first_ts\": 2400, \"history\": ["
	    " [1000, 0, 1], [1500, -1.5, 1], [1900, 0.5, 0.6],"
	    " [2400, 7.2, 0.0007], [2800, 9.1, 0.0001], [3000, null, null]]}}");
	char *svg = chart_srm_svg(x);

	assert_xml(svg);
	assert_non_null(strstr(svg, "threshold log(1/0.001) = 6.91"));
	assert_int_equal(count(svg, "<line class=\"threshold\""), 1);
	/* epochs 1 and 2 are inside the history; 3 lies beyond it */
	assert_int_equal(count(svg, "<line class=\"epoch\""), 2);
	assert_non_null(strstr(svg, ">epoch 2<"));
	assert_null(strstr(svg, ">epoch 3<"));
	assert_non_null(strstr(svg, "mismatch at"));
	assert_non_null(strstr(svg, "exp&lt;1&gt;"));
	assert_true(line_y(svg, "threshold") < line_y(svg, "zero"));
	free(svg);

	json_object_set_new(json_object_get(x, "srm"), "history",
	    json_array());
	svg = chart_srm_svg(x);
	assert_xml(svg);
	assert_non_null(strstr(svg, "no data yet"));
	free(svg);
	json_decref(x);
}

/* A long history stays linear in size: one point per row. */
static void
test_long_history(void **state)
{
	json_t *t = load("{\"guardrail\": \"g\", \"variant\": \"v\","
	    " \"margin\": 1, \"history\": []}");
	json_t *h = json_object_get(t, "history");
	char *svg;
	int i;

	for (i = 0; i < 5000; i++)
		json_array_append_new(h, json_pack("[f,f,f,f,f]",
		    1.7e9 + 60.0 * i, sin(i / 100.0), sin(i / 100.0) - 1,
		    sin(i / 100.0) + 1, 0.5));
	svg = chart_test_svg(t);
	assert_xml(svg);
	assert_true(strlen(svg) < 5000 * 40 + 20000);
	free(svg);
	json_decref(t);
}

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test(test_harm_chart),
		cmocka_unit_test(test_margin_side_decrease),
		cmocka_unit_test(test_untrusted_not_green),
		cmocka_unit_test(test_undecided_has_no_marker),
		cmocka_unit_test(test_empty_history),
		cmocka_unit_test(test_nulls),
		cmocka_unit_test(test_wrong_types),
		cmocka_unit_test(test_names_escaped),
		cmocka_unit_test(test_srm_chart),
		cmocka_unit_test(test_long_history),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
