/*
 * test_frame.c: signed batches (frame.c) and the signer (sign.c). The
 * signatures are check values computed outside the project, with
 * Python's hmac and hashlib (/usr/bin/python3):
 *
 *   "v1," + base64.b64encode(hmac.new(key, id + b"." + ts + b"." + body,
 *   hashlib.sha256).digest())
 *
 * and one is the Standard Webhooks specification's own example (its
 * README, "Signature scheme"; remembered, and recomputed as above). The
 * header parser gets a table of good and bad lines; the producer its
 * three refusals (signature, time, replay) and the replay bound.
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>

#include "stopcock/frame.h"
#include "stopcock/sign.h"

/* base64(b"ferry-timetable-producer-key-01") */
#define SECRET1 "whsec_ZmVycnktdGltZXRhYmxlLXByb2R1Y2VyLWtleS0wMQ=="
/* base64(b"bakery-ovens-rotated-key-02!") */
#define SECRET2 "whsec_YmFrZXJ5LW92ZW5zLXJvdGF0ZWQta2V5LTAyIQ=="
#define BODY1 "plan ferry_a control=50 treatment=50\nexpose ferry_a control\n"
/* python: key1, "msg-0001", 1764700000, BODY1 */
#define SIG1 "v1,5p9TbaqKdPdDbtp6BRoDZ+FxEDJ3UN4IDVvToy9hKF0="
/* python: key1, "msg-0002", 1764700000, empty body */
#define SIG1_EMPTY "v1,3f+N53UUl1ky0Whw+NFyr1lhcgIM2gXHTZ99QJ+Wl8c="
#define BODY2 "observe bake control crust_ms 412.5\n"
/* python: key2, "oven:7", 1700000000, BODY2 */
#define SIG2 "v1,KvyME6MohANXVmLDLsDNOS+jCPOpLoQ8npHvUDoEoXY="

static const uint8_t hashkey[16] = { 7, 1, 7, 1 };

static void
test_sign_vectors(void **state)
{
	unsigned char key[SIGN_KEY_MAX];
	char sig[SIGN_SIG_MAX], *cause = NULL;
	size_t keylen;

	assert_int_equal(sign_secret_key(SECRET1, key, &keylen, &cause), 0);
	assert_int_equal(keylen, 31);
	assert_int_equal(sign_make(key, keylen, "msg-0001", 8, 1764700000,
	    BODY1, strlen(BODY1), sig, sizeof sig), 0);
	assert_string_equal(sig, SIG1);
	assert_int_equal(sign_make(key, keylen, "msg-0002", 8, 1764700000,
	    "", 0, sig, sizeof sig), 0);
	assert_string_equal(sig, SIG1_EMPTY);
	assert_int_equal(sign_check(key, keylen, "msg-0001", 8, 1764700000,
	    BODY1, strlen(BODY1), SIG1, strlen(SIG1)), 1);
	/* one byte of the body, the time or the id changed: refused */
	assert_int_equal(sign_check(key, keylen, "msg-0001", 8, 1764700001,
	    BODY1, strlen(BODY1), SIG1, strlen(SIG1)), 0);
	assert_int_equal(sign_check(key, keylen, "msg-0001", 8, 1764700000,
	    BODY1, strlen(BODY1) - 1, SIG1, strlen(SIG1)), 0);
	assert_int_equal(sign_check(key, keylen, "msg-0003", 8, 1764700000,
	    BODY1, strlen(BODY1), SIG1, strlen(SIG1)), 0);

	/* the Standard Webhooks specification's example */
	assert_int_equal(sign_secret_key("whsec_MfKQ9r8GKYqrTwjUPD8ILPZIo2La"
	    "LaSw", key, &keylen, &cause), 0);
	assert_int_equal(sign_make(key, keylen, "msg_p5jXN8AQM9LWM0D4loKWxJek",
	    28, 1614265330, "{\"test\": 2432232314}", 20, sig, sizeof sig), 0);
	assert_string_equal(sig, "v1,g0hM9SsE+OTPJTGt/tmIKtSyZlE3uFJELVlNIOLJ1OE=");
}

