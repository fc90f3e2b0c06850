/*
 * proto.h: the event protocol. One record per line, either the plain
 * whitespace form or a JSON object:
 *
 *   [@TS] plan    EXP VAR=WEIGHT VAR=WEIGHT ...
 *   [@TS] expose  EXP VAR [N]
 *   [@TS] observe EXP VAR METRIC VALUE
 *   [@TS] count   EXP VAR METRIC K N
 *
 * expose, observe and count records may end with attributes KEY=VALUE
 * (JSON: keys of the object):
 *   unit=ID    the randomisation unit (user, device) the record belongs
 *              to: 1-128 bytes of [A-Za-z0-9._:-]. Records of one unit
 *              share a variance group, so requests clustered in a user
 *              do not count as independent. Absent: the record is its
 *              own unit.
 *   epoch=N    the epoch (1-based plan generation) in which the unit was
 *              exposed, for records that arrive after a ramp step.
 *              Absent: the epoch current when the record arrives.
 * An unknown key, a repeated key or a bad value is bad_attribute (in
 * JSON a repeated key is bad_json, as every duplicate key is).
 *
 * proto_parse is a pure function: no I/O and no allocation for the plain
 * form (the JSON form goes through jansson, which allocates). Names are
 * copied into the record, so a record outlives its line.
 */
#ifndef STOPCOCK_PROTO_H
#define STOPCOCK_PROTO_H

#include <stddef.h>
#include <stdint.h>

#define PROTO_LINE_MAX 4096	/* bytes in one line, newline excluded */
#define PROTO_NAME_MAX 64	/* characters in a name */
#define PROTO_PLAN_MAX 16	/* variants in one plan record */
#define PROTO_EXPOSE_MAX 1000000000ULL	/* N in one expose record */
#define PROTO_WEIGHT_MAX 1e6
/* K and N of one count record: one unit's tally, so far below this; the
 * bound keeps sums of 10^9 records finite and exact enough. */
#define PROTO_COUNT_MAX 1e12
#define PROTO_UNIT_MAX 128	/* bytes in a unit= id */
#define PROTO_EPOCH_MAX 1000000000u	/* largest epoch= value */
/* guardrails= of a plan: names joined by ',', at most this many bytes */
#define PROTO_FAMILY_BYTES 1024

enum proto_kind {
	PROTO_PLAN,
	PROTO_EXPOSE,
	PROTO_OBSERVE,
	PROTO_COUNT
};

/*
 * Outcomes of proto_parse. PROTO_SKIP is a blank or comment line (not an
 * error); everything after it is a rejection with a stable reason name
 * (proto_reason) used in counters and metrics.
 */
enum proto_status {
	PROTO_OK = 0,
	PROTO_SKIP,
	PROTO_E_LONG,		/* "too_long": over PROTO_LINE_MAX */
	PROTO_E_KIND,		/* "bad_kind": unknown record kind */
	PROTO_E_FIELDS,		/* "bad_fields": wrong number of fields */
	PROTO_E_NAME,		/* "bad_name": empty, too long or bad charset */
	PROTO_E_NUMBER,		/* "bad_number": not a finite decimal */
	PROTO_E_RANGE,		/* "out_of_range": negative K/N, N=0 expose... */
	PROTO_E_TS,		/* "bad_timestamp" */
	PROTO_E_PLAN,		/* "bad_plan": duplicate variant, zero weights */
	PROTO_E_JSON,		/* "bad_json": not a JSON object or wrong types */
	PROTO_E_BYTES,		/* "bad_bytes": NUL or control characters */
	PROTO_E_ATTR,		/* "bad_attribute": unknown/repeated key, bad value */
	PROTO_NSTATUS
};

struct proto_arm {
	char		name[PROTO_NAME_MAX + 1];
	double		weight;
};

struct record {
	enum proto_kind	kind;
	int		has_ts;		/* 0: caller stamps the time read */
	double		ts;		/* unix seconds */
	char		experiment[PROTO_NAME_MAX + 1];
	char		variant[PROTO_NAME_MAX + 1];	/* expose/observe/count */
	char		metric[PROTO_NAME_MAX + 1];	/* observe/count */
	double		value;		/* observe */
	double		k, n;		/* count: K events of N (or over N) */
	uint64_t	units;		/* expose: N, default 1 */
	uint32_t	epoch;		/* epoch=: 0 when absent */
	uint8_t		unit_len;	/* unit=: 0 when absent */
	char		unit[PROTO_UNIT_MAX + 1];
	int		narms;		/* plan */
	struct proto_arm arms[PROTO_PLAN_MAX];
	/* plan: guardrails=a,b (JSON "guardrails": ["a", "b"]), the
	 * experiment's family: names joined by ',', each a valid name and
	 * none twice; family_len 0 when absent */
	uint16_t	family_len;
	char		family[PROTO_FAMILY_BYTES];
	/* not parsed (proto_parse sets 0): the caller says whether the record came from an
	 * untrusted input (unsigned, and the input not trusted by the
	 * configuration); the engine keeps such records away from
	 * experiments that may pause, and counts them */
	uint8_t		untrusted;
};

/*
 * Parse one line (without its newline; a trailing '\r' is tolerated).
 * Lines starting with '{' (after blanks) are parsed as JSON.
 */
enum proto_status proto_parse(const char *line, size_t len, struct record *);
/* Stable snake_case name of a status, for counters: "bad_name". */
const char *proto_reason(enum proto_status);
/* A sentence for humans: "variant name has a character outside [A-Za-z0-9._:-]". */
const char *proto_describe(enum proto_status);
/* 1 when s[0..len) is a valid name. */
int proto_name_ok(const char *s, size_t len);
/* Write a record back as one plain line (no newline); returns length or -1. */
int proto_format(const struct record *, char *buf, size_t size);

#endif
