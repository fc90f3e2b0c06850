/*
 * detectprobe: a line-oriented window onto the change detector of
 * stats.h (stats_detect_*, stats_cusum_update, stats_sr_update) for
 * tests/ref/detect_scipy.py. Each stdin line is a command and its numeric
 * arguments; each answer is one line of numbers printed with %.17g, or
 * "error: ..." for a line it cannot use.
 *
 *   init lmin lmax k                 -> rc lambda_1 .. lambda_k
 *   seq lmin lmax k X1 I1 .. Xn In   -> logM_1 start_1 .. logM_n start_n
 *                                       (block b is given time t = b)
 *   cusum w l | sr log_r l           -> one value
 *   threshold arl series             -> log c
 *   normals seed n                   -> n draws of the probe's N(0, 1)
 *   sim lmin lmax k I mu0 mu1 pre logc runs seed max
 *       -> one number per run: blocks from the change to the alarm
 *          (the alarm block counted), -1 for an alarm before the change,
 *          0 for no alarm within max blocks after it. Blocks 1..pre
 *          have score X ~ N(mu0 I, I) (an excess mu0 with information
 *          I), later blocks X ~ N(mu1 I, I); the detector starts empty.
 *
 * The simulation's generator (xoshiro256** seeded by splitmix64, normals
 * by Marsaglia's polar method) belongs to the probe, not to stopcock;
 * the reference script checks its draws against scipy before using it.
 */
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "stopcock/stats.h"

#define PROBE_ARGS_MAX	4096
#define PROBE_LINE_MAX	(1 << 20)
#define PROBE_RUNS_MAX	1000000

struct rng {
	uint64_t	s[4];
	int		have;
	double		spare;
};

static uint64_t
rng_splitmix(uint64_t *x)
{
	uint64_t z = (*x += 0x9e3779b97f4a7c15ULL);

	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
	z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
	return z ^ (z >> 31);
}

static void
rng_seed(struct rng *r, uint64_t seed)
{
	int i;

	for (i = 0; i < 4; i++)
		r->s[i] = rng_splitmix(&seed);
	r->have = 0;
}

static uint64_t
rng_rotl(uint64_t x, int k)
{
	return (x << k) | (x >> (64 - k));
}

/* xoshiro256** (Blackman & Vigna 2018) */
static uint64_t
rng_next(struct rng *r)
{
	uint64_t out = rng_rotl(r->s[1] * 5, 7) * 9, t = r->s[1] << 17;

	r->s[2] ^= r->s[0];
	r->s[3] ^= r->s[1];
	r->s[1] ^= r->s[2];
	r->s[0] ^= r->s[3];
	r->s[2] ^= t;
	r->s[3] = rng_rotl(r->s[3], 45);
	return out;
}

/* uniform on (-1, 1) from 53 random bits */
static double
rng_sym(struct rng *r)
{
	return ((double)(rng_next(r) >> 11) + 0.5) / 4503599627370496.0 - 1;
}

/* Marsaglia's polar method: two normals per accepted pair */
static double
rng_normal(struct rng *r)
{
	double u, v, s, f;

	if (r->have) {
		r->have = 0;
		return r->spare;
	}
	do {
		u = rng_sym(r);
		v = rng_sym(r);
		s = u * u + v * v;
	} while (s >= 1 || s == 0);
	f = sqrt(-2 * log(s) / s);
	r->spare = v * f;
	r->have = 1;
	return u * f;
}

typedef int (*probe_fn)(const double *, int);

static int
p_init(const double *v, int n)
{
	struct stats_detect dt;
	int i, rc;

	if (n != 3)
		return -1;
	rc = stats_detect_init(&dt, v[0], v[1], (int)v[2]);
	printf("%d", rc);
	for (i = 0; i < dt.k; i++)
		printf(" %.17g", dt.lambda[i]);
	printf("\n");
	return 0;
}