static void
test_sign_bad_secrets(void **state)
{
	static const char *const bad[] = {
		"ZmVycnk=", "whsec_", "whsec_!!!!", "whsec_ab=c",
		"whsec_" "QUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFB"
		"QUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFB"
		"QUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFB"
		"QUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFB"
		"QUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFB"
		"QUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFBQUFB"
		"QUFBQUFBQUFBQUFB",
	};
	unsigned char key[SIGN_KEY_MAX];
	char *cause;
	size_t keylen, i;

	for (i = 0; i < sizeof bad / sizeof bad[0]; i++) {
		cause = NULL;
		assert_int_equal(sign_secret_key(bad[i], key, &keylen, &cause),
		    -1);
		assert_non_null(cause);
		free(cause);
	}
}

static void
test_parse_good(void **state)
{
	char buf[512];
	struct frame f;
	int n;

	n = snprintf(buf, sizeof buf, "batch ferry msg-0001 1764700000 %zu "
	    SIG1 "\n" BODY1 "expose ferry_a treatment\n", strlen(BODY1));
	assert_int_equal(frame_parse(buf, (size_t)n, &f), FRAME_OK);
	assert_string_equal(f.producer, "ferry");
	assert_string_equal(f.id, "msg-0001");
	assert_int_equal(f.id_len, 8);
	assert_true(f.ts == 1764700000);
	assert_int_equal(f.body_len, strlen(BODY1));
	assert_string_equal(f.sig, SIG1);
	assert_memory_equal(buf + f.header_len, BODY1, strlen(BODY1));

	/* a header with \r\n, and a body of nothing */
	n = snprintf(buf, sizeof buf, "batch ferry msg-0002 1764700000 0 "
	    SIG1_EMPTY "\r\n");
	assert_int_equal(frame_parse(buf, (size_t)n, &f), FRAME_OK);
	assert_int_equal(f.body_len, 0);
	assert_int_equal(f.header_len, (size_t)n);
}

static void
test_parse_partial(void **state)
{
	char buf[512];
	struct frame f;
	size_t len, i;

	len = (size_t)snprintf(buf, sizeof buf, "batch ferry msg-0001 "
	    "1764700000 %zu " SIG1 "\n" BODY1, strlen(BODY1));
	/* every prefix is waiting for more, never an error */
	for (i = 0; i < len; i++)
		assert_int_equal(frame_parse(buf, i, &f), FRAME_PARTIAL);
	assert_int_equal(frame_parse(buf, len, &f), FRAME_OK);
}

