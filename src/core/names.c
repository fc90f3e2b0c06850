/*
 * names.c: keyed hashing and the string table the engine uses to find an
 * experiment, arm or metric from the name in a record. Names come from
 * the network, so the hash is SipHash-2-4 under a per-process random key
 * (Aumasson & Bernstein, "SipHash: a fast short-input PRF", INDOCRYPT
 * 2012): without the key nobody can choose names that collide. The table
 * is open addressing with linear probing and backward-shift deletion (no
 * tombstones, so a churn of inserts and deletes never degrades probes),
 * grown to twice its size past 70% load. Each slot keeps the full 64-bit
 * hash so that most mismatches are decided without touching the key.
 */
#include <stdlib.h>
#include <string.h>

#include "stopcock/names.h"
#include "stopcock/util.h"

#define NMAP_MIN_SLOTS 16
/* What malloc keeps beside each key copy, for nmap_bytes (glibc: 16). */
#define NMAP_ALLOC_OVERHEAD 16

struct nmap_slot {
	char		*key;		/* NULL: empty */
	uint64_t	 hash;
	uint32_t	 len;
	uint32_t	 value;
};

struct nmap {
	uint8_t		 key[16];
	struct nmap_slot *slots;
	size_t		 mask;		/* slots - 1, a power of two */
	size_t		 count;
	size_t		 keybytes;
};

static inline uint64_t
names_rotl(uint64_t x, int b)
{
	return (x << b) | (x >> (64 - b));
}

static inline uint64_t
names_le64(const uint8_t *p)
{
	return (uint64_t)p[0] | (uint64_t)p[1] << 8 | (uint64_t)p[2] << 16 |
	    (uint64_t)p[3] << 24 | (uint64_t)p[4] << 32 |
	    (uint64_t)p[5] << 40 | (uint64_t)p[6] << 48 |
	    (uint64_t)p[7] << 56;
}

/* One SipRound (paper, section 2): add-rotate-xor on four 64-bit words. */
#define SIPROUND do {							\
	v0 += v1; v1 = names_rotl(v1, 13); v1 ^= v0;			\
	v0 = names_rotl(v0, 32);					\
	v2 += v3; v3 = names_rotl(v3, 16); v3 ^= v2;			\
	v0 += v3; v3 = names_rotl(v3, 21); v3 ^= v0;			\
	v2 += v1; v1 = names_rotl(v1, 17); v1 ^= v2;			\
	v2 = names_rotl(v2, 32);					\
} while (0)

uint64_t
siphash24(const uint8_t key[16], const void *data, size_t len)
{
	const uint8_t *p = data, *end;
	uint64_t k0 = names_le64(key), k1 = names_le64(key + 8);
	uint64_t v0 = k0 ^ 0x736f6d6570736575ULL;	/* "somepseudorandomlygeneratedbytes" */
	uint64_t v1 = k1 ^ 0x646f72616e646f6dULL;
	uint64_t v2 = k0 ^ 0x6c7967656e657261ULL;
	uint64_t v3 = k1 ^ 0x7465646279746573ULL;
	uint64_t m, b = (uint64_t)len << 56;
	size_t left = len & 7;

	for (end = p + (len - left); p < end; p += 8) {
		m = names_le64(p);
		v3 ^= m;
		SIPROUND;
		SIPROUND;
		v0 ^= m;
	}
	/* Last block: the remaining bytes, length mod 256 in the top byte. */
	switch (left) {
	case 7: b |= (uint64_t)p[6] << 48; /* FALLTHROUGH */
	case 6: b |= (uint64_t)p[5] << 40; /* FALLTHROUGH */
	case 5: b |= (uint64_t)p[4] << 32; /* FALLTHROUGH */
	case 4: b |= (uint64_t)p[3] << 24; /* FALLTHROUGH */
	case 3: b |= (uint64_t)p[2] << 16; /* FALLTHROUGH */
	case 2: b |= (uint64_t)p[1] << 8; /* FALLTHROUGH */
	case 1: b |= (uint64_t)p[0]; break;
	case 0: break;
	}
	v3 ^= b;
	SIPROUND;
	SIPROUND;
	v0 ^= b;
	v2 ^= 0xff;
	SIPROUND;
	SIPROUND;
	SIPROUND;
	SIPROUND;
	return v0 ^ v1 ^ v2 ^ v3;
}

