/*
 * test_names.c: SipHash-2-4 and the string map. The hash is checked
 * against the test vector printed in Aumasson & Bernstein 2012 (SipHash:
 * a fast short-input PRF, Appendix A) and against OpenSSL's independent
 * SIPHASH MAC on random inputs; the map against a plain array model
 * under a long random run of puts, gets and deletes.
 */
#include <setjmp.h>
#include <stdarg.h>
#include <stddef.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <cmocka.h>
#include <openssl/evp.h>
#include <openssl/core_names.h>
#include <openssl/params.h>

#include "stopcock/names.h"

/* xorshift64*: the random cases are the same on every run. */
#define RNG_SEED 0x243f6a8885a308d3ULL
#include "rng.h"

static const uint8_t seq_key[16] = {
	0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15
};

/* Aumasson & Bernstein 2012, Appendix A: key 00..0f, message 00..0e. */
static void
test_paper_vector(void **state)
{
	uint8_t msg[15];
	int i;

	for (i = 0; i < 15; i++)
		msg[i] = (uint8_t)i;
	assert_true(siphash24(seq_key, msg, 15) == 0xa129ca6149be45e5ULL);
}

/* SipHash-2-4 with a 64-bit output through OpenSSL's EVP_MAC. */
static uint64_t
openssl_siphash(const uint8_t key[16], const uint8_t *msg, size_t len)
{
	EVP_MAC *mac;
	EVP_MAC_CTX *ctx;
	OSSL_PARAM params[2];
	unsigned int size = 8;
	uint8_t out[8];
	size_t outl = 0;
	uint64_t v = 0;
	int i;

	mac = EVP_MAC_fetch(NULL, "SIPHASH", NULL);
	assert_non_null(mac);
	ctx = EVP_MAC_CTX_new(mac);
	assert_non_null(ctx);
	params[0] = OSSL_PARAM_construct_uint(OSSL_MAC_PARAM_SIZE, &size);
	params[1] = OSSL_PARAM_construct_end();
	assert_int_equal(EVP_MAC_init(ctx, key, 16, params), 1);
	assert_int_equal(EVP_MAC_update(ctx, msg, len), 1);
	assert_int_equal(EVP_MAC_final(ctx, out, &outl, sizeof out), 1);
	assert_int_equal(outl, 8);
	EVP_MAC_CTX_free(ctx);
	EVP_MAC_free(mac);
	for (i = 7; i >= 0; i--)
		v = v << 8 | out[i];
	return v;
}

static void
test_vs_openssl(void **state)
{
	uint8_t key[16], msg[200];
	size_t len, i;
	int round;

	/* Every length 0..64 with the paper's key, then random ones. */
	for (len = 0; len <= 64; len++) {
		for (i = 0; i < len; i++)
			msg[i] = (uint8_t)i;
		assert_true(siphash24(seq_key, msg, len) ==
		    openssl_siphash(seq_key, msg, len));
	}
	for (round = 0; round < 2000; round++) {
		for (i = 0; i < 16; i++)
			key[i] = (uint8_t)rng();
		len = rng() % sizeof msg;
		for (i = 0; i < len; i++)
			msg[i] = (uint8_t)rng();
		assert_true(siphash24(key, msg, len) ==
		    openssl_siphash(key, msg, len));
	}
}

