/*
 * statsprobe: a line-oriented window onto stats.h for the reference
 * checks in tests/ref/stats_scipy.py. Each stdin line is a function name
 * and its numeric arguments; each answer is one line of numbers printed
 * with %.17g, or "error: ..." for a line it cannot use.
 *
 *   log_betainc a b x          log_betainc_upper a b x    log_beta a b
 *   chi2_sf x df               log_ndtr z                 norm_ppf p
 *   norm_sf z                  nm_logm1 s v rho
 *   dm_log_bf K c[K] theta0[K] a0[K]
 *   srm_chi2 K c[K] theta0[K]                  -> p x2
 *   rate_log_bf na nb theta0 k one_sided
 *   rate_ratio_cs na ea nb eb k alpha          -> lo hi
 *   rate_ratio_bound na ea nb eb k alpha upper -> bound
 *   bb_logm s v g h r one_sided
 *   bernoulli_cs k n t_opt alpha               -> lo hi
 *   quantile_cs p t_opt alpha v1 c1 v2 c2 ...  -> lo hi
 *   quantile_log_e2 p t_opt na va1 ca1 .. vb1 cb1 ..  (also _e1)
 *   fixed_n delta var_a var_b alpha power
 *   ztest_prop xa na xb nb                     -> p z
 */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/stats.h"

#define PROBE_ARGS_MAX	2048
#define PROBE_LINE_MAX	65536

/* Each handler prints its answer; -1 means "wrong argument count". */
typedef int (*probe_fn)(const double *, int);

static int
p_log_betainc(const double *v, int n)
{
	if (n != 3)
		return -1;
	printf("%.17g\n", stats_log_betainc(v[0], v[1], v[2]));
	return 0;
}

static int
p_log_betainc_upper(const double *v, int n)
{
	if (n != 3)
		return -1;
	printf("%.17g\n", stats_log_betainc_upper(v[0], v[1], v[2]));
	return 0;
}

static int
p_log_beta(const double *v, int n)
{
	if (n != 2)
		return -1;
	printf("%.17g\n", stats_log_beta(v[0], v[1]));
	return 0;
}

static int
p_chi2_sf(const double *v, int n)
{
	if (n != 2)
		return -1;
	printf("%.17g\n", stats_chi2_sf(v[0], v[1]));
	return 0;
}

static int
p_log_ndtr(const double *v, int n)
{
	if (n != 1)
		return -1;
	printf("%.17g\n", stats_log_ndtr(v[0]));
	return 0;
}

static int
p_norm_ppf(const double *v, int n)
{
	if (n != 1)
		return -1;
	printf("%.17g\n", stats_norm_ppf(v[0]));
	return 0;
}

static int
p_norm_sf(const double *v, int n)
{
	if (n != 1)
		return -1;
	printf("%.17g\n", stats_norm_sf(v[0]));
	return 0;
}

static int
p_nm_logm1(const double *v, int n)
{
	if (n != 3)
		return -1;
	printf("%.17g\n", stats_nm_logm1(v[0], v[1], v[2]));
	return 0;
}

static int
p_dm_log_bf(const double *v, int n)
{
	int K = n > 0 ? (int)v[0] : 0;

	if (K < 1 || K > STATS_ARMS_MAX || n != 1 + 3 * K)
		return -1;
	printf("%.17g\n", stats_dm_log_bf(K, v + 1, v + 1 + K, v + 1 + 2 * K));
	return 0;
}

static int
p_srm_chi2(const double *v, int n)
{
	int K = n > 0 ? (int)v[0] : 0;
	double p, x2;

	if (K < 1 || K > STATS_ARMS_MAX || n != 1 + 2 * K)
		return -1;
	p = stats_srm_chi2(K, v + 1, v + 1 + K, &x2);
	printf("%.17g %.17g\n", p, x2);
	return 0;
}

static int
p_rate_log_bf(const double *v, int n)
{
	if (n != 5)
		return -1;
	printf("%.17g\n", stats_rate_log_bf(v[0], v[1], v[2], v[3],
	    (int)v[4]));
	return 0;
}

static int
p_rate_ratio_cs(const double *v, int n)
{
	double lo, hi;

	if (n != 6)
		return -1;
	if (stats_rate_ratio_cs(v[0], v[1], v[2], v[3], v[4], v[5], &lo,
	    &hi) != 0)
		printf("error: rate_ratio_cs refused its input\n");
	else
		printf("%.17g %.17g\n", lo, hi);
	return 0;
}

static int
p_rate_ratio_bound(const double *v, int n)
{
	double b;

	if (n != 7)
		return -1;
	if (stats_rate_ratio_bound(v[0], v[1], v[2], v[3], v[4], v[5],
	    (int)v[6], &b) != 0)
		printf("error: rate_ratio_bound refused its input\n");
	else
		printf("%.17g\n", b);
	return 0;
}

static int
p_bb_logm(const double *v, int n)
{
	if (n != 6)
		return -1;
	printf("%.17g\n", stats_bb_logm(v[0], v[1], v[2], v[3], v[4],
	    (int)v[5]));
	return 0;
}

static int
p_bernoulli_cs(const double *v, int n)
{
	double lo, hi;

	if (n != 4)
		return -1;
	if (stats_bernoulli_cs(v[0], v[1], v[2], v[3], &lo, &hi) != 0)
		printf("error: bernoulli_cs refused its input\n");
	else
		printf("%.17g %.17g\n", lo, hi);
	return 0;
}