static void
test_parse_bad(void **state)
{
	static const struct {
		const char		*line;
		enum frame_status	 want;
	} cases[] = {
		{ "plan ferry_a a=1 b=1\n", FRAME_E_MALFORMED },
		{ "batch\n", FRAME_E_MALFORMED },
		{ "batch ferry msg 1764700000 0\n", FRAME_E_MALFORMED },
		{ "batch ferry msg 1764700000 0 " SIG1 " extra\n",
		  FRAME_E_MALFORMED },
		{ "batch  ferry msg 1764700000 0 " SIG1 "\n",
		  FRAME_E_MALFORMED },
		{ "batch fe/rry msg 1764700000 0 " SIG1 "\n",
		  FRAME_E_MALFORMED },
		{ "batch ferry m!sg 1764700000 0 " SIG1 "\n",
		  FRAME_E_MALFORMED },
		{ "batch ferry msg 01764700000 0 " SIG1 "\n",
		  FRAME_E_MALFORMED },
		{ "batch ferry msg -1764700000 0 " SIG1 "\n",
		  FRAME_E_MALFORMED },
		{ "batch ferry msg 1764700000000 0 " SIG1 "\n",
		  FRAME_E_MALFORMED },
		{ "batch ferry msg 1764700000 00 " SIG1 "\n",
		  FRAME_E_MALFORMED },
		{ "batch ferry msg 1764700000 1e3 " SIG1 "\n",
		  FRAME_E_MALFORMED },
		{ "batch ferry msg 1764700000 0 v2,5p9TbaqKdPdDbtp6BRoDZ+FxED"
		  "J3UN4IDVvToy9hKF0=\n", FRAME_E_MALFORMED },
		{ "batch ferry msg 1764700000 0 v1,5p9TbaqKdPdDbtp6BRoDZ+FxED"
		  "J3UN4IDVvToy9hKF0\n", FRAME_E_MALFORMED },
		{ "batch ferry msg 1764700000 0 v1,5p9Tb?qKdPdDbtp6BRoDZ+FxED"
		  "J3UN4IDVvToy9hKF0=\n", FRAME_E_MALFORMED },
		{ "batch ferry msg 1764700000 65537 " SIG1 "\n", FRAME_E_LONG },
		{ "batch ferry msg 1764700000 99999999999 " SIG1 "\n",
		  FRAME_E_MALFORMED },
		{ "batch ferry msg\0 1764700000 0 " SIG1 "\n",
		  FRAME_E_MALFORMED },
	};
	char line[FRAME_HEADER_MAX + 64];
	struct frame f;
	size_t i, len;

	for (i = 0; i < sizeof cases / sizeof cases[0]; i++) {
		len = strlen(cases[i].line);
		if (i == sizeof cases / sizeof cases[0] - 1)
			len = 16 + strlen(" 1764700000 0 " SIG1 "\n");
		memcpy(line, cases[i].line, len);
		assert_int_equal(frame_parse(line, len, &f), cases[i].want);
		/* the bad line's length is known: the caller skips it */
		assert_int_equal(f.header_len, len);
	}
	/* the limit itself is fine */
	len = (size_t)snprintf(line, sizeof line, "batch ferry msg 1764700000 "
	    "%d " SIG1 "\n", FRAME_BODY_MAX);
	assert_int_equal(frame_parse(line, len, &f), FRAME_PARTIAL);
	/* no newline within FRAME_HEADER_MAX bytes */
	memset(line, 'x', sizeof line);
	memcpy(line, "batch ", 6);
	assert_int_equal(frame_parse(line, FRAME_HEADER_MAX, &f),
	    FRAME_E_MALFORMED);
	assert_int_equal(f.header_len, 0);
	assert_int_equal(frame_parse(line, FRAME_HEADER_MAX - 1, &f),
	    FRAME_PARTIAL);
}

static void
test_fields(void **state)
{
	struct frame f;

	assert_int_equal(frame_fields("bakery", 6, "oven:7", 6, "1700000000",
	    10, SIG2, strlen(SIG2), strlen(BODY2), &f), FRAME_OK);
	assert_true(f.ts == 1700000000);
	assert_int_equal(frame_fields("bakery", 6, "oven:7", 6, "17e8", 4,
	    SIG2, strlen(SIG2), 1, &f), FRAME_E_MALFORMED);
	assert_int_equal(frame_fields("bakery", 6, "", 0, "1700000000", 10,
	    SIG2, strlen(SIG2), 1, &f), FRAME_E_MALFORMED);
	assert_int_equal(frame_fields("bakery", 6, "oven:7", 6, "1700000000",
	    10, SIG2, strlen(SIG2), FRAME_BODY_MAX + 1, &f), FRAME_E_LONG);
}

static void
frame_of(struct frame *f, const char *producer, const char *id,
    long long ts, const char *sig, size_t body_len)
{
	char tsbuf[32];
	int n;

	n = snprintf(tsbuf, sizeof tsbuf, "%lld", ts);
	assert_int_equal(frame_fields(producer, strlen(producer), id,
	    strlen(id), tsbuf, (size_t)n, sig, strlen(sig), body_len, f),
	    FRAME_OK);
}

