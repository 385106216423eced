/*
 * digest.h
 *		SHA-256 (FIPS 180-4), the content digest of a model value, and a
 *		base64 codec (RFC 4648, standard alphabet with padding) over size_t.
 *
 * The content digest names a value in the serving cache: unlike the
 * checksum (a fast hash that detects damage), a value with a chosen digest
 * cannot be made, so two values with equal digests have equal content.
 */
#ifndef AFF_DIGEST_H
#define AFF_DIGEST_H

#include "aff_core.h"

#define AFF_SHA256_BYTES	32

typedef struct AffSha256
{
	uint32_t	state[8];
	uint64_t	length;			/* bytes hashed so far */
	uint8_t		block[64];
	size_t		used;			/* bytes waiting in block */
} AffSha256;

extern void aff_sha256_init(AffSha256 *s);
extern void aff_sha256_update(AffSha256 *s, const void *data, size_t len);
extern void aff_sha256_final(AffSha256 *s, uint8_t out[AFF_SHA256_BYTES]);
extern void aff_sha256(const void *data, size_t len, uint8_t out[AFF_SHA256_BYTES]);

/*
 * The compression function is chosen at the first hash: the x86 SHA
 * extensions when the CPU has them ("sha-ni"), portable C otherwise
 * ("portable"); both give the same digests.  aff_sha256_implementation
 * names the one in use; aff_sha256_force_portable(1) makes every later
 * hash use the portable one (for tests and measurements; not while
 * another thread hashes), aff_sha256_force_portable(0) restores the
 * choice; it returns the name of the one now in use.
 */
extern const char *aff_sha256_implementation(void);
extern const char *aff_sha256_force_portable(int portable);

/*
 * The content digest of a model value of len bytes (len >= the header):
 * SHA-256 of every byte after the length word, with the checksum and the
 * content_digest fields taken as zero.
 */
extern void aff_model_digest(const uint8_t *buf, uint64_t len,
							 uint8_t out[AFF_SHA256_BYTES]);

/*
 * The same digest, hashing the content in chunks of AFF_POLL_BYTES with a
 * call of poll (may be NULL) between them: AFF_ERR_CANCELLED when it asks
 * to stop.
 */
extern AffStatus aff_model_digest_polled(const uint8_t *buf, uint64_t len,
										 uint8_t out[AFF_SHA256_BYTES],
										 AffPollFn poll, void *poll_arg,
										 AffError *err);

/* 1 when the value's content_digest field is all zero (not set). */
extern int	aff_model_digest_unset(const uint8_t *buf);

/*
 * Write the content digest into the value's header and recompute the
 * checksum.  The fingerprint is left alone.
 */
extern void aff_model_seal(uint8_t *buf, uint64_t len);

/* aff_model_seal polling between chunks; on a cancel the value is unsealed. */
extern AffStatus aff_model_seal_polled(uint8_t *buf, uint64_t len, AffPollFn poll,
									   void *poll_arg, AffError *err);

/* Characters of the base64 form of n bytes, or 0 when that overflows size_t. */
extern size_t aff_b64_encoded_len(size_t n);

/* Encode n bytes into out (aff_b64_encoded_len(n) bytes, no terminator). */
extern void aff_b64_encode(const uint8_t *in, size_t n, char *out);

/* The same text, encoded in chunks with a call of poll (may be NULL) between them. */
extern AffStatus aff_b64_encode_polled(const uint8_t *in, size_t n, char *out,
									   AffPollFn poll, void *poll_arg, AffError *err);

/* Upper bound of the bytes that n characters of base64 decode to. */
extern size_t aff_b64_decoded_max(size_t n);

/*
 * Decode n characters of base64 into out (room for aff_b64_decoded_max(n)
 * bytes), skipping ASCII white space.  Returns the byte count, or -1 on a
 * character outside the alphabet, bad padding or a truncated quantum; then
 * *bad_at is the offset of the offending character.
 */
extern int64_t aff_b64_decode(const char *in, size_t n, uint8_t *out, size_t *bad_at);

/*
 * aff_b64_decode with a call of poll (may be NULL) every few megabytes of
 * text: AFF_B64_CANCELLED when it asks to stop.
 */
#define AFF_B64_CANCELLED	((int64_t) -2)
extern int64_t aff_b64_decode_polled(const char *in, size_t n, uint8_t *out, size_t *bad_at,
									 AffPollFn poll, void *poll_arg);

#endif							/* AFF_DIGEST_H */
