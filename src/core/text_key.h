/*
 * text_key.h
 *		Keys of text keys: the int64 each text key becomes inside a model,
 *		and the keyed hashes behind it and behind the fit's in-memory
 *		indexes.
 */
#ifndef AFF_TEXT_KEY_H
#define AFF_TEXT_KEY_H

#include "aff_core.h"

/*
 * A 128-bit hash key as two little-endian 64-bit words (k0, k1).  The key
 * { 0, 0 } selects the hash of version 1.1 models (unkeyed); every fit
 * since draws a random non-zero key per model.
 */
typedef struct AffHashKey
{
	uint64_t	k[2];
} AffHashKey;

extern uint64_t aff_siphash(const uint64_t key[2], const void *data, size_t len,
							int c_rounds, int d_rounds);
extern uint64_t aff_siphash24(const uint64_t key[2], const void *data, size_t len);
extern uint64_t aff_siphash13_u64(const uint64_t key[2], uint64_t x);
extern int64_t aff_text_key(const uint64_t key[2], const char *s, size_t len);
extern int	aff_hash_key_is_zero(const uint64_t key[2]);
extern AffStatus aff_check_text_keys(const uint64_t key[2], const int64_t *keys,
									 int64_t n, const int64_t *off,
									 const char *text, uint64_t len,
									 const char *what, AffError *err);

#endif							/* AFF_TEXT_KEY_H */
