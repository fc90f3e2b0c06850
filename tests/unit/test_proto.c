/*
 * test_proto.c: the event protocol parser. A table of good and bad lines
 * reaches every proto_status; field checks on the good ones; the plain
 * form's number parser against the C library's strtod on random decimal
 * strings (strtod is the outside reference: glibc rounds correctly);
 * proto_format round trips; the unit= and epoch= attributes and their
 * limits; and a bad line in a stream never changes how the good lines
 * around it parse. Limits and grammar are the ones proto.h states.
 */
#include <math.h>
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "stopcock/proto.h"
#include "../../src/core/proto_int.h"

/* xorshift64*: the random cases are the same on every run. */
#define RNG_SEED 0x9e3779b97f4a7c15ULL
#include "rng.h"

struct pcase {
	const char		*line;
	enum proto_status	 want;
};

#define N64 "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa"
#define U128 N64 N64	/* PROTO_UNIT_MAX bytes */
#define JE "{\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":\"v\","

static const struct pcase cases[] = {
	/* skip */
	{ "", PROTO_SKIP },
	{ "   \t ", PROTO_SKIP },
	{ "# a comment", PROTO_SKIP },
	{ "  \t# indented comment with = and { }", PROTO_SKIP },
	{ "#", PROTO_SKIP },
	{ "\r", PROTO_SKIP },
	/* good plain records */
	{ "plan checkout-v2 control=50 treatment=50", PROTO_OK },
	{ "plan e a=1 b=2 c=3.5", PROTO_OK },
	{ "plan e a=1e-3 b=1e6", PROTO_OK },
	{ "expose checkout-v2 control", PROTO_OK },
	{ "expose checkout-v2 control 25", PROTO_OK },
	{ "expose e v 1000000000", PROTO_OK },
	{ "expose e v +3", PROTO_OK },
	{ "observe checkout-v2 treatment latency_ms 123.5", PROTO_OK },
	{ "observe e v m -1.5e-3", PROTO_OK },
	{ "observe e v m .5", PROTO_OK },
	{ "observe e v m 5.", PROTO_OK },
	{ "observe e v m 1e-999", PROTO_OK },	/* underflows to 0: finite */
	{ "observe e v m 00000000000000000000000000000012.5", PROTO_OK },
	{ "count checkout-v2 control errors 3 1000", PROTO_OK },
	{ "count e v m 0 0.25", PROTO_OK },
	{ "count e v m 7 3", PROTO_OK },	/* K > N is the engine's call */
	{ "@1700000000 observe e v m 1", PROTO_OK },
	{ "@1700000000.125 count e v m 1 2", PROTO_OK },
	{ "@0 expose e v", PROTO_OK },
	{ "@99999999999.5 expose e v", PROTO_OK },
	{ "\tobserve\te\tv\tm\t2\t", PROTO_OK },
	{ "observe e v m 2\r", PROTO_OK },
	{ "observe " N64 " v m 1", PROTO_OK },
	{ "observe A.b_c:d-0 v m 1", PROTO_OK },
	/* too long is tested apart; kind */
	{ "obsrve e v m 1", PROTO_E_KIND },
	{ "Observe e v m 1", PROTO_E_KIND },
	{ "x", PROTO_E_KIND },
	{ "@1 planx e a=1 b=1", PROTO_E_KIND },
	{ "counts e v m 1 2", PROTO_E_KIND },
	{ "expos e v", PROTO_E_KIND },
	{ "e=1", PROTO_E_KIND },
	/* fields */
	{ "observe e v m", PROTO_E_FIELDS },
	{ "observe e v m 1 2", PROTO_E_FIELDS },
	{ "expose e", PROTO_E_FIELDS },
	{ "expose e v 1 2", PROTO_E_FIELDS },
	{ "count e v m 1", PROTO_E_FIELDS },
	{ "count e v m 1 2 3", PROTO_E_FIELDS },
	{ "plan", PROTO_E_FIELDS },
	{ "@17", PROTO_E_FIELDS },
	{ "observe a b c d e f g h i j k l m n o p q r s t u v w x y z",
	    PROTO_E_FIELDS },
	/* names */
	{ "observe " N64 "a v m 1", PROTO_E_NAME },
	{ "observe e v/x m 1", PROTO_E_NAME },
	{ "observe e v m/s 1", PROTO_E_NAME },
	{ "observe e v \xc3\xa9t\xc3\xa9 1", PROTO_E_NAME },
	{ "expose e\"x v", PROTO_E_NAME },
	{ "plan e =1 b=1", PROTO_E_NAME },
	{ "plan e a*=1 b=1", PROTO_E_NAME },
	{ "plan e/x a=1 b=1", PROTO_E_NAME },
	{ "count e v m,n 1 2", PROTO_E_NAME },
	/* numbers */
	{ "observe e v m nan", PROTO_E_NUMBER },
	{ "observe e v m NaN", PROTO_E_NUMBER },
	{ "observe e v m inf", PROTO_E_NUMBER },
	{ "observe e v m -Infinity", PROTO_E_NUMBER },
	{ "observe e v m 0x10", PROTO_E_NUMBER },
	{ "observe e v m 0x1p3", PROTO_E_NUMBER },
	{ "observe e v m 1e999", PROTO_E_NUMBER },
	{ "observe e v m -1e400", PROTO_E_NUMBER },
	{ "observe e v m 1.5x", PROTO_E_NUMBER },
	{ "observe e v m 1e", PROTO_E_NUMBER },
	{ "observe e v m 1e+", PROTO_E_NUMBER },
	{ "observe e v m .", PROTO_E_NUMBER },
	{ "observe e v m -", PROTO_E_NUMBER },
	{ "observe e v m 1.2.3", PROTO_E_NUMBER },
	{ "observe e v m 1,5", PROTO_E_NUMBER },
	{ "observe e v m --1", PROTO_E_NUMBER },
	{ "count e v m one 2", PROTO_E_NUMBER },
	{ "count e v m 1 2k", PROTO_E_NUMBER },
	{ "expose e v 1.5", PROTO_E_NUMBER },
	{ "expose e v 1e3", PROTO_E_NUMBER },
	{ "expose e v x", PROTO_E_NUMBER },
	{ "plan e a=x b=1", PROTO_E_NUMBER },
	{ "plan e a=nan b=1", PROTO_E_NUMBER },
	{ "plan e a= b=1", PROTO_E_NUMBER },
	/* ranges */
	{ "count e v m -1 10", PROTO_E_RANGE },
	{ "count e v m 1 0", PROTO_E_RANGE },
	{ "count e v m 1 -5", PROTO_E_RANGE },
	{ "count e v m 0 0", PROTO_E_RANGE },
	{ "count e v m 1 1e300", PROTO_E_RANGE },
	{ "count e v m 1000000000001 2e12", PROTO_E_RANGE },
	{ "count e v m 1e12 1e12", PROTO_OK },
	{ "expose e v 0", PROTO_E_RANGE },
	{ "expose e v -1", PROTO_E_RANGE },
	{ "expose e v 1000000001", PROTO_E_RANGE },
	{ "expose e v 99999999999999999999999999", PROTO_E_RANGE },
	{ "plan e a=1 b=1000001", PROTO_E_RANGE },
	/* timestamps */
	{ "@ observe e v m 1", PROTO_E_TS },
	{ "@-1 observe e v m 1", PROTO_E_TS },
	{ "@+1 observe e v m 1", PROTO_E_TS },
	{ "@1e11 observe e v m 1", PROTO_E_TS },
	{ "@100000000000 observe e v m 1", PROTO_E_TS },
	{ "@nan observe e v m 1", PROTO_E_TS },
	{ "@inf observe e v m 1", PROTO_E_TS },
	{ "@17x observe e v m 1", PROTO_E_TS },
	{ "@1e999 observe e v m 1", PROTO_E_TS },
	/* plans */
	{ "plan e a=1", PROTO_E_PLAN },
	{ "plan e", PROTO_E_PLAN },
	{ "plan e a=1 a=1", PROTO_E_PLAN },
	{ "plan e a=1 b=1 a=2", PROTO_E_PLAN },
	{ "plan e a=0 b=1", PROTO_E_PLAN },
	{ "plan e a=-1 b=1", PROTO_E_PLAN },
	{ "plan e a=1 b", PROTO_E_PLAN },
	{ "plan e a1 b=1", PROTO_E_PLAN },
	{ "plan e a=1 b=1 c=1 d=1 e=1 f=1 g=1 h=1 i=1 j=1 k=1 l=1 m=1 "
	    "n=1 o=1 p=1 q=1", PROTO_E_PLAN },
	{ "plan e a=1 b=1 c=1 d=1 e=1 f=1 g=1 h=1 i=1 j=1 k=1 l=1 m=1 "
	    "n=1 o=1 p=1 q=1 r=1 s=1 t=1 u=1 v=1 w=1 x=1 y=1 z=1", PROTO_E_PLAN },
	{ "@5 plan e a=1 b=1 c=1 d=1 e=1 f=1 g=1 h=1 i=1 j=1 k=1 l=1 m=1 "
	    "n=1 o=1 p=1 q=1 r=1 s=1 t=1 u=1 v=1 w=1 x=1 y=1 z=1", PROTO_E_PLAN },
	/* bytes */
	{ "observe e v\x01 m 1", PROTO_E_BYTES },
	{ "observe e v m 1\r\r", PROTO_E_BYTES },
	{ "observe e\rv m 1", PROTO_E_BYTES },
	{ "observe e v m 1\x7f", PROTO_E_BYTES },
	{ "# comment with a bell \x07", PROTO_E_BYTES },
	{ "{\"kind\":\"expose\",\x1b\"experiment\":\"e\",\"variant\":\"v\"}",
	    PROTO_E_BYTES },
	{ "observe e v m 1\n", PROTO_E_BYTES },
	/* JSON, good */
	{ "{\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":\"v\"}",
	    PROTO_OK },
	{ "  {\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"n\":12}  ", PROTO_OK },
	{ "{\"ts\":1700000000.5,\"kind\":\"observe\",\"experiment\":\"e\","
	    "\"variant\":\"v\",\"metric\":\"m\",\"value\":-2.5}", PROTO_OK },
	{ "{\"kind\":\"count\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\",\"k\":3,\"n\":100}", PROTO_OK },
	{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
	    "[{\"variant\":\"control\",\"weight\":50},"
	    "{\"weight\":50,\"variant\":\"t\"}]}", PROTO_OK },
	{ "{\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":\"v\"}\r",
	    PROTO_OK },
	/* JSON, bad */
	{ "{", PROTO_E_JSON },
	{ "{}x", PROTO_E_JSON },
	{ "{\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":\"v\"} {}",
	    PROTO_E_JSON },
	{ "{\"kind\":\"expose\",\"experiment\":\"e\",\"varaint\":\"v\"}",
	    PROTO_E_JSON },
	{ "{\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"variant\":\"w\"}", PROTO_E_JSON },
	{ "{\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":7}",
	    PROTO_E_JSON },
	{ "{\"kind\":5,\"experiment\":\"e\",\"variant\":\"v\"}", PROTO_E_JSON },
	{ "{\"kind\":\"observe\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\",\"value\":\"1.5\"}", PROTO_E_JSON },
	{ "{\"kind\":\"observe\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\",\"value\":NaN}", PROTO_E_JSON },
	{ "{\"kind\":\"observe\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\",\"value\":1e999}", PROTO_E_JSON },
	{ "{\"ts\":\"now\",\"kind\":\"expose\",\"experiment\":\"e\","
	    "\"variant\":\"v\"}", PROTO_E_JSON },
	{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
	    "{\"a\":1,\"b\":1}}", PROTO_E_JSON },
	{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
	    "[[\"a\",1],[\"b\",1]]}", PROTO_E_JSON },
	{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
	    "[{\"variant\":\"a\",\"weight\":1,\"x\":1},"
	    "{\"variant\":\"b\",\"weight\":1}]}", PROTO_E_JSON },
	{ "{\"kind\":\"expose\",\"experiment\":\"e\\u0000x\",\"variant\":\"v\"}",
	    PROTO_E_JSON },
	/* JSON, other reasons */
	{ "{\"kind\":\"expose\",\"experiment\":\"e\"}", PROTO_E_FIELDS },
	{ "{\"experiment\":\"e\",\"variant\":\"v\"}", PROTO_E_FIELDS },
	{ "{\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\"}", PROTO_E_FIELDS },
	{ "{\"kind\":\"observe\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\"}", PROTO_E_FIELDS },
	{ "{\"kind\":\"publish\",\"experiment\":\"e\",\"variant\":\"v\"}",
	    PROTO_E_KIND },
	{ "{\"kind\":\"expose\",\"experiment\":\"e x\",\"variant\":\"v\"}",
	    PROTO_E_NAME },
	{ "{\"kind\":\"expose\",\"experiment\":\"\",\"variant\":\"v\"}",
	    PROTO_E_NAME },
	{ "{\"kind\":\"expose\",\"experiment\":\"" N64 "b\",\"variant\":\"v\"}",
	    PROTO_E_NAME },
	{ "{\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"n\":0}", PROTO_E_RANGE },
	{ "{\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"n\":1.5}", PROTO_E_NUMBER },
	{ "{\"kind\":\"count\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\",\"k\":-1,\"n\":100}", PROTO_E_RANGE },
	{ "{\"kind\":\"count\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\",\"k\":1,\"n\":0}", PROTO_E_RANGE },
	{ "{\"ts\":-3,\"kind\":\"expose\",\"experiment\":\"e\","
	    "\"variant\":\"v\"}", PROTO_E_TS },
	{ "{\"ts\":1e12,\"kind\":\"expose\",\"experiment\":\"e\","
	    "\"variant\":\"v\"}", PROTO_E_TS },
	{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
	    "[{\"variant\":\"a\",\"weight\":1}]}", PROTO_E_PLAN },
	{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
	    "[{\"variant\":\"a\",\"weight\":1},"
	    "{\"variant\":\"a\",\"weight\":1}]}", PROTO_E_PLAN },
	{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
	    "[{\"variant\":\"a\",\"weight\":0},"
	    "{\"variant\":\"b\",\"weight\":1}]}", PROTO_E_PLAN },
	{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":[]}",
	    PROTO_E_PLAN },
	/* attributes, good: any order, after the fixed fields */
	{ "expose e v unit=u1", PROTO_OK },
	{ "expose e v 25 unit=user:42 epoch=2", PROTO_OK },
	{ "expose e v epoch=1 unit=a", PROTO_OK },
	{ "expose e v 1 epoch=3", PROTO_OK },
	{ "observe e v m 1.5 unit=A.b_c:d-0", PROTO_OK },
	{ "observe e v m -2 epoch=1000000000", PROTO_OK },
	{ "observe e v m 1 epoch=007", PROTO_OK },	/* leading zeros: 7 */
	{ "count e v m 3 10 unit=x epoch=7", PROTO_OK },
	{ "@1700000000 count e v m 3 10 epoch=1 unit=" U128, PROTO_OK },
	{ "\tobserve\te\tv\tm\t2\tunit=u\t", PROTO_OK },
	{ "observe e v m 2 unit=u\r", PROTO_OK },
	/* plan takes no attributes: unit=2 is an arm called unit */
	{ "plan e a=1 b=1 unit=2", PROTO_OK },
	{ "plan e a=1 b=1 unit=x", PROTO_E_NUMBER },
	/* attributes, bad */
	{ "observe e v m 1 unit=", PROTO_E_ATTR },
	{ "observe e v m 1 unit=" U128 "b", PROTO_E_ATTR },
	{ "observe e v m 1 unit=a/b", PROTO_E_ATTR },
	{ "observe e v m 1 unit=a=b", PROTO_E_ATTR },
	{ "observe e v m 1 unit=\xc3\xa9", PROTO_E_ATTR },
	{ "observe e v m 1 unit=\"a\"", PROTO_E_ATTR },
	{ "observe e v m 1 unit=a unit=a", PROTO_E_ATTR },
	{ "observe e v m 1 unit=a epoch=2 unit=b", PROTO_E_ATTR },
	{ "expose e v epoch=1 epoch=1", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=0", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=000", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=1000000001", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=99999999999999999999999999", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=-1", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=+1", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=1e3", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=1.0", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=x", PROTO_E_ATTR },
	{ "observe e v m 1 epoch=0x10", PROTO_E_ATTR },
	{ "observe e v m 1 Unit=a", PROTO_E_ATTR },
	{ "observe e v m 1 units=a", PROTO_E_ATTR },
	{ "observe e v m 1 user=a", PROTO_E_ATTR },
	{ "observe e v m 1 =a", PROTO_E_ATTR },
	{ "observe e v m 1 =", PROTO_E_ATTR },
	{ "expose e v 5=3", PROTO_E_ATTR },
	{ "count e v m 1 2 unit=a epoch=1 x=1", PROTO_E_ATTR },
	{ "observe e v m 1 unit=a unit=a unit=a unit=a unit=a unit=a unit=a "
	    "unit=a unit=a unit=a unit=a unit=a unit=a unit=a unit=a unit=a "
	    "unit=a unit=a unit=a unit=a unit=a unit=a unit=a unit=a unit=a",
	    PROTO_E_ATTR },
	/* attributes end the record: anything else is a field count error */
	{ "observe e v m unit=a", PROTO_E_FIELDS },	/* no value */
	{ "observe e v m 1 unit=a 2", PROTO_E_FIELDS },
	{ "observe e v m 1 x unit=a", PROTO_E_FIELDS },
	{ "expose e v unit=a 5", PROTO_E_FIELDS },
	{ "expose e v 5 6 unit=a", PROTO_E_FIELDS },
	{ "count e v m 1 unit=a", PROTO_E_FIELDS },
	{ "observe e v unit=a epoch=1", PROTO_E_FIELDS },
	/* EXP and VAR are never attributes */
	{ "expose e unit=a", PROTO_E_NAME },
	/* fields are checked before attributes */
	{ "observe e v m nan unit=", PROTO_E_NUMBER },
	{ "observe e/x v m 1 epoch=0", PROTO_E_NAME },
	{ "expose e v 0 unit=a", PROTO_E_RANGE },
	{ "count e v m -1 1 epoch=0", PROTO_E_RANGE },
	/* attributes in JSON, good */
	{ JE "\"unit\":\"user:42\",\"epoch\":2}", PROTO_OK },
	{ JE "\"n\":3,\"epoch\":1000000000}", PROTO_OK },
	{ JE "\"epoch\":3.0}", PROTO_OK },	/* integers decode as reals */
	{ JE "\"unit\":\"" U128 "\"}", PROTO_OK },
	{ "{\"kind\":\"observe\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\",\"value\":1.5,\"unit\":\"u.1\"}", PROTO_OK },
	{ "{\"kind\":\"count\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\",\"k\":3,\"n\":100,\"epoch\":4,\"unit\":\"x\"}",
	    PROTO_OK },
	/* attributes in JSON, bad */
	{ JE "\"unit\":\"\"}", PROTO_E_ATTR },
	{ JE "\"unit\":\"" U128 "b\"}", PROTO_E_ATTR },
	{ JE "\"unit\":\"a b\"}", PROTO_E_ATTR },
	{ JE "\"unit\":\"\\u00e9\"}", PROTO_E_ATTR },
	{ JE "\"unit\":\"\xc3\xa9\"}", PROTO_E_ATTR },
	{ JE "\"unit\":7}", PROTO_E_ATTR },
	{ JE "\"unit\":null}", PROTO_E_ATTR },
	{ JE "\"unit\":[\"a\"]}", PROTO_E_ATTR },
	{ JE "\"epoch\":0}", PROTO_E_ATTR },
	{ JE "\"epoch\":1000000001}", PROTO_E_ATTR },
	{ JE "\"epoch\":2.5}", PROTO_E_ATTR },
	{ JE "\"epoch\":\"3\"}", PROTO_E_ATTR },
	{ JE "\"epoch\":-1}", PROTO_E_ATTR },
	{ JE "\"epoch\":1e300}", PROTO_E_ATTR },
	{ JE "\"epoch\":true}", PROTO_E_ATTR },
	{ JE "\"epoch\":null}", PROTO_E_ATTR },
	/* JSON, attribute keys and the existing key rules */
	{ JE "\"unit\":\"a\",\"unit\":\"a\"}", PROTO_E_JSON },	/* dup */
	{ JE "\"units\":\"a\"}", PROTO_E_JSON },			/* unknown */
	/* jansson refuses an escaped NUL in any string, before keys count */
	{ JE "\"unit\":\"a\\u0000\"}", PROTO_E_JSON },
	{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"unit\":\"a\","
	    "\"weights\":[{\"variant\":\"a\",\"weight\":1},"
	    "{\"variant\":\"b\",\"weight\":1}]}", PROTO_E_FIELDS },
	{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"epoch\":1,"
	    "\"weights\":[{\"variant\":\"a\",\"weight\":1},"
	    "{\"variant\":\"b\",\"weight\":1}]}", PROTO_E_FIELDS },
	{ "{\"kind\":\"expose\",\"experiment\":\"e/x\",\"variant\":\"v\","
	    "\"epoch\":0}", PROTO_E_NAME },
};