struct nmap *
nmap_new(const uint8_t key[16])
{
	struct nmap *m;

	m = xcalloc(1, sizeof *m);
	memcpy(m->key, key, sizeof m->key);
	m->slots = xcalloc(NMAP_MIN_SLOTS, sizeof *m->slots);
	m->mask = NMAP_MIN_SLOTS - 1;
	return m;
}

void
nmap_free(struct nmap *m)
{
	size_t i;

	if (m == NULL)
		return;
	for (i = 0; i <= m->mask; i++)
		free(m->slots[i].key);
	free(m->slots);
	free(m);
}

/* Slot holding the key, or the empty slot where it would go. */
static size_t
nmap_find(const struct nmap *m, uint64_t h, const char *s, size_t len)
{
	const struct nmap_slot *sl;
	size_t i = (size_t)h & m->mask;

	for (;; i = (i + 1) & m->mask) {
		sl = &m->slots[i];
		if (sl->key == NULL)
			return i;
		if (sl->hash == h && sl->len == len &&
		    memcmp(sl->key, s, len) == 0)
			return i;
	}
}

static void
nmap_grow(struct nmap *m)
{
	struct nmap_slot *old = m->slots;
	size_t i, j, oldn = m->mask + 1;

	m->slots = xcalloc(oldn * 2, sizeof *m->slots);
	m->mask = oldn * 2 - 1;
	for (i = 0; i < oldn; i++) {
		if (old[i].key == NULL)
			continue;
		for (j = (size_t)old[i].hash & m->mask; m->slots[j].key != NULL;
		    j = (j + 1) & m->mask)
			;
		m->slots[j] = old[i];
	}
	free(old);
}

int
nmap_get(const struct nmap *m, const char *s, size_t len, uint32_t *value)
{
	size_t i;

	i = nmap_find(m, siphash24(m->key, s, len), s, len);
	if (m->slots[i].key == NULL)
		return -1;
	if (value != NULL)
		*value = m->slots[i].value;
	return 0;
}

void
nmap_put(struct nmap *m, const char *s, size_t len, uint32_t value)
{
	struct nmap_slot *sl;
	uint64_t h;
	size_t i;

	if (len > UINT32_MAX)
		fatal("nmap: key of %zu bytes", len);
	h = siphash24(m->key, s, len);
	i = nmap_find(m, h, s, len);
	if (m->slots[i].key != NULL) {
		m->slots[i].value = value;
		return;
	}
	/* Keep load at or below 0.7 after this insert. */
	if ((m->count + 1) * 10 > (m->mask + 1) * 7) {
		nmap_grow(m);
		i = nmap_find(m, h, s, len);
	}
	sl = &m->slots[i];
	sl->key = xmalloc(len + 1);
	memcpy(sl->key, s, len);
	sl->key[len] = '\0';
	sl->hash = h;
	sl->len = (uint32_t)len;
	sl->value = value;
	m->count++;
	m->keybytes += len + 1 + NMAP_ALLOC_OVERHEAD;
}

/*
 * Backward-shift deletion: walk the cluster after the hole and move back
 * every entry whose home slot does not lie cyclically in (hole, j], so no
 * probe sequence ever crosses an empty slot it should not.
 */
int
nmap_del(struct nmap *m, const char *s, size_t len)
{
	size_t i, j, home;

	i = nmap_find(m, siphash24(m->key, s, len), s, len);
	if (m->slots[i].key == NULL)
		return -1;
	m->keybytes -= m->slots[i].len + 1 + NMAP_ALLOC_OVERHEAD;
	free(m->slots[i].key);
	m->slots[i].key = NULL;
	m->count--;
	for (j = (i + 1) & m->mask; m->slots[j].key != NULL;
	    j = (j + 1) & m->mask) {
		home = (size_t)m->slots[j].hash & m->mask;
		/* Stays if home is in (i, j] going round the table. */
		if (((j - home) & m->mask) < ((j - i) & m->mask))
			continue;
		m->slots[i] = m->slots[j];
		m->slots[j].key = NULL;
		i = j;
	}
	return 0;
}

size_t
nmap_count(const struct nmap *m)
{
	return m->count;
}

size_t
nmap_bytes(const struct nmap *m)
{
	return sizeof *m + (m->mask + 1) * sizeof *m->slots + m->keybytes;
}
