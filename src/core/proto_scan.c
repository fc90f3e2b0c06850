/*
 * proto_scan.c: the byte-level half of the line protocol, the part every
 * record pays for: splitting a line into tokens (and screening it for
 * control bytes) and reading decimal numbers. proto.c gives the tokens
 * their meaning.
 *
 * Splitting works on bit masks, one bit per byte of the line: which bytes
 * are blanks and which are neither blanks nor name characters. With SSE2
 * (every x86-64) sixteen bytes are classed at a time by compares; without
 * it one table look-up per byte fills the same masks. Tokens are then
 * found by counting trailing zeros, a whole run of bytes at a time,
 * instead of testing each byte in a loop.
 */
#include <math.h>
#include <stdlib.h>
#include <string.h>

#if defined(__SSE2__)
#include <emmintrin.h>
#endif

#include "stopcock/proto.h"
#include "proto_int.h"

/* Mask words for the longest line. */
#define SCAN_WORDS ((PROTO_LINE_MAX + 63) / 64)
/* Timestamp tokens longer than this are parsed every time. */
#define SCAN_TS_CACHE 32

const uint8_t proto_class[256] = {
	2, 2, 2, 2, 2, 2, 2, 2, 2, 1, 2, 2, 2, 2, 2, 2,
	2, 2, 2, 2, 2, 2, 2, 2, 2, 2, 2, 2, 2, 2, 2, 2,
	1, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 4, 4, 0,
	4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 0, 0, 0, 0, 0,
	0, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4,
	4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 0, 0, 0, 0, 4,
	0, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4,
	4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 4, 0, 0, 0, 0, 2,
	/* 0x80..0xff: allowed in comments and JSON strings, not in names */
	0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0,
	0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0,
	0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0,
	0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0,
	0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0,
	0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0,
	0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0,
	0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0,
};

#if defined(__SSE2__)
/*
 * Sixteen bytes: bit i of *blank for a space or tab, of *other for a byte
 * that is neither blank nor a name character; control bytes are set in
 * *bad (all of a byte's bits). Bytes 0x80..0xff are negative as signed chars,
 * so the signed range compares below never count them as names or
 * controls (they are "other", as in proto_class).
 */
static inline void
scan16(__m128i c, unsigned *blank, unsigned *other, __m128i *bad)
{
	const __m128i tab = _mm_set1_epi8('\t');
	__m128i bl, nm, lc, ctl;

	bl = _mm_or_si128(_mm_cmpeq_epi8(c, _mm_set1_epi8(' ')),
	    _mm_cmpeq_epi8(c, tab));
	/* [A-Za-z]: setting 0x20 folds the capitals onto the small letters
	 * and moves nothing else into 'a'..'z' */
	lc = _mm_or_si128(c, _mm_set1_epi8(0x20));
	nm = _mm_and_si128(_mm_cmpgt_epi8(lc, _mm_set1_epi8('a' - 1)),
	    _mm_cmplt_epi8(lc, _mm_set1_epi8('z' + 1)));
	/* [0-9:] */
	nm = _mm_or_si128(nm, _mm_and_si128(
	    _mm_cmpgt_epi8(c, _mm_set1_epi8('0' - 1)),
	    _mm_cmplt_epi8(c, _mm_set1_epi8(':' + 1))));
	/* [-.] */
	nm = _mm_or_si128(nm, _mm_and_si128(
	    _mm_cmpgt_epi8(c, _mm_set1_epi8('-' - 1)),
	    _mm_cmplt_epi8(c, _mm_set1_epi8('.' + 1))));
	nm = _mm_or_si128(nm, _mm_cmpeq_epi8(c, _mm_set1_epi8('_')));
	/* 0x00..0x1f (unsigned: min(c, 0x1f) == c) but tab, and DEL */
	ctl = _mm_cmpeq_epi8(_mm_min_epu8(c, _mm_set1_epi8(0x1f)), c);
	ctl = _mm_andnot_si128(_mm_cmpeq_epi8(c, tab), ctl);
	ctl = _mm_or_si128(ctl, _mm_cmpeq_epi8(c, _mm_set1_epi8(0x7f)));
	*blank = (unsigned)_mm_movemask_epi8(bl);
	*other = ~(unsigned)_mm_movemask_epi8(_mm_or_si128(bl, nm)) & 0xffff;
	*bad = _mm_or_si128(*bad, ctl);
}