static void
test_basic(void **state)
{
	struct nmap *m = nmap_new(seq_key);
	uint32_t v = 0;

	assert_int_equal(nmap_count(m), 0);
	assert_int_equal(nmap_get(m, "a", 1, &v), -1);
	nmap_put(m, "checkout-v2", 11, 7);
	assert_int_equal(nmap_get(m, "checkout-v2", 11, &v), 0);
	assert_int_equal(v, 7);
	/* Length counts: a prefix is another key. */
	assert_int_equal(nmap_get(m, "checkout-v2", 10, &v), -1);
	nmap_put(m, "checkout-v2", 11, 9);
	assert_int_equal(nmap_count(m), 1);
	assert_int_equal(nmap_get(m, "checkout-v2", 11, &v), 0);
	assert_int_equal(v, 9);
	/* The empty key and keys holding NUL bytes are keys too. */
	nmap_put(m, "", 0, 1);
	nmap_put(m, "a\0b", 3, 2);
	nmap_put(m, "a\0c", 3, 3);
	assert_int_equal(nmap_get(m, "", 0, &v), 0);
	assert_int_equal(v, 1);
	assert_int_equal(nmap_get(m, "a\0c", 3, &v), 0);
	assert_int_equal(v, 3);
	assert_int_equal(nmap_get(m, "a", 1, &v), -1);
	assert_int_equal(nmap_del(m, "a\0b", 3), 0);
	assert_int_equal(nmap_del(m, "a\0b", 3), -1);
	assert_int_equal(nmap_get(m, "a\0c", 3, &v), 0);
	assert_int_equal(nmap_count(m), 3);
	nmap_free(m);
	nmap_free(NULL);
}

static void
test_100k(void **state)
{
	struct nmap *m = nmap_new(seq_key);
	char key[32];
	uint32_t v, i;
	size_t b0 = nmap_bytes(m), b1;
	int n;

	for (i = 0; i < 100000; i++) {
		n = snprintf(key, sizeof key, "metric.%u", i);
		nmap_put(m, key, (size_t)n, i * 3);
	}
	assert_int_equal(nmap_count(m), 100000);
	b1 = nmap_bytes(m);
	/* At least the keys and 100k slots; load stays <= 0.7. */
	assert_true(b1 > b0 + 100000 * (10 + 16));
	assert_true(b1 < 100000 * 120);
	for (i = 0; i < 100000; i++) {
		n = snprintf(key, sizeof key, "metric.%u", i);
		assert_int_equal(nmap_get(m, key, (size_t)n, &v), 0);
		assert_int_equal(v, i * 3);
	}
	/* Delete the odd ones; the even ones stay findable. */
	for (i = 1; i < 100000; i += 2) {
		n = snprintf(key, sizeof key, "metric.%u", i);
		assert_int_equal(nmap_del(m, key, (size_t)n), 0);
	}
	assert_int_equal(nmap_count(m), 50000);
	assert_true(nmap_bytes(m) < b1);
	for (i = 0; i < 100000; i++) {
		n = snprintf(key, sizeof key, "metric.%u", i);
		if (i % 2) {
			assert_int_equal(nmap_get(m, key, (size_t)n, &v), -1);
			assert_int_equal(nmap_del(m, key, (size_t)n), -1);
		} else {
			assert_int_equal(nmap_get(m, key, (size_t)n, &v), 0);
			assert_int_equal(v, i * 3);
		}
	}
	for (i = 0; i < 100000; i += 2) {
		n = snprintf(key, sizeof key, "metric.%u", i);
		assert_int_equal(nmap_del(m, key, (size_t)n), 0);
	}
	assert_int_equal(nmap_count(m), 0);
	nmap_free(m);
}

/*
 * Random puts, gets and deletes over a small universe checked against an
 * array. Small universes keep clusters long, which is where a wrong
 * backward shift would lose a key.
 */
