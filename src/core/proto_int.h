/*
 * proto_int.h: what proto.c (records) and proto_scan.c (the byte-level
 * scanner: splitting a line, decimal numbers) share. Nothing outside
 * src/core includes this.
 */
#ifndef STOPCOCK_PROTO_INT_H
#define STOPCOCK_PROTO_INT_H

#include <stddef.h>
#include <stdint.h>

#define PROTO_NUMBER_MAX 400	/* characters in one numeric token */
#define PROTO_TOKENS 24		/* kept per line; more is always wrong */

/* Byte classes: one table look-up per byte screens and checks. */
#define PC_BLANK 1		/* space, tab: separates tokens */
#define PC_BAD 2		/* NUL, other controls, DEL */
#define PC_NAME 4		/* [A-Za-z0-9._:-] */

extern const uint8_t proto_class[256];

struct tok {
	const char	*p;
	size_t		 n;
	int		 name;		/* every byte in [A-Za-z0-9._:-] */
};

/*
 * Split line[0..len) (len <= PROTO_LINE_MAX) on blanks into at most
 * PROTO_TOKENS tokens (t[]), noting which are all name characters.
 * Returns the number of tokens on the line (which may exceed
 * PROTO_TOKENS: only the first PROTO_TOKENS are stored), or -1 when the
 * line holds a control byte (PC_BAD) anywhere.
 */
int	proto_split(const char *line, size_t len, struct tok *t);

/*
 * A finite decimal: [+-] (D+ [. D*] | . D+) [(e|E) [+-] D+], nothing
 * else (the sign only when allow_sign). 0 and *out the correctly rounded
 * double (the one strtod gives), or -1.
 */
int	proto_number(const char *s, size_t n, int allow_sign, double *out);
/* The same for a record's timestamp (no sign), remembering the last
 * token: a stream's records share their time in runs. */
int	proto_ts_number(const char *s, size_t n, double *out);

#endif