static void
test_check(void **state)
{
	struct frame_producer *fp;
	struct frame f;
	char *cause = NULL;

	fp = frame_producer_new("ferry", hashkey);
	assert_int_equal(frame_producer_add_key(fp, SECRET2, &cause), 0);
	frame_of(&f, "ferry", "msg-0001", 1764700000, SIG1, strlen(BODY1));
	/* only the other key: bad signature */
	assert_int_equal(frame_check(fp, &f, BODY1, 1764700000, 300),
	    FRAME_BAD_SIGNATURE);
	/* rotation: with the right key beside it, accepted */
	assert_int_equal(frame_producer_add_key(fp, SECRET1, &cause), 0);
	assert_int_equal(frame_check(fp, &f, BODY1, 1764700000 + 300, 300),
	    FRAME_ACCEPT);
	/* the same id again: replayed */
	assert_int_equal(frame_check(fp, &f, BODY1, 1764700000, 300),
	    FRAME_REPLAYED);
	/* the signature is checked before the time: a forgery is a forgery */
	frame_of(&f, "ferry", "msg-0002", 1764700000, SIG1, 0);
	assert_int_equal(frame_check(fp, &f, "", 1764700000 + 10000, 300),
	    FRAME_BAD_SIGNATURE);
	frame_of(&f, "ferry", "msg-0002", 1764700000, SIG1_EMPTY, 0);
	assert_int_equal(frame_check(fp, &f, "", 1764700000 + 301, 300),
	    FRAME_STALE);
	assert_int_equal(frame_check(fp, &f, "", 1764700000 - 301, 300),
	    FRAME_STALE);
	assert_int_equal(frame_check(fp, &f, "", 1764700000 - 300, 300),
	    FRAME_ACCEPT);
	assert_true(frame_producer_floor(fp) == 1764700000);
	frame_producer_free(fp);

	/* a restored producer refuses what its floor covers */
	fp = frame_producer_new("ferry", hashkey);
	assert_int_equal(frame_producer_add_key(fp, SECRET1, &cause), 0);
	frame_producer_set_floor(fp, 1764700000);
	frame_of(&f, "ferry", "msg-0001", 1764700000, SIG1, strlen(BODY1));
	assert_int_equal(frame_check(fp, &f, BODY1, 1764700000, 300),
	    FRAME_REPLAYED);
	frame_producer_free(fp);

	fp = frame_producer_new("ferry", hashkey);
	assert_int_equal(frame_producer_add_key(fp, "whsec_x", &cause), -1);
	free(cause);
	frame_producer_free(fp);
}

/*
 * The bound: FRAME_REPLAY_IDS ids are remembered; once the first is
 * forgotten, nothing stamped at or before it passes, so its replay is
 * still refused. The signatures here are made by sign_make (the vectors
 * above pin it to the outside values).
 */
static void
test_replay_bound(void **state)
{
	struct frame_producer *fp;
	unsigned char key[SIGN_KEY_MAX];
	char sig[SIGN_SIG_MAX], id[32], *cause = NULL;
	struct frame f;
	size_t keylen;
	int i;

	fp = frame_producer_new("bakery", hashkey);
	assert_int_equal(frame_producer_add_key(fp, SECRET2, &cause), 0);
	assert_int_equal(sign_secret_key(SECRET2, key, &keylen, &cause), 0);
	for (i = 0; i <= FRAME_REPLAY_IDS; i++) {
		snprintf(id, sizeof id, "b%d", i);
		assert_int_equal(sign_make(key, keylen, id, strlen(id),
		    1700000000 + i, "", 0, sig, sizeof sig), 0);
		frame_of(&f, "bakery", id, 1700000000 + i, sig, 0);
		assert_int_equal(frame_check(fp, &f, "", 1700000000 + i, 1e6),
		    FRAME_ACCEPT);
	}
	/* b0 is forgotten, but its stamp is the floor now */
	assert_int_equal(sign_make(key, keylen, "b0", 2, 1700000000, "", 0,
	    sig, sizeof sig), 0);
	frame_of(&f, "bakery", "b0", 1700000000, sig, 0);
	assert_int_equal(frame_check(fp, &f, "", 1700000000, 1e6),
	    FRAME_REPLAYED);
	/* b1 is still remembered */
	assert_int_equal(sign_make(key, keylen, "b1", 2, 1700000001, "", 0,
	    sig, sizeof sig), 0);
	frame_of(&f, "bakery", "b1", 1700000001, sig, 0);
	assert_int_equal(frame_check(fp, &f, "", 1700000001, 1e6),
	    FRAME_REPLAYED);
	assert_true(frame_producer_floor(fp) == 1700000000 + FRAME_REPLAY_IDS);
	frame_producer_free(fp);
}