static void
test_table(void **state)
{
	struct record r;
	size_t i;
	int bad = 0;
	enum proto_status got;

	for (i = 0; i < sizeof cases / sizeof cases[0]; i++) {
		memset(&r, 0xa5, sizeof r);
		got = proto_parse(cases[i].line, strlen(cases[i].line), &r);
		if (got != cases[i].want) {
			print_error("case %zu \"%s\": got %s, want %s\n", i,
			    cases[i].line, proto_reason(got),
			    proto_reason(cases[i].want));
			bad++;
		}
	}
	assert_int_equal(bad, 0);
}

/* Every status is reached by the table or by the length test below. */
static void
test_every_status(void **state)
{
	int seen[PROTO_NSTATUS] = { 0 };
	size_t i;

	for (i = 0; i < sizeof cases / sizeof cases[0]; i++)
		seen[cases[i].want] = 1;
	seen[PROTO_E_LONG] = 1;		/* test_long */
	for (i = 0; i < PROTO_NSTATUS; i++) {
		assert_true(seen[i]);
		assert_non_null(proto_reason(i));
		assert_true(strlen(proto_describe(i)) > 5);
	}
	assert_string_equal(proto_reason(PROTO_E_NAME), "bad_name");
	assert_string_equal(proto_reason(PROTO_E_LONG), "too_long");
	assert_string_equal(proto_reason(PROTO_E_RANGE), "out_of_range");
	assert_string_equal(proto_reason(PROTO_E_ATTR), "bad_attribute");
	assert_string_equal(proto_reason(PROTO_NSTATUS), "unknown");
}