static int
p_quantile_cs(const double *v, int n)
{
	static double val[PROBE_ARGS_MAX / 2];
	static uint64_t cnt[PROBE_ARGS_MAX / 2];
	struct stats_blocks b = { val, cnt, 0, 0, 1 };
	double lo, hi;
	int i;

	if (n < 5 || (n - 3) % 2 != 0)
		return -1;
	for (i = 3; i < n; i += 2) {
		val[b.n] = v[i];
		cnt[b.n] = (uint64_t)v[i + 1];
		b.total += cnt[b.n++];
	}
	if (stats_quantile_cs(&b, v[0], v[1], v[2], &lo, &hi) != 0)
		printf("error: quantile_cs refused its input\n");
	else
		printf("%.17g %.17g\n", lo, hi);
	return 0;
}

/* p t_opt na, then na (value, count) pairs of arm a, the rest arm b. */
static int
p_quantile_log_e(const double *v, int n, int two)
{
	static double val[PROBE_ARGS_MAX / 2];
	static uint64_t cnt[PROBE_ARGS_MAX / 2];
	struct stats_blocks a = { val, cnt, 0, 0, 1 }, b = { NULL, NULL, 0, 0, 1 };
	int i, na;

	if (n < 3 || (n - 3) % 2 != 0)
		return -1;
	na = (int)v[2];
	if (na < 0 || 3 + 2 * na > n)
		return -1;
	for (i = 3; i < n; i += 2) {
		struct stats_blocks *s = i < 3 + 2 * na ? &a : &b;
		size_t k = (size_t)(i - 3) / 2;

		val[k] = v[i];
		cnt[k] = (uint64_t)v[i + 1];
		if (s == &b && b.n == 0) {
			b.value = val + k;
			b.count = cnt + k;
		}
		s->n++;
		s->total += cnt[k];
	}
	printf("%.17g\n", two ? stats_quantile_log_e2(&a, &b, v[0], v[1]) :
	    stats_quantile_log_e1(&a, &b, v[0], v[1]));
	return 0;
}

static int
p_quantile_log_e2(const double *v, int n)
{
	return p_quantile_log_e(v, n, 1);
}

static int
p_quantile_log_e1(const double *v, int n)
{
	return p_quantile_log_e(v, n, 0);
}

static int
p_fixed_n(const double *v, int n)
{
	if (n != 5)
		return -1;
	printf("%.17g\n", stats_fixed_n(v[0], v[1], v[2], v[3], v[4]));
	return 0;
}

static int
p_ztest_prop(const double *v, int n)
{
	double p, z;

	if (n != 4)
		return -1;
	p = stats_ztest_prop(v[0], v[1], v[2], v[3], &z);
	printf("%.17g %.17g\n", p, z);
	return 0;
}

static const struct {
	const char	*name;
	probe_fn	 fn;
} probe_table[] = {
	{ "log_betainc", p_log_betainc },
	{ "log_betainc_upper", p_log_betainc_upper },
	{ "log_beta", p_log_beta },
	{ "chi2_sf", p_chi2_sf },
	{ "log_ndtr", p_log_ndtr },
	{ "norm_ppf", p_norm_ppf },
	{ "norm_sf", p_norm_sf },
	{ "nm_logm1", p_nm_logm1 },
	{ "dm_log_bf", p_dm_log_bf },
	{ "srm_chi2", p_srm_chi2 },
	{ "rate_log_bf", p_rate_log_bf },
	{ "rate_ratio_cs", p_rate_ratio_cs },
	{ "rate_ratio_bound", p_rate_ratio_bound },
	{ "bb_logm", p_bb_logm },
	{ "bernoulli_cs", p_bernoulli_cs },
	{ "quantile_cs", p_quantile_cs },
	{ "quantile_log_e2", p_quantile_log_e2 },
	{ "quantile_log_e1", p_quantile_log_e1 },
	{ "fixed_n", p_fixed_n },
	{ "ztest_prop", p_ztest_prop },
};

static void
probe_line(char *line)
{
	static double v[PROBE_ARGS_MAX];
	char *name, *tok, *end;
	size_t i;
	int n = 0;

	name = strtok(line, " \t\r\n");
	if (name == NULL)
		return;
	while ((tok = strtok(NULL, " \t\r\n")) != NULL) {
		if (n == PROBE_ARGS_MAX) {
			printf("error: more than %d arguments\n",
			    PROBE_ARGS_MAX);
			return;
		}
		v[n] = strtod(tok, &end);
		if (*end != '\0') {
			printf("error: bad number %s\n", tok);
			return;
		}
		n++;
	}
	for (i = 0; i < sizeof probe_table / sizeof probe_table[0]; i++) {
		if (strcmp(name, probe_table[i].name) != 0)
			continue;
		if (probe_table[i].fn(v, n) != 0)
			printf("error: wrong argument count for %s\n", name);
		return;
	}
	printf("error: unknown function %s\n", name);
}

int
main(void)
{
	static char line[PROBE_LINE_MAX];

	setvbuf(stdout, NULL, _IOLBF, 0);
	while (fgets(line, sizeof line, stdin) != NULL) {
		if (strchr(line, '\n') == NULL && !feof(stdin)) {
			int c;

			while ((c = getchar()) != EOF && c != '\n')
				;
			printf("error: line longer than %d bytes\n",
			    PROBE_LINE_MAX - 1);
			continue;
		}
		probe_line(line);
	}
	return 0;
}