/* Sign an empty batch id@ts with key and check it at time ts. */
static enum frame_verdict
frame_try(struct frame_producer *fp, const unsigned char *key,
    size_t keylen, const char *id, long long ts, double tolerance)
{
	char sig[SIGN_SIG_MAX];
	struct frame f;

	assert_int_equal(sign_make(key, keylen, id, strlen(id), ts, "", 0,
	    sig, sizeof sig), 0);
	frame_of(&f, "bakery", id, ts, sig, 0);
	return frame_check(fp, &f, "", (double)ts, tolerance);
}

/*
 * A busy producer: 20,000 batches stamped in one second (about what a
 * signed TCP producer sends at 1 M records/s in 60 KB batches) are all
 * accepted, and each one's replay is refused; a window of 4096 refused
 * the 4097th and every later one as replayed. Then ids keep coming, 100
 * a second, past the window's bound, so ids are forgotten and unindexed:
 * every id still in the window is refused by its id, the forgotten ones
 * by the floor, and a fresh id of the newest second passes.
 */
static void
test_replay_busy_second(void **state)
{
	struct frame_producer *fp;
	unsigned char key[SIGN_KEY_MAX];
	char id[32], *cause = NULL;
	size_t keylen;
	long long ts = 1700000000;
	int i, n = 20000, m = FRAME_REPLAY_IDS + 5000;

	fp = frame_producer_new("bakery", hashkey);
	assert_int_equal(frame_producer_add_key(fp, SECRET2, &cause), 0);
	assert_int_equal(sign_secret_key(SECRET2, key, &keylen, &cause), 0);
	for (i = 0; i < n; i++) {
		snprintf(id, sizeof id, "s%d", i);
		assert_int_equal(frame_try(fp, key, keylen, id, ts, 300),
		    FRAME_ACCEPT);
	}
	for (i = 0; i < n; i += 7) {
		snprintf(id, sizeof id, "s%d", i);
		assert_int_equal(frame_try(fp, key, keylen, id, ts, 300),
		    FRAME_REPLAYED);
	}
	for (i = 0; i < m; i++) {
		snprintf(id, sizeof id, "t%d", i);
		assert_int_equal(frame_try(fp, key, keylen, id,
		    ts + 1 + i / 100, 1e6), FRAME_ACCEPT);
	}
	for (i = m - FRAME_REPLAY_IDS; i < m; i += 13) {
		snprintf(id, sizeof id, "t%d", i);
		assert_int_equal(frame_try(fp, key, keylen, id,
		    ts + 1 + i / 100, 1e6), FRAME_REPLAYED);
	}
	assert_int_equal(frame_try(fp, key, keylen, "s5", ts, 1e6),
	    FRAME_REPLAYED);
	assert_int_equal(frame_try(fp, key, keylen, "fresh",
	    ts + 1 + (m - 1) / 100, 1e6), FRAME_ACCEPT);
	frame_producer_free(fp);
}

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test(test_sign_vectors),
		cmocka_unit_test(test_sign_bad_secrets),
		cmocka_unit_test(test_parse_good),
		cmocka_unit_test(test_parse_partial),
		cmocka_unit_test(test_parse_bad),
		cmocka_unit_test(test_fields),
		cmocka_unit_test(test_check),
		cmocka_unit_test(test_replay_bound),
		cmocka_unit_test(test_replay_busy_second),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
