/*
 * sign.h: the one implementation of the Standard Webhooks signing form
 * (HMAC-SHA256, RFC 2104 over FIPS 180-4's SHA-256). A secret is
 * "whsec_" + base64 of the key bytes; a signature is "v1," +
 * base64(HMAC-SHA256(key, id "." timestamp "." body)), the timestamp as
 * decimal unix seconds. webhook.c signs the daemon's outbound webhooks
 * with it and frame.c verifies the producers' batches with it, so the
 * two can never drift apart. Pure: no I/O, no clock.
 */
#ifndef STOPCOCK_SIGN_H
#define STOPCOCK_SIGN_H

#include <stddef.h>

#define SIGN_KEY_MAX	256	/* bytes of a decoded secret */
/* "v1," + base64 of a 32-byte MAC (44 characters) + NUL */
#define SIGN_SIG_MAX	(3 + 44 + 1)

/* Decode "whsec_" + base64 into key (SIGN_KEY_MAX bytes); 0, or -1 with
 * *cause. */
int	sign_secret_key(const char *secret, unsigned char *key, size_t *keylen,
	    char **cause);
/* "v1,<base64>" into out (at least SIGN_SIG_MAX bytes); 0 or -1. */
int	sign_make(const unsigned char *key, size_t keylen, const char *id,
	    size_t idlen, long long ts, const void *body, size_t len,
	    char *out, size_t outsize);
/* 1 when sig[0..siglen) is the signature sign_make gives, compared in
 * constant time; 0 otherwise. */
int	sign_check(const unsigned char *key, size_t keylen, const char *id,
	    size_t idlen, long long ts, const void *body, size_t len,
	    const char *sig, size_t siglen);

#endif
