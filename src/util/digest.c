/*
 * digest.c: SHA-256 as lowercase hex, the one spelling of the stable
 * identifiers (alert and pause webhook-ids) and of the checkpoint's
 * checksum. OpenSSL's EVP interface does the hashing.
 */
#include <stdio.h>

#include <openssl/evp.h>

#include "stopcock/util.h"

void
digest_sha256_hex(const void *p, size_t len, size_t nbytes, char *out)
{
	unsigned char md[EVP_MAX_MD_SIZE];
	unsigned int n, i;

	if (EVP_Digest(p, len, md, &n, EVP_sha256(), NULL) != 1 || n != 32)
		fatal("SHA-256 failed");	/* OpenSSL cannot hash: no state */
	if (nbytes > n)
		nbytes = n;
	for (i = 0; i < nbytes; i++)
		snprintf(out + 2 * i, 3, "%02x", md[i]);
	out[2 * nbytes] = '\0';
}
