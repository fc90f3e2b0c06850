/*
 * sign.c: Standard Webhooks signatures, HMAC-SHA256 (RFC 2104; SHA-256
 * of FIPS 180-4) through OpenSSL's EVP_MAC interface; see sign.h. The
 * MAC is fed id, ".", timestamp, "." and the body in turn, so a 64 KiB
 * batch is never copied to be signed.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include <openssl/core_names.h>
#include <openssl/evp.h>

#include "stopcock/sign.h"
#include "stopcock/util.h"

/*
 * EVP_DecodeBlock wants a multiple of four characters and counts padding
 * as zero bytes, so pad first and trim after.
 */
int
sign_secret_key(const char *secret, unsigned char *key, size_t *keylen,
    char **cause)
{
	unsigned char buf[SIGN_KEY_MAX + 3];
	const char *b64;
	char *padded;
	size_t len, i, pad = 0;
	int n;

	if (strncmp(secret, "whsec_", 6) != 0) {
		*cause = xstrdup("secret must start with whsec_");
		return -1;
	}
	b64 = secret + 6;
	len = strlen(b64);
	if (len == 0 || len > (SIGN_KEY_MAX / 3) * 4) {
		*cause = xstrdup("secret has no key or a key that is too long");
		return -1;
	}
	for (i = 0; i < len; i++) {
		/* padding only at the end: "=" or "==" */
		if (b64[i] == '=' && (i + 2 < len ||
		    (i + 1 < len && b64[i + 1] != '='))) {
			*cause = xstrdup("secret is not valid base64");
			return -1;
		}
	}
	padded = xmalloc(len + 4);
	memcpy(padded, b64, len);
	while ((len % 4) != 0)
		padded[len++] = '=';
	padded[len] = '\0';
	for (i = len; i > 0 && padded[i - 1] == '='; i--)
		pad++;
	n = EVP_DecodeBlock(buf, (unsigned char *)padded, (int)len);
	free(padded);
	if (n < 0 || pad > 2 || (size_t)n < pad || (size_t)n - pad == 0 ||
	    (size_t)n - pad > SIGN_KEY_MAX) {
		*cause = xstrdup("secret is not valid base64");
		return -1;
	}
	*keylen = (size_t)n - pad;
	memcpy(key, buf, *keylen);
	return 0;
}

/* The raw MAC over id "." ts "." body; its length, or -1. */
static int
sign_mac(const unsigned char *key, size_t keylen, const char *id,
    size_t idlen, long long ts, const void *body, size_t len,
    unsigned char mac[EVP_MAX_MD_SIZE])
{
	EVP_MAC *m;
	EVP_MAC_CTX *ctx = NULL;
	OSSL_PARAM params[2];
	char tsbuf[32];
	size_t maclen = 0;
	int n, ok = 0;

	n = snprintf(tsbuf, sizeof tsbuf, ".%lld.", ts);
	if ((m = EVP_MAC_fetch(NULL, "HMAC", NULL)) == NULL)
		return -1;
	params[0] = OSSL_PARAM_construct_utf8_string(OSSL_MAC_PARAM_DIGEST,
	    (char *)"SHA256", 0);
	params[1] = OSSL_PARAM_construct_end();
	if ((ctx = EVP_MAC_CTX_new(m)) != NULL &&
	    EVP_MAC_init(ctx, key, keylen, params) == 1 &&
	    EVP_MAC_update(ctx, (const unsigned char *)id, idlen) == 1 &&
	    EVP_MAC_update(ctx, (const unsigned char *)tsbuf, (size_t)n) == 1 &&
	    EVP_MAC_update(ctx, body, len) == 1 &&
	    EVP_MAC_final(ctx, mac, &maclen, EVP_MAX_MD_SIZE) == 1)
		ok = 1;
	EVP_MAC_CTX_free(ctx);
	EVP_MAC_free(m);
	return ok && maclen == 32 ? (int)maclen : -1;
}

int
sign_make(const unsigned char *key, size_t keylen, const char *id,
    size_t idlen, long long ts, const void *body, size_t len, char *out,
    size_t outsize)
{
	unsigned char mac[EVP_MAX_MD_SIZE];
	int maclen, n;

	if (outsize < SIGN_SIG_MAX ||
	    (maclen = sign_mac(key, keylen, id, idlen, ts, body, len,
	    mac)) < 0)
		return -1;
	memcpy(out, "v1,", 3);
	n = EVP_EncodeBlock((unsigned char *)out + 3, mac, maclen);
	if (n < 0)
		return -1;
	out[3 + n] = '\0';
	return 0;
}

int
sign_check(const unsigned char *key, size_t keylen, const char *id,
    size_t idlen, long long ts, const void *body, size_t len,
    const char *sig, size_t siglen)
{
	char want[SIGN_SIG_MAX];

	if (sign_make(key, keylen, id, idlen, ts, body, len, want,
	    sizeof want) != 0)
		return 0;
	return timingsafe_eq(want, strlen(want), sig, siglen);
}