static void
test_long(void **state)
{
	char *buf = malloc(PROTO_LINE_MAX + 8);
	struct record r;
	const char *rec = "observe e v m 1";
	size_t n = strlen(rec);

	assert_non_null(buf);
	/* A valid record padded with blanks to exactly the limit. */
	memset(buf, ' ', PROTO_LINE_MAX + 8);
	memcpy(buf, rec, n);
	assert_int_equal(proto_parse(buf, PROTO_LINE_MAX, &r), PROTO_OK);
	assert_true(r.value == 1);
	/* The limit plus a CR is still the limit. */
	buf[PROTO_LINE_MAX] = '\r';
	assert_int_equal(proto_parse(buf, PROTO_LINE_MAX + 1, &r), PROTO_OK);
	buf[PROTO_LINE_MAX] = ' ';
	assert_int_equal(proto_parse(buf, PROTO_LINE_MAX + 1, &r),
	    PROTO_E_LONG);
	/* Too long wins even for a comment. */
	buf[0] = '#';
	assert_int_equal(proto_parse(buf, PROTO_LINE_MAX + 1, &r),
	    PROTO_E_LONG);
	assert_int_equal(proto_parse(buf, PROTO_LINE_MAX, &r), PROTO_SKIP);
	/* Numbers have their own bound: 400 characters. */
	memcpy(buf, "observe e v m ", 14);
	memset(buf + 14, '1', 400);
	buf[14 + 1] = '.';
	assert_int_equal(proto_parse(buf, 14 + 400, &r), PROTO_OK);
	buf[14 + 400] = '1';
	assert_int_equal(proto_parse(buf, 14 + 401, &r), PROTO_E_NUMBER);
	free(buf);
}