static int
p_seq(const double *v, int n)
{
	struct stats_detect dt;
	double m;
	int b;

	if (n < 3 || (n - 3) % 2 != 0)
		return -1;
	stats_detect_init(&dt, v[0], v[1], (int)v[2]);
	for (b = 0; 3 + 2 * b < n; b++) {
		m = stats_detect_update(&dt, v[3 + 2 * b], v[4 + 2 * b], b + 1);
		printf("%s%.17g %.17g", b ? " " : "", m,
		    stats_detect_change_start(&dt));
	}
	printf("\n");
	return 0;
}

static int
p_cusum(const double *v, int n)
{
	if (n != 2)
		return -1;
	printf("%.17g\n", stats_cusum_update(v[0], v[1]));
	return 0;
}

static int
p_sr(const double *v, int n)
{
	if (n != 2)
		return -1;
	printf("%.17g\n", stats_sr_update(v[0], v[1]));
	return 0;
}

static int
p_threshold(const double *v, int n)
{
	if (n != 2)
		return -1;
	printf("%.17g\n", stats_detect_threshold(v[0], v[1]));
	return 0;
}

static int
p_normals(const double *v, int n)
{
	struct rng r;
	long i, cnt;

	if (n != 2 || v[1] < 1 || v[1] > PROBE_RUNS_MAX)
		return -1;
	rng_seed(&r, (uint64_t)v[0]);
	cnt = (long)v[1];
	for (i = 0; i < cnt; i++)
		printf("%s%.17g", i ? " " : "", rng_normal(&r));
	printf("\n");
	return 0;
}

static int
p_sim(const double *v, int n)
{
	struct stats_detect dt;
	struct rng r;
	double I, sd, mu, logc, m;
	long run, runs, b, pre, max, out;

	if (n != 11 || v[8] < 1 || v[8] > PROBE_RUNS_MAX || !(v[3] > 0))
		return -1;
	I = v[3];
	sd = sqrt(I);
	pre = (long)v[6];
	logc = v[7];
	runs = (long)v[8];
	max = (long)v[10];
	if (stats_detect_init(&dt, v[0], v[1], (int)v[2]) != 0)
		return -1;
	rng_seed(&r, (uint64_t)v[9]);
	for (run = 0; run < runs; run++) {
		stats_detect_reset(&dt);
		out = 0;
		for (b = 1; b <= pre + max; b++) {
			mu = b <= pre ? v[4] : v[5];
			m = stats_detect_update(&dt, mu * I + sd * rng_normal(&r),
			    I, (double)b);
			if (m >= logc) {
				out = b <= pre ? -1 : b - pre;
				break;
			}
		}
		printf("%s%ld", run ? " " : "", out);
	}
	printf("\n");
	return 0;
}

static const struct {
	const char	*name;
	probe_fn	 fn;
} probe_cmds[] = {
	{ "init", p_init },
	{ "seq", p_seq },
	{ "cusum", p_cusum },
	{ "sr", p_sr },
	{ "threshold", p_threshold },
	{ "normals", p_normals },
	{ "sim", p_sim },
};

int
main(void)
{
	static char line[PROBE_LINE_MAX];
	static double args[PROBE_ARGS_MAX];
	char *tok, *end, *save;
	size_t i;
	int n, bad;

	while (fgets(line, sizeof line, stdin) != NULL) {
		tok = strtok_r(line, " \t\r\n", &save);
		if (tok == NULL)
			continue;
		for (i = 0; i < sizeof probe_cmds / sizeof probe_cmds[0]; i++)
			if (strcmp(tok, probe_cmds[i].name) == 0)
				break;
		if (i == sizeof probe_cmds / sizeof probe_cmds[0]) {
			printf("error: unknown command %s\n", tok);
			fflush(stdout);
			continue;
		}
		n = 0;
		bad = 0;
		while ((tok = strtok_r(NULL, " \t\r\n", &save)) != NULL) {
			if (n == PROBE_ARGS_MAX) {
				bad = 1;
				break;
			}
			args[n++] = strtod(tok, &end);
			if (*end != '\0')
				bad = 1;
		}
		if (bad || probe_cmds[i].fn(args, n) != 0)
			printf("error: bad arguments\n");
		fflush(stdout);
	}
	return 0;
}
