/*
 * chart.h: SVG charts of one test's history, drawn from the engine's JSON
 * view (engine_json_experiment). The same renderer serves the daemon's
 * page (/chart/...) and `stopcock replay --report`, so a post-mortem
 * shows exactly what the on-call engineer saw. Pure: no I/O, no clock;
 * the callers write or serve the strings.
 */
#ifndef STOPCOCK_CHART_H
#define STOPCOCK_CHART_H

#include <jansson.h>

/*
 * One guardrail x arm test: an entry of the experiment's "tests" array
 * (finding_json plus "history": [[t, estimate, lower, upper, p], ...]).
 * Draws the estimate, its confidence-sequence band, the zero line, the
 * margin line and the moment the verdict fired. Missing or non-finite
 * values are skipped, never fatal. Returns a malloc'd SVG document.
 */
char	*chart_test_svg(const json_t *test);

/*
 * The SRM check of one experiment: the whole engine_json_experiment
 * object (its "srm" history [[t, log_e, p], ...], "srm_alpha" and
 * "epochs"). Draws the log evidence against the log(1/srm_alpha)
 * threshold with each epoch's start marked. Returns a malloc'd SVG.
 */
char	*chart_srm_svg(const json_t *experiment);

/* s escaped for XML text and attribute values (& < > " '); control
 * characters other than tab and newline become U+FFFD. Malloc'd. */
char	*chart_xml_escape(const char *s);

#endif