static void
test_model(void **state)
{
	enum { U = 300 };
	struct nmap *m;
	char keys[U][24];
	size_t lens[U];
	int present[U];
	uint32_t vals[U], v;
	int i, op, k, count, run;

	for (run = 0; run < 4; run++) {
		m = nmap_new(seq_key);
		memset(present, 0, sizeof present);
		count = 0;
		for (i = 0; i < U; i++)
			lens[i] = (size_t)snprintf(keys[i], sizeof keys[i],
			    "k%d", i * (run + 1));
		for (op = 0; op < 200000; op++) {
			k = (int)(rng() % (U >> (run % 3)));
			switch (rng() % 3) {
			case 0:
				v = (uint32_t)rng();
				nmap_put(m, keys[k], lens[k], v);
				count += !present[k];
				present[k] = 1;
				vals[k] = v;
				break;
			case 1:
				assert_int_equal(nmap_del(m, keys[k], lens[k]),
				    present[k] ? 0 : -1);
				count -= present[k];
				present[k] = 0;
				break;
			default:
				if (present[k]) {
					assert_int_equal(nmap_get(m, keys[k],
					    lens[k], &v), 0);
					assert_int_equal(v, vals[k]);
				} else
					assert_int_equal(nmap_get(m, keys[k],
					    lens[k], &v), -1);
			}
			assert_int_equal((int)nmap_count(m), count);
		}
		for (k = 0; k < U; k++)
			assert_int_equal(nmap_get(m, keys[k], lens[k], &v),
			    present[k] ? 0 : -1);
		nmap_free(m);
	}
}

/*
 * Keys an attacker might send: long shared prefixes, one-bit
 * differences, long keys, all 256 single bytes. With a keyed hash
 * they must behave like any other keys.
 */
static void
test_adversarial(void **state)
{
	struct nmap *m = nmap_new(seq_key);
	char big[1024];
	uint32_t v;
	int i, j;

	memset(big, 'x', sizeof big);
	for (i = 0; i < 1000; i++) {
		big[sizeof big - 1] = (char)(i & 0xff);
		big[sizeof big - 2] = (char)(i >> 8);
		nmap_put(m, big, sizeof big, (uint32_t)i);
	}
	for (i = 0; i < 256; i++) {
		char c = (char)i;
		nmap_put(m, &c, 1, 5000u + (uint32_t)i);
	}
	/* Keys differing in a single bit in the middle. */
	for (i = 0; i < 64; i++) {
		char k[16];
		memset(k, 0, sizeof k);
		k[i / 8] = (char)(1 << (i % 8));
		nmap_put(m, k, sizeof k, 9000u + (uint32_t)i);
	}
	assert_int_equal(nmap_count(m), 1000 + 256 + 64);
	for (i = 0; i < 1000; i++) {
		big[sizeof big - 1] = (char)(i & 0xff);
		big[sizeof big - 2] = (char)(i >> 8);
		assert_int_equal(nmap_get(m, big, sizeof big, &v), 0);
		assert_int_equal(v, (uint32_t)i);
	}
	for (i = 0; i < 256; i++) {
		char c = (char)i;
		assert_int_equal(nmap_get(m, &c, 1, &v), 0);
		assert_int_equal(v, 5000u + (uint32_t)i);
	}
	for (j = 0; j < 64; j++) {
		char k[16];
		memset(k, 0, sizeof k);
		k[j / 8] = (char)(1 << (j % 8));
		assert_int_equal(nmap_get(m, k, sizeof k, &v), 0);
		assert_int_equal(v, 9000u + (uint32_t)j);
	}
	/* Long keys are counted in the memory figure. */
	assert_true(nmap_bytes(m) > 1000 * sizeof big);
	nmap_free(m);
}

/* Different map keys give different hashes for the same name. */
static void
test_key_matters(void **state)
{
	uint8_t k2[16];

	memcpy(k2, seq_key, 16);
	k2[15] ^= 1;
	assert_true(siphash24(seq_key, "control", 7) !=
	    siphash24(k2, "control", 7));
}

int
main(void)
{
	const struct CMUnitTest tests[] = {
		cmocka_unit_test(test_paper_vector),
		cmocka_unit_test(test_vs_openssl),
		cmocka_unit_test(test_basic),
		cmocka_unit_test(test_100k),
		cmocka_unit_test(test_model),
		cmocka_unit_test(test_adversarial),
		cmocka_unit_test(test_key_matters),
	};

	return cmocka_run_group_tests(tests, NULL, NULL);
}