/* Sixteen bits of masks for the bytes from i (a multiple of 16) on. */
static inline void
scan_put(uint64_t *blank, uint64_t *other, size_t i, unsigned b, unsigned o)
{
	if ((i & 63) == 0) {
		blank[i >> 6] = b;
		other[i >> 6] = o;
	} else {
		blank[i >> 6] |= (uint64_t)b << (i & 63);
		other[i >> 6] |= (uint64_t)o << (i & 63);
	}
}

/* The masks of line[0..len); 1 when the line holds a control byte. */
static int
scan_masks(const char *s, size_t len, uint64_t *blank, uint64_t *other)
{
	unsigned b, o;
	char tail[16];
	size_t i;
	__m128i bad = _mm_setzero_si128();

	for (i = 0; i + 16 <= len; i += 16) {
		scan16(_mm_loadu_si128((const __m128i *)(const void *)(s + i)),
		    &b, &o, &bad);
		scan_put(blank, other, i, b, o);
	}
	if (i < len) {
		if (len >= 16) {
			/* the last sixteen bytes of the line, overlapping the
			 * chunk before: their top len - i mask bits are new */
			scan16(_mm_loadu_si128((const __m128i *)(const void *)
			    (s + len - 16)), &b, &o, &bad);
			b >>= 16 - (len - i);
			o >>= 16 - (len - i);
		} else {
			/* never read past the line: the rest is blanks */
			memset(tail, ' ', sizeof tail);
			memcpy(tail, s, len);
			scan16(_mm_loadu_si128((const __m128i *)(const void *)
			    tail), &b, &o, &bad);
		}
		scan_put(blank, other, i, b, o);
	}
	return _mm_movemask_epi8(bad) != 0;
}
#else
static int
scan_masks(const char *s, size_t len, uint64_t *blank, uint64_t *other)
{
	unsigned cl, bad = 0;
	size_t i;

	memset(blank, 0, ((len + 63) >> 6) * sizeof *blank);
	memset(other, 0, ((len + 63) >> 6) * sizeof *other);
	for (i = 0; i < len; i++) {
		cl = proto_class[(unsigned char)s[i]];
		bad |= cl & PC_BAD;
		if (cl & PC_BLANK)
			blank[i >> 6] |= 1ULL << (i & 63);
		else if (!(cl & PC_NAME))
			other[i >> 6] |= 1ULL << (i & 63);
	}
	return bad != 0;
}
#endif

/* The first set bit of m[0..nw) at or after pos; SIZE_MAX when none. */
static inline size_t
scan_next_set(const uint64_t *m, size_t nw, size_t pos)
{
	size_t w = pos >> 6;
	uint64_t x;

	if (w >= nw)
		return SIZE_MAX;
	x = m[w] & (~0ULL << (pos & 63));
	while (x == 0) {
		if (++w == nw)
			return SIZE_MAX;
		x = m[w];
	}
	return w * 64 + (size_t)__builtin_ctzll(x);
}