static void
test_names(void **state)
{
	char name[PROTO_NAME_MAX + 2];
	int c;

	memset(name, 'x', sizeof name);
	assert_true(proto_name_ok(name, PROTO_NAME_MAX));
	assert_false(proto_name_ok(name, PROTO_NAME_MAX + 1));
	assert_false(proto_name_ok(name, 0));
	for (c = 0; c < 256; c++) {
		name[0] = (char)c;
		int want = (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') ||
		    (c >= '0' && c <= '9') || c == '.' || c == '_' ||
		    c == ':' || c == '-';
		assert_int_equal(proto_name_ok(name, 1), want);
	}
}

static void
test_fields(void **state)
{
	struct record r;
	const char *l;

	l = "@1700000000.125 count checkout-v2 control errors 3 1000";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_int_equal(r.kind, PROTO_COUNT);
	assert_true(r.has_ts);
	assert_true(r.ts == 1700000000.125);
	assert_string_equal(r.experiment, "checkout-v2");
	assert_string_equal(r.variant, "control");
	assert_string_equal(r.metric, "errors");
	assert_true(r.k == 3 && r.n == 1000);

	l = "expose e v";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_int_equal(r.kind, PROTO_EXPOSE);
	assert_false(r.has_ts);
	assert_true(r.units == 1);
	assert_string_equal(r.metric, "");

	l = "expose e v 1000000000";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_true(r.units == 1000000000ULL);

	l = "  plan checkout-v2\tcontrol=40 t1=30 t2=30.5  ";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_int_equal(r.kind, PROTO_PLAN);
	assert_int_equal(r.narms, 3);
	assert_string_equal(r.arms[0].name, "control");
	assert_string_equal(r.arms[2].name, "t2");
	assert_true(r.arms[0].weight == 40 && r.arms[2].weight == 30.5);

	l = "observe e v m -1.5e-3";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_true(r.value == -1.5e-3);

	l = "observe e v m -0";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_true(r.value == 0 && signbit(r.value));

	l = "{\"ts\":1700000000.5,\"kind\":\"observe\",\"experiment\":\"e\","
	    "\"variant\":\"v\",\"metric\":\"m\",\"value\":-2.5}";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_int_equal(r.kind, PROTO_OBSERVE);
	assert_true(r.has_ts && r.ts == 1700000000.5);
	assert_true(r.value == -2.5);
	assert_string_equal(r.metric, "m");

	l = "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
	    "[{\"variant\":\"control\",\"weight\":50},"
	    "{\"weight\":25.5,\"variant\":\"t\"}]}";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_int_equal(r.narms, 2);
	assert_string_equal(r.arms[0].name, "control");
	assert_string_equal(r.arms[1].name, "t");
	assert_true(r.arms[1].weight == 25.5);

	l = "{\"kind\":\"expose\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"n\":12}";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_true(r.units == 12);

	/* Embedded NUL inside the given length is a bad byte, not an end. */
	assert_int_equal(proto_parse("expose e v\0x", 12, &r), PROTO_E_BYTES);
	/* Only len bytes are read. */
	assert_int_equal(proto_parse("expose e vXYZ", 10, &r), PROTO_OK);
	assert_string_equal(r.variant, "v");
}

static void
test_attrs(void **state)
{
	struct record r;
	const char *l;

	/* absent: cleared, whatever the record held before */
	memset(&r, 0xa5, sizeof r);
	l = "observe e v m 1";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_int_equal(r.unit_len, 0);
	assert_int_equal(r.unit[0], '\0');
	assert_int_equal(r.epoch, 0);

	l = "expose e v 25 unit=user:42 epoch=2";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_true(r.units == 25);
	assert_string_equal(r.variant, "v");
	assert_int_equal(r.unit_len, 7);
	assert_string_equal(r.unit, "user:42");
	assert_int_equal(r.epoch, 2);

	/* expose without N: units 1, the attribute is not N */
	l = "expose e v epoch=9";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_true(r.units == 1);
	assert_int_equal(r.epoch, 9);
	assert_int_equal(r.unit_len, 0);	/* the last line's unit is gone */

	l = "count e v m 3 10 epoch=1000000000 unit=" U128;
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_true(r.k == 3 && r.n == 10);
	assert_int_equal(r.epoch, 1000000000u);
	assert_int_equal(r.unit_len, PROTO_UNIT_MAX);
	assert_int_equal(strlen(r.unit), PROTO_UNIT_MAX);

	l = "observe e v m 1 epoch=007";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_int_equal(r.epoch, 7);

	l = JE "\"unit\":\"u.1\",\"epoch\":3.0}";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_string_equal(r.unit, "u.1");
	assert_int_equal(r.unit_len, 3);
	assert_int_equal(r.epoch, 3);

	/* a plan never carries attributes */
	l = "plan e a=1 b=1 unit=2";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	assert_int_equal(r.narms, 3);
	assert_string_equal(r.arms[2].name, "unit");
	assert_int_equal(r.unit_len, 0);
	assert_int_equal(r.epoch, 0);

	/* the length in hand bounds the unit, not a NUL */
	l = "observe e v m 1 unit=abcdef";
	assert_int_equal(proto_parse(l, strlen(l) - 3, &r), PROTO_OK);
	assert_string_equal(r.unit, "abc");
	assert_int_equal(r.unit_len, 3);
}

/* Records equal in every field their kind uses. */
static int
same_record(const struct record *a, const struct record *b)
{
	int i;

	if (a->kind != b->kind || a->has_ts != b->has_ts ||
	    (a->has_ts && a->ts != b->ts) ||
	    strcmp(a->experiment, b->experiment) != 0)
		return 0;
	if (a->kind != PROTO_PLAN && (a->epoch != b->epoch ||
	    a->unit_len != b->unit_len || strcmp(a->unit, b->unit) != 0))
		return 0;
	switch (a->kind) {
	case PROTO_PLAN:
		if (a->narms != b->narms)
			return 0;
		for (i = 0; i < a->narms; i++) {
			if (strcmp(a->arms[i].name, b->arms[i].name) != 0 ||
			    a->arms[i].weight != b->arms[i].weight)
				return 0;
		}
		return 1;
	case PROTO_EXPOSE:
		return strcmp(a->variant, b->variant) == 0 &&
		    a->units == b->units;
	case PROTO_OBSERVE:
		return strcmp(a->variant, b->variant) == 0 &&
		    strcmp(a->metric, b->metric) == 0 &&
		    memcmp(&a->value, &b->value, sizeof a->value) == 0;
	case PROTO_COUNT:
		return strcmp(a->variant, b->variant) == 0 &&
		    strcmp(a->metric, b->metric) == 0 &&
		    a->k == b->k && a->n == b->n;
	}
	return 0;
}

static void
test_format_roundtrip(void **state)
{
	struct record r, r2;
	char buf[PROTO_LINE_MAX + 1];
	size_t i;
	int n, done = 0;

	for (i = 0; i < sizeof cases / sizeof cases[0]; i++) {
		if (cases[i].want != PROTO_OK)
			continue;
		assert_int_equal(proto_parse(cases[i].line,
		    strlen(cases[i].line), &r), PROTO_OK);
		n = proto_format(&r, buf, sizeof buf);
		assert_true(n > 0 && (size_t)n == strlen(buf));
		if (proto_parse(buf, (size_t)n, &r2) != PROTO_OK ||
		    !same_record(&r, &r2))
			fail_msg("\"%s\" -> \"%s\" does not round-trip",
			    cases[i].line, buf);
		done++;
	}
	assert_true(done > 20);

	assert_int_equal(proto_parse("@1700000000.1 plan e c=50 t=50", 30, &r),
	    PROTO_OK);
	n = proto_format(&r, buf, sizeof buf);
	assert_string_equal(buf, "@1700000000.1 plan e c=50 t=50");
	/* Too small a buffer fails cleanly. */
	assert_int_equal(proto_format(&r, buf, 10), -1);
	assert_int_equal(proto_format(&r, buf, 0), -1);
	assert_int_equal(proto_format(&r, buf, (size_t)n), -1);
	assert_int_equal(proto_format(&r, buf, (size_t)n + 1), n);

	r.kind = PROTO_OBSERVE;
	r.has_ts = 0;
	strcpy(r.variant, "v");
	strcpy(r.metric, "m");
	r.value = 0.1 + 0.2;	/* needs 17 digits */
	n = proto_format(&r, buf, sizeof buf);
	assert_string_equal(buf, "observe e v m 0.30000000000000004");
	assert_int_equal(proto_parse(buf, (size_t)n, &r2), PROTO_OK);
	assert_true(same_record(&r, &r2));
}

/* Attributes are written back in the grammar proto.h gives. */
static void
test_format_attrs(void **state)
{
	struct record r, r2;
	char buf[PROTO_LINE_MAX + 1];
	const char *l;
	int n;

	l = "expose e v unit=u epoch=2";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	n = proto_format(&r, buf, sizeof buf);
	assert_string_equal(buf, "expose e v 1 unit=u epoch=2");
	assert_int_equal(proto_parse(buf, (size_t)n, &r2), PROTO_OK);
	assert_true(same_record(&r, &r2));
	/* a buffer one byte short of the attributes fails cleanly */
	assert_int_equal(proto_format(&r, buf, (size_t)n), -1);
	assert_int_equal(proto_format(&r, buf, (size_t)n + 1), n);

	l = "@1700000000.5 count e v m 3 10 epoch=1000000000 unit=" U128;
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	n = proto_format(&r, buf, sizeof buf);
	assert_string_equal(buf, "@1700000000.5 count e v m 3 10 unit=" U128
	    " epoch=1000000000");
	assert_int_equal(proto_parse(buf, (size_t)n, &r2), PROTO_OK);
	assert_true(same_record(&r, &r2));

	/* JSON in, plain out, the same record */
	l = "{\"kind\":\"observe\",\"experiment\":\"e\",\"variant\":\"v\","
	    "\"metric\":\"m\",\"value\":1.5,\"unit\":\"u.1\",\"epoch\":4}";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	n = proto_format(&r, buf, sizeof buf);
	assert_string_equal(buf, "observe e v m 1.5 unit=u.1 epoch=4");
	assert_int_equal(proto_parse(buf, (size_t)n, &r2), PROTO_OK);
	assert_true(same_record(&r, &r2));

	/* a plan formats without them even if a caller set them, since
	 * "unit=x" after a plan's arms would read back as one more arm */
	l = "plan e c=1 t=1";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	strcpy(r.unit, "x");
	r.unit_len = 1;
	r.epoch = 2;
	n = proto_format(&r, buf, sizeof buf);
	assert_string_equal(buf, "plan e c=1 t=1");
	/* fields out of their bounds do not format */
	l = "observe e v m 1";
	assert_int_equal(proto_parse(l, strlen(l), &r), PROTO_OK);
	r.epoch = PROTO_EPOCH_MAX + 1;
	assert_int_equal(proto_format(&r, buf, sizeof buf), -1);
	r.epoch = 0;
	memset(r.unit, 'a', PROTO_UNIT_MAX + 1);
	r.unit_len = PROTO_UNIT_MAX + 1;
	assert_int_equal(proto_format(&r, buf, sizeof buf), -1);
}

/* A random decimal string in the grammar, weighted toward the fast path. */
static void
random_decimal(char *s, size_t size)
{
	size_t i = 0, nd, point, k;
	int x;

	if (rng() % 4 == 0)
		s[i++] = rng() % 2 ? '-' : '+';
	nd = 1 + rng() % (rng() % 3 == 0 ? 40 : 17);
	point = rng() % (nd + 2);	/* nd + 1: no point */
	for (k = 0; k < nd; k++) {
		if (k == point)
			s[i++] = '.';
		s[i++] = (char)('0' + rng() % 10);
	}
	if (point == nd)
		s[i++] = '.';
	if (rng() % 3 == 0) {
		s[i++] = rng() % 2 ? 'e' : 'E';
		x = (int)(rng() % 700) - 350;
		if (rng() % 2)
			x = (int)(rng() % 50) - 25;
		i += (size_t)snprintf(s + i, size - i, "%d", x);
	}
	s[i] = '\0';
}

static void
test_numbers_vs_strtod(void **state)
{
	char num[128], line[600];
	struct record r;
	double want;
	char *end;
	int i, n, bad = 0, finite = 0;

	for (i = 0; i < 300000; i++) {
		random_decimal(num, sizeof num);
		n = snprintf(line, sizeof line, "observe e v m %s", num);
		want = strtod(num, &end);
		assert_true(*end == '\0');
		if (!isfinite(want)) {
			if (proto_parse(line, (size_t)n, &r) != PROTO_E_NUMBER)
				bad++;
			continue;
		}
		finite++;
		if (proto_parse(line, (size_t)n, &r) != PROTO_OK ||
		    memcmp(&r.value, &want, sizeof want) != 0) {
			if (bad++ < 5)
				print_error("%s: got %.17g want %.17g\n", num,
				    r.value, want);
		}
	}
	assert_int_equal(bad, 0);
	assert_true(finite > 250000);

	/* Edges of the fast path: 2^53, 2^53 + 1, 10^22, 10^23. */
	static const char *edge[] = {
		"9007199254740992", "9007199254740993", "9007199254740993e3",
		"1e22", "1e23", "1e-22", "1e-23", "123456789012345678e-5",
		"0.1", "0.30000000000000004", "2.2250738585072011e-308",
		"4.9e-324", "2e-324", "1.7976931348623157e308",
		"179769313486231580793728971405303415079934132710037826936173"
		"778980444968292764750946649017977587207096330286416692887910"
		"946555547851940402630657488671505820681908902000708383676273"
		"854845817711531764475730270069855571366959622842914819860834"
		"936475292719074168444365510704342711559699508093042880177904"
		"174497791", "0.000000000000000000000000000000000000000001",
		"12345678901234567890", "1234567890123456789000000e-10",
		"-0", "-0.0", "+0", "0.", ".0", "-.5", "00001.5000",
		"9007199254740993.0", "0.0000000000000000000001",
		"1234567890123456789", "-1234567890.123456789",
		"0.00000000000000000000000001", "123.4567890123456789",
	};
	for (i = 0; i < (int)(sizeof edge / sizeof edge[0]); i++) {
		n = snprintf(line, sizeof line, "observe e v m %s", edge[i]);
		want = strtod(edge[i], NULL);
		if (n >= (int)sizeof line)
			continue;
		if (isfinite(want)) {
			assert_int_equal(proto_parse(line, (size_t)n, &r),
			    PROTO_OK);
			assert_memory_equal(&r.value, &want, sizeof want);
		}
	}
}

/*
 * The splitter (proto_scan.c: byte-class masks, sixteen bytes at a time)
 * against the plain definition, one table look-up per byte: on random
 * lines of every length up to PROTO_LINE_MAX, built from blanks, name
 * characters, other printable bytes, bytes >= 0x80 and (rarely) control
 * bytes, both give the same tokens, the same name flags and the same
 * refusal of control bytes.
 */
static int
split_ref(const char *line, size_t len, struct tok *t)
{
	size_t i = 0, start;
	unsigned cl, all;
	int nt = 0;

	for (i = 0; i < len; i++)
		if (proto_class[(unsigned char)line[i]] & PC_BAD)
			return -1;
	for (i = 0; i < len;) {
		if (proto_class[(unsigned char)line[i]] & PC_BLANK) {
			i++;
			continue;
		}
		start = i;
		all = PC_NAME;
		for (; i < len; i++) {
			cl = proto_class[(unsigned char)line[i]];
			if (cl & PC_BLANK)
				break;
			all &= cl;
		}
		if (nt < PROTO_TOKENS) {
			t[nt].p = line + start;
			t[nt].n = i - start;
			t[nt].name = all != 0;
		}
		nt++;
	}
	return nt;
}

static char
random_byte(int ctl)
{
	static const char name[] = "abcxyzABCXYZ0129.-_:";
	static const char other[] = "=@#{}\"/,;!~[]`\\";
	unsigned k = (unsigned)(rng() % 100);

	if (k < 25)
		return rng() % 4 ? ' ' : '\t';
	if (k < 80)
		return name[rng() % (sizeof name - 1)];
	if (k < 90)
		return other[rng() % (sizeof other - 1)];
	if (k < 97 || !ctl)
		return (char)(0x80 + rng() % 128);
	return rng() % 8 ? (char)(rng() % 32 == 9 ? 0 : rng() % 32) : 0x7f;
}

static void
test_split_vs_bytes(void **state)
{
	static char line[PROTO_LINE_MAX];
	struct tok a[PROTO_TOKENS], b[PROTO_TOKENS];
	size_t len, i;
	int n, na, nb, j, bad = 0, refused = 0;

	for (n = 0; n < 200000; n++) {
		len = rng() % 8 == 0 ? rng() % (PROTO_LINE_MAX + 1) :
		    rng() % 200;
		for (i = 0; i < len; i++)
			line[i] = random_byte(rng() % 4 == 0);
		na = proto_split(line, len, a);
		nb = split_ref(line, len, b);
		refused += nb < 0;
		if (na != nb) {
			bad++;
			continue;
		}
		for (j = 0; j < nb && j < PROTO_TOKENS; j++)
			if (a[j].p != b[j].p || a[j].n != b[j].n ||
			    a[j].name != b[j].name)
				bad++;
	}
	assert_int_equal(bad, 0);
	/* both outcomes were reached often */
	assert_true(refused > 10000 && refused < 190000);
	/* every byte value, alone between two tokens */
	for (i = 0; i < 256; i++) {
		len = (size_t)snprintf(line, sizeof line, "ab%cc d", (int)i);
		if (i == 0)
			line[2] = '\0';
		assert_int_equal(proto_split(line, len, a),
		    split_ref(line, len, b));
		if (split_ref(line, len, b) > 0)
			assert_int_equal(a[0].name, b[0].name);
	}
}

/*
 * Timestamps go through a one-entry memo of the last token: a repeated
 * time gives the value strtod gives, and a bad token after a good one is
 * still refused, whatever came before.
 */
static void
test_ts_memo(void **state)
{
	char num[128], line[600];
	struct record r;
	double want;
	int i, k, n, bad = 0;

	for (i = 0; i < 50000; i++) {
		n = snprintf(num, sizeof num, "%llu.%03u",
		    (unsigned long long)(1700000000 + rng() % 100000000),
		    (unsigned)(rng() % 1000));
		want = strtod(num, NULL);
		for (k = 0; k < 3; k++) {
			snprintf(line, sizeof line, "@%s observe e v m 1", num);
			if (proto_parse(line, strlen(line), &r) != PROTO_OK ||
			    memcmp(&r.ts, &want, sizeof want) != 0)
				bad++;
		}
		/* a token that extends the cached one is parsed afresh */
		snprintf(line, sizeof line, "@%sx observe e v m 1", num);
		if (proto_parse(line, strlen(line), &r) != PROTO_E_TS)
			bad++;
		snprintf(line, sizeof line, "@%s5 observe e v m 1", num);
		want = strtod(line + 1, NULL);
		if (proto_parse(line, strlen(line), &r) != PROTO_OK ||
		    memcmp(&r.ts, &want, sizeof want) != 0)
			bad++;
		(void)n;
	}
	assert_int_equal(bad, 0);
	assert_int_equal(proto_parse("@5 observe e v m 1", 18, &r), PROTO_OK);
	assert_int_equal(proto_parse("@ observe e v m 1", 17, &r), PROTO_E_TS);
	assert_int_equal(proto_parse("@-5 observe e v m 1", 19, &r),
	    PROTO_E_TS);
	assert_int_equal(proto_parse("@5 observe e v m 1", 18, &r), PROTO_OK);
	assert_true(r.ts == 5.0);
}

/*
 * A stream with bad lines between good ones: each good line parses the
 * same as it does alone, whatever garbage came before it.
 */
static void
test_bad_between_good(void **state)
{
	static const char *good[] = {
		"plan e c=1 t=1",
		"@1700000000 expose e c 3",
		"observe e t lat 12.25",
		("{\"kind\":\"count\",\"experiment\":\"e\",\"variant\":\"t\","
		    "\"metric\":\"err\",\"k\":1,\"n\":9}"),
		"count e c err 2 10",
		"observe e t lat 3 unit=u:1 epoch=2",
	};
	static const char *badl[] = {
		"observe e t lat 3 unit=u:2 epoch=0",
		"observe e t lat nan", "{\"kind\":", "plan e a=1 a=1",
		"\x01\x02\x03", ("observe e v m 1 2 3 4 5 6 7 8 9 10 11 12 13 "
		"14 15 16 17 18 19 20 21 22 23 24 25 26 27 28 29"),
	};
	struct record alone[6], r;
	char garbage[300];
	size_t i, j, k, n;
	int round;

	for (i = 0; i < 6; i++)
		assert_int_equal(proto_parse(good[i], strlen(good[i]),
		    &alone[i]), PROTO_OK);
	for (round = 0; round < 2000; round++) {
		for (i = 0; i < 6; i++) {
			j = rng() % 7;
			if (j < 6)
				proto_parse(badl[j], strlen(badl[j]), &r);
			else {
				n = rng() % sizeof garbage;
				for (k = 0; k < n; k++)
					garbage[k] = (char)rng();
				proto_parse(garbage, n, &r);
			}
			assert_int_equal(proto_parse(good[i], strlen(good[i]),
			    &r), PROTO_OK);
			assert_true(same_record(&r, &alone[i]));
		}
	}
}

/*
 * Issue 13, item 5: a plan names the guardrails that apply to its
 * experiment, guardrails=a,b in the plain form and "guardrails": [...] in
 * JSON, never an arm; bad or repeated names, an empty list or a second
 * attribute are bad_attribute, and the attribute is a plan's only. The
 * plain form writes it back.
 */
static void
test_family(void **state)
{
	static const struct pcase bad[] = {
		{ "plan e a=1 b=1 guardrails=", PROTO_E_ATTR },
		{ "plan e a=1 b=1 guardrails=x,", PROTO_E_ATTR },
		{ "plan e a=1 b=1 guardrails=,x", PROTO_E_ATTR },
		{ "plan e a=1 b=1 guardrails=x,,y", PROTO_E_ATTR },
		{ "plan e a=1 b=1 guardrails=x,y,x", PROTO_E_ATTR },
		{ "plan e a=1 b=1 guardrails=x guardrails=y", PROTO_E_ATTR },
		{ "plan e a=1 b=1 guardrails=no/slash", PROTO_E_ATTR },
		{ "plan e a=1 b=1 guardrails=" N64 "b", PROTO_E_ATTR },
		{ "plan e a=1 guardrails=x", PROTO_E_PLAN },	/* one arm */
		{ "expose e v guardrails=x", PROTO_E_ATTR },
		{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
		  "[{\"variant\":\"a\",\"weight\":1},{\"variant\":\"b\","
		  "\"weight\":1}],\"guardrails\":[]}", PROTO_E_ATTR },
		{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
		  "[{\"variant\":\"a\",\"weight\":1},{\"variant\":\"b\","
		  "\"weight\":1}],\"guardrails\":\"x\"}", PROTO_E_ATTR },
		{ "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":"
		  "[{\"variant\":\"a\",\"weight\":1},{\"variant\":\"b\","
		  "\"weight\":1}],\"guardrails\":[\"x\",\"x\"]}",
		  PROTO_E_ATTR },
		{ JE "\"guardrails\":[\"x\"]}", PROTO_E_FIELDS },
	};
	struct record r, r2;
	char buf[PROTO_LINE_MAX + 1];
	const char *line;
	size_t i;
	int n;

	(void)state;
	line = "plan checkout control=50 guardrails=p99,errors treatment=50";
	assert_int_equal(proto_parse(line, strlen(line), &r), PROTO_OK);
	assert_int_equal(r.narms, 2);
	assert_string_equal(r.arms[1].name, "treatment");
	assert_int_equal(r.family_len, strlen("p99,errors"));
	assert_string_equal(r.family, "p99,errors");
	n = proto_format(&r, buf, sizeof buf);
	assert_true(n > 0);
	assert_string_equal(buf, "plan checkout control=50 treatment=50 "
	    "guardrails=p99,errors");
	assert_int_equal(proto_parse(buf, (size_t)n, &r2), PROTO_OK);
	assert_string_equal(r2.family, "p99,errors");

	line = "{\"kind\":\"plan\",\"experiment\":\"e\",\"weights\":["
	    "{\"variant\":\"a\",\"weight\":1},{\"variant\":\"b\","
	    "\"weight\":1}],\"guardrails\":[\"render\",\"crashes\"]}";
	assert_int_equal(proto_parse(line, strlen(line), &r), PROTO_OK);
	assert_string_equal(r.family, "render,crashes");
	/* a plan without one has none, even after a record that had one */
	line = "plan e a=1 b=1";
	assert_int_equal(proto_parse(line, strlen(line), &r), PROTO_OK);
	assert_int_equal(r.family_len, 0);

	for (i = 0; i < sizeof bad / sizeof bad[0]; i++) {
		enum proto_status st = proto_parse(bad[i].line,
		    strlen(bad[i].line), &r);
		if (st != bad[i].want)
			fail_msg("%s: %s, want %s", bad[i].line,
			    proto_reason(st), proto_reason(bad[i].want));
	}
}

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test(test_table),
		cmocka_unit_test(test_every_status),
		cmocka_unit_test(test_long),
		cmocka_unit_test(test_names),
		cmocka_unit_test(test_fields),
		cmocka_unit_test(test_attrs),
		cmocka_unit_test(test_format_roundtrip),
		cmocka_unit_test(test_format_attrs),
		cmocka_unit_test(test_numbers_vs_strtod),
		cmocka_unit_test(test_bad_between_good),
		cmocka_unit_test(test_split_vs_bytes),
		cmocka_unit_test(test_ts_memo),
		cmocka_unit_test(test_family),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
