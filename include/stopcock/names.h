/*
 * names.h: keyed hashing and a string-keyed table. Keys are hashed with
 * SipHash-2-4 under a per-process random key so that hostile names
 * cannot pile into one bucket (Aumasson & Bernstein 2012).
 */
#ifndef STOPCOCK_NAMES_H
#define STOPCOCK_NAMES_H

#include <stddef.h>
#include <stdint.h>

uint64_t siphash24(const uint8_t key[16], const void *, size_t);

/* Open-addressing map from a string (copied in) to a uint32_t. */
struct nmap;

struct nmap	*nmap_new(const uint8_t key[16]);
void		 nmap_free(struct nmap *);
/* 0 and *value set when present, -1 when absent. */
int		 nmap_get(const struct nmap *, const char *, size_t, uint32_t *);
/* Insert or overwrite. */
void		 nmap_put(struct nmap *, const char *, size_t, uint32_t);
/* 0 when removed, -1 when absent. */
int		 nmap_del(struct nmap *, const char *, size_t);
size_t		 nmap_count(const struct nmap *);
/* Bytes held, for memory accounting. */
size_t		 nmap_bytes(const struct nmap *);

#endif