int
proto_split(const char *line, size_t len, struct tok *t)
{
	uint64_t blank[SCAN_WORDS], other[SCAN_WORDS], nb, edge;
	size_t nw = (len + 63) >> 6, w, pos, start = 0, onext;
	int nt = 0, in = 0;

	if (len == 0)
		return 0;
	if (scan_masks(line, len, blank, other))
		return -1;
	/* bits past the line are blanks, so every token ends in the masks */
	if (len & 63) {
		blank[nw - 1] |= ~0ULL << (len & 63);
		other[nw - 1] &= ~(~0ULL << (len & 63));
	}
	/*
	 * A bit of edge marks a byte unlike the one before it (a blank after
	 * a token byte or the reverse): token starts and ends alternate, so
	 * each set bit, lowest first, toggles "in a token". A token is a
	 * name when the next "other" byte at or after its start lies beyond
	 * its end; tokens come in order, so onext only moves forward (a line
	 * holds few such bytes: '@', '=').
	 */
	onext = scan_next_set(other, nw, 0);
	for (w = 0; w < nw; w++) {
		nb = ~blank[w];
		edge = nb ^ ((nb << 1) | (uint64_t)in);
		while (edge != 0) {
			pos = w * 64 + (size_t)__builtin_ctzll(edge);
			edge &= edge - 1;
			if (!in) {
				start = pos;
				in = 1;
				continue;
			}
			in = 0;
			if (nt < PROTO_TOKENS) {
				while (onext < start)
					onext = scan_next_set(other, nw,
					    onext + 1);
				t[nt].p = line + start;
				t[nt].n = pos - start;
				t[nt].name = onext >= pos;
			}
			nt++;
		}
	}
	if (in) {
		/* a token that ends the line, at the end of a mask word */
		if (nt < PROTO_TOKENS) {
			while (onext < start)
				onext = scan_next_set(other, nw, onext + 1);
			t[nt].p = line + start;
			t[nt].n = len - start;
			t[nt].name = onext >= len;
		}
		nt++;
	}
	return nt;
}

/* Powers of ten that a double holds exactly (10^22 < 2^53 * 2^22). */
static const double proto_pow10[23] = {
	1e0, 1e1, 1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8, 1e9, 1e10, 1e11,
	1e12, 1e13, 1e14, 1e15, 1e16, 1e17, 1e18, 1e19, 1e20, 1e21, 1e22
};

/* The end of a run of digits starting at p. */
static inline const char *
scan_digits(const char *p, const char *e)
{
	while (p < e && (unsigned)(*p - '0') < 10)
		p++;
	return p;
}

/*
 * Digits [p, q) onto the significand m (nd significant digits so far, at
 * most 19 kept: 10^19 < 2^64). Digits beyond the 19th are dropped and
 * counted in *drop; *inexact notes a dropped nonzero digit.
 */
static inline void
scan_accumulate(const char *p, const char *q, uint64_t *m, int *nd,
    int *drop, int *inexact)
{
	const char *keep = p + (19 - *nd < q - p ? 19 - *nd : q - p);
	uint64_t v = *m;

	*nd += (int)(keep - p);
	for (; p < keep; p++)
		v = v * 10 + (unsigned)(*p - '0');
	*m = v;
	*drop += (int)(q - keep);
	for (; p < q; p++)
		*inexact |= *p != '0';
}

/*
 * When the significant digits fit an integer m <= 2^53 and the decimal
 * exponent e is within +-22, m and 10^|e| are both exact doubles and one
 * IEEE multiply or divide rounds correctly, so the result is the one
 * strtod gives (Clinger 1990, "How to read floating point numbers
 * accurately", the fast path; Lemire 2021, "Number parsing at a gigabyte
 * per second", sec. 5, states the same conditions). Everything else goes
 * to strtod on a NUL-terminated copy, which rounds correctly (glibc).
 * (strtod follows LC_NUMERIC; stopcock never calls setlocale, so that is
 * "C".) Each digit is looked at twice, in two tight loops: once to find
 * the end of its run, once to add it to the significand.
 */
/*
 * The common case in one loop: at most 19 digits with at most one point
 * and no exponent, which is m exactly (leading zeros add nothing, no
 * digit is dropped) over 10^(digits after the point), what the general
 * path below computes for it: Clinger's (1990) fast path, correctly
 * rounded while m <= 2^53 and the power is at most 10^22. 1 when it applied (*out set), 0 when the
 * general path must decide.
 */
