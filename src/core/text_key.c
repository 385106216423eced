/*
 * text_key.c
 *		The int64 key of a text key, and the keyed hash behind it.
 *
 * A model with text keys sorts and searches int64 keys like a bigint model
 * and keeps each text beside its key.  Since version 1.2 the key of a text
 * is SipHash-2-4 (Aumasson and Bernstein, "SipHash: a fast short-input
 * PRF", 2012) of its bytes under a random 128-bit key drawn for each model
 * and stored in its header: without that key nobody can choose texts whose
 * keys collide, so neither a fit nor the hash tables built on the keys can
 * be steered.  A collision under the model's key happens only by chance
 * (about n^2 / 2^65 for n texts); the fit then draws another key.  The
 * all-zero key stands for the unkeyed hash of version 1.1 models, which
 * therefore keep validating and serving as before.
 *
 * The same function with fewer rounds (SipHash-1-3) hashes int64 keys for
 * the matrix build's item index, under a key the caller draws per build.
 */
#include "text_key.h"

#include <string.h>

#include "model_format.h"

#define ROTL(x, b) (uint64_t) (((x) << (b)) | ((x) >> (64 - (b))))

#define SIPROUND \
	do { \
		v0 += v1; v1 = ROTL(v1, 13); v1 ^= v0; v0 = ROTL(v0, 32); \
		v2 += v3; v3 = ROTL(v3, 16); v3 ^= v2; \
		v0 += v3; v3 = ROTL(v3, 21); v3 ^= v0; \
		v2 += v1; v1 = ROTL(v1, 17); v1 ^= v2; v2 = ROTL(v2, 32); \
	} while (0)

/*
 * SipHash-c-d of data[0..len) under key (k0, k1), the words read little-
 * endian as the paper specifies.  c_rounds per message word, d_rounds at
 * the end: 2 and 4 for text keys, 1 and 3 for in-memory indexes.
 */
uint64_t
aff_siphash(const uint64_t key[2], const void *data, size_t len,
			int c_rounds, int d_rounds)
{
	const uint8_t *p = data;
	uint64_t	v0 = key[0] ^ 0x736f6d6570736575ULL;
	uint64_t	v1 = key[1] ^ 0x646f72616e646f6dULL;
	uint64_t	v2 = key[0] ^ 0x6c7967656e657261ULL;
	uint64_t	v3 = key[1] ^ 0x7465646279746573ULL;
	uint64_t	m;
	size_t		left = len;
	int			r;

	while (left >= 8)
	{
		memcpy(&m, p, 8);		/* the format is little-endian only */
		v3 ^= m;
		for (r = 0; r < c_rounds; r++)
			SIPROUND;
		v0 ^= m;
		p += 8;
		left -= 8;
	}
	m = 0;
	memcpy(&m, p, left);
	m |= (uint64_t) len << 56;
	v3 ^= m;
	for (r = 0; r < c_rounds; r++)
		SIPROUND;
	v0 ^= m;
	v2 ^= 0xff;
	for (r = 0; r < d_rounds; r++)
		SIPROUND;
	return v0 ^ v1 ^ v2 ^ v3;
}

/* SipHash-2-4, the variant with published test vectors. */
uint64_t
aff_siphash24(const uint64_t key[2], const void *data, size_t len)
{
	return aff_siphash(key, data, len, 2, 4);
}

/*
 * SipHash-1-3 of one 64-bit word (the message x, little-endian, 8 bytes),
 * for hash tables of int64 keys; aff_siphash(key, &x, 8, 1, 3) unrolled.
 */
uint64_t
aff_siphash13_u64(const uint64_t key[2], uint64_t x)
{
	uint64_t	v0 = key[0] ^ 0x736f6d6570736575ULL;
	uint64_t	v1 = key[1] ^ 0x646f72616e646f6dULL;
	uint64_t	v2 = key[0] ^ 0x6c7967656e657261ULL;
	uint64_t	v3 = key[1] ^ 0x7465646279746573ULL;
	const uint64_t last = (uint64_t) 8 << 56;

	v3 ^= x;
	SIPROUND;
	v0 ^= x;
	v3 ^= last;
	SIPROUND;
	v0 ^= last;
	v2 ^= 0xff;
	SIPROUND;
	SIPROUND;
	SIPROUND;
	return v0 ^ v1 ^ v2 ^ v3;
}

/* True when key is the all-zero key of version 1.1 models. */
int
aff_hash_key_is_zero(const uint64_t key[2])
{
	return key[0] == 0 && key[1] == 0;
}

/*
 * The int64 key of a text key under a model's hash key: SipHash-2-4, or
 * for the zero key the 1.1 hash (a multiply-xorshift mix of aff_hash,
 * which anybody can invert; kept only so that 1.1 values stay valid).
 */
int64_t
aff_text_key(const uint64_t key[2], const char *s, size_t len)
{
	uint64_t	h;

	if (!aff_hash_key_is_zero(key))
		return (int64_t) aff_siphash24(key, s, len);
	h = aff_hash((const uint8_t *) s, len, 0x6a09e667f3bcc908ULL);
	h ^= h >> 33;
	h *= 0xff51afd7ed558ccdULL;
	h ^= h >> 33;
	return (int64_t) h;
}

/*
 * Validate one side's text dictionary: offsets run from 0 to len without
 * decreasing, and every text hashes to its key under the model's key.
 */
AffStatus
aff_check_text_keys(const uint64_t key[2], const int64_t *keys, int64_t n,
					const int64_t *off, const char *text, uint64_t len,
					const char *what, AffError *err)
{
	int64_t		i;

	if (off[0] != 0 || (uint64_t) off[n] != len)
	{
		aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
		return aff_detail(err, "Text key offsets run from %llu to %llu.",
						  (unsigned long long) off[0], (unsigned long long) off[n]);
	}
	for (i = 0; i < n; i++)
	{
		if (off[i + 1] < off[i] || (uint64_t) off[i + 1] > len)
		{
			aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
			return aff_detail(err, "Text key offsets decrease or run past the end at index %llu.",
							  (unsigned long long) i);
		}
		if (aff_text_key(key, text + off[i], (size_t) (off[i + 1] - off[i])) != keys[i])
		{
			aff_fail(err, AFF_ERR_CORRUPT, "invalid affinity.model value");
			return aff_detail(err, "The text of %s key %lld does not match its hash.",
							  what, (long long) i);
		}
	}
	return AFF_OK;
}