static inline int
scan_short(const char *p, const char *e, int neg, double *out)
{
	uint64_t m = 0;
	unsigned d;
	int nd = 0, frac = -1;

	for (; p < e; p++) {
		if ((d = (unsigned)(*p - '0')) < 10) {
			m = m * 10 + d;
			nd++;
		} else if (*p == '.' && frac < 0)
			frac = nd;
		else
			return 0;
	}
	if (nd == 0 || nd > 19)
		return 0;
	frac = frac < 0 ? 0 : nd - frac;
	if (m > (1ULL << 53) || frac > 22)
		return 0;
	*out = frac > 0 ? (double)m / proto_pow10[frac] : (double)m;
	if (neg)
		*out = -*out;	/* "-0" is -0.0, as strtod has it */
	return 1;
}

int
proto_number(const char *s, size_t n, int allow_sign, double *out)
{
	const char *p = s, *e = s + n, *q, *z;
	uint64_t m = 0;
	int neg = 0, nd = 0, digits, inexact = 0, e10 = 0, drop = 0, x = 0;
	int xneg = 0;
	char buf[PROTO_NUMBER_MAX + 1];
	char *end;
	double v;

	if (n == 0 || n > PROTO_NUMBER_MAX)
		return -1;
	if (*p == '+' || *p == '-') {
		if (!allow_sign)
			return -1;
		neg = *p == '-';
		p++;
	}
	if (scan_short(p, e, neg, out))
		return 0;
	/* integer part: leading zeros add nothing; dropped digits scale */
	q = scan_digits(p, e);
	digits = (int)(q - p);
	for (z = p; z < q && *z == '0'; z++)
		;
	scan_accumulate(z, q, &m, &nd, &drop, &inexact);
	e10 += drop;
	p = q;
	if (p < e && *p == '.') {
		p++;
		q = scan_digits(p, e);
		digits += (int)(q - p);
		z = p;
		if (m == 0) {
			/* 0.00d: the zeros only move the point */
			for (; z < q && *z == '0'; z++)
				;
			e10 -= (int)(z - p);
		}
		drop = 0;
		scan_accumulate(z, q, &m, &nd, &drop, &inexact);
		/* kept fraction digits move the point; dropped ones do not */
		e10 -= (int)(q - z) - drop;
		p = q;
	}
	if (digits == 0)
		return -1;
	if (p < e && (*p == 'e' || *p == 'E')) {
		p++;
		if (p < e && (*p == '+' || *p == '-')) {
			xneg = *p == '-';
			p++;
		}
		if (p == e || (unsigned)(*p - '0') >= 10)
			return -1;
		for (; p < e && (unsigned)(*p - '0') < 10; p++) {
			if (x < 100000)
				x = x * 10 + (*p - '0');
		}
		e10 += xneg ? -x : x;
	}
	if (p != e)
		return -1;

	if (m == 0 && !inexact)
		v = 0.0;
	else if (!inexact && m <= (1ULL << 53) && e10 >= -22 && e10 <= 22) {
		v = (double)m;
		if (e10 < 0)
			v /= proto_pow10[-e10];
		else
			v *= proto_pow10[e10];
	} else {
		memcpy(buf, s, n);
		buf[n] = '\0';
		v = strtod(buf, &end);
		if (end != buf + n || !isfinite(v))
			return -1;
		*out = v;
		return 0;
	}
	*out = neg ? -v : v;
	return 0;
}

/*
 * The last timestamp token and its value, per thread: a producer stamps
 * records with a clock of millisecond (or coarser) resolution, so runs of
 * records share their time, and a byte compare of a few bytes replaces
 * the conversion. Only a token that converted is kept, so a cached token
 * gives exactly what proto_number would.
 */
int
proto_ts_number(const char *s, size_t n, double *out)
{
	static _Thread_local struct {
		size_t	n;
		char	s[SCAN_TS_CACHE];
		double	v;
	} last;

	if (n != 0 && n == last.n && memcmp(s, last.s, n) == 0) {
		*out = last.v;
		return 0;
	}
	if (proto_number(s, n, 0, out) != 0)
		return -1;
	if (n <= sizeof last.s) {
		memcpy(last.s, s, n);
		last.n = n;
		last.v = *out;
	}
	return 0;
}
