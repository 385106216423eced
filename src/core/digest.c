/*
 * digest.c
 *		SHA-256 after FIPS 180-4, the content digest of a model value, and
 *		the base64 codec of the value's text form.
 *
 * Plain C with no PostgreSQL header, so that tests can check the hash
 * against the standard's vectors outside the server.  The codec works on
 * size_t lengths: a model's text form is up to 4/3 of AFF_MAX_MODEL_BYTES,
 * past what PostgreSQL's int-sized base64 helpers can size.
 */
#include "digest.h"

#include <string.h>

#include "model_format.h"

/* FIPS 180-4, 4.2.2: the first 32 bits of the fractional parts of the cube roots of the first 64 primes. */
static const uint32_t K256[64] = {
	0x428a2f98, 0x71374491, 0xb5c0fbcf, 0xe9b5dba5, 0x3956c25b, 0x59f111f1, 0x923f82a4, 0xab1c5ed5,
	0xd807aa98, 0x12835b01, 0x243185be, 0x550c7dc3, 0x72be5d74, 0x80deb1fe, 0x9bdc06a7, 0xc19bf174,
	0xe49b69c1, 0xefbe4786, 0x0fc19dc6, 0x240ca1cc, 0x2de92c6f, 0x4a7484aa, 0x5cb0a9dc, 0x76f988da,
	0x983e5152, 0xa831c66d, 0xb00327c8, 0xbf597fc7, 0xc6e00bf3, 0xd5a79147, 0x06ca6351, 0x14292967,
	0x27b70a85, 0x2e1b2138, 0x4d2c6dfc, 0x53380d13, 0x650a7354, 0x766a0abb, 0x81c2c92e, 0x92722c85,
	0xa2bfe8a1, 0xa81a664b, 0xc24b8b70, 0xc76c51a3, 0xd192e819, 0xd6990624, 0xf40e3585, 0x106aa070,
	0x19a4c116, 0x1e376c08, 0x2748774c, 0x34b0bcb5, 0x391c0cb3, 0x4ed8aa4a, 0x5b9cca4f, 0x682e6ff3,
	0x748f82ee, 0x78a5636f, 0x84c87814, 0x8cc70208, 0x90befffa, 0xa4506ceb, 0xbef9a3f7, 0xc67178f2
};

#define ROTR(x, n)	(((x) >> (n)) | ((x) << (32 - (n))))

/* Process one 64-byte block (FIPS 180-4, 6.2.2). */
static void
sha256_block(uint32_t *st, const uint8_t *p)
{
	uint32_t	w[64];
	uint32_t	a,
				b,
				c,
				d,
				e,
				f,
				g,
				h;
	int			t;

	for (t = 0; t < 16; t++)
		w[t] = ((uint32_t) p[4 * t] << 24) | ((uint32_t) p[4 * t + 1] << 16) |
			((uint32_t) p[4 * t + 2] << 8) | (uint32_t) p[4 * t + 3];
	for (t = 16; t < 64; t++)
	{
		uint32_t	s0 = ROTR(w[t - 15], 7) ^ ROTR(w[t - 15], 18) ^ (w[t - 15] >> 3);
		uint32_t	s1 = ROTR(w[t - 2], 17) ^ ROTR(w[t - 2], 19) ^ (w[t - 2] >> 10);

		w[t] = w[t - 16] + s0 + w[t - 7] + s1;
	}
	a = st[0];
	b = st[1];
	c = st[2];
	d = st[3];
	e = st[4];
	f = st[5];
	g = st[6];
	h = st[7];
	for (t = 0; t < 64; t++)
	{
		uint32_t	t1 = h + (ROTR(e, 6) ^ ROTR(e, 11) ^ ROTR(e, 25)) +
			((e & f) ^ (~e & g)) + K256[t] + w[t];
		uint32_t	t2 = (ROTR(a, 2) ^ ROTR(a, 13) ^ ROTR(a, 22)) +
			((a & b) ^ (a & c) ^ (b & c));

		h = g;
		g = f;
		f = e;
		e = d + t1;
		d = c;
		c = b;
		b = a;
		a = t1 + t2;
	}
	st[0] += a;
	st[1] += b;
	st[2] += c;
	st[3] += d;
	st[4] += e;
	st[5] += f;
	st[6] += g;
	st[7] += h;
}

/* Start a hash with the initial value of FIPS 180-4, 5.3.3. */
void
aff_sha256_init(AffSha256 *s)
{
	static const uint32_t iv[8] = {
		0x6a09e667, 0xbb67ae85, 0x3c6ef372, 0xa54ff53a,
		0x510e527f, 0x9b05688c, 0x1f83d9ab, 0x5be0cd19
	};

	memcpy(s->state, iv, sizeof(iv));
	s->length = 0;
	s->used = 0;
}

/* Hash len more bytes. */
void
aff_sha256_update(AffSha256 *s, const void *data, size_t len)
{
	const uint8_t *p = data;

	s->length += len;
	if (s->used > 0)
	{
		size_t		take = 64 - s->used;

		if (take > len)
			take = len;
		memcpy(s->block + s->used, p, take);
		s->used += take;
		p += take;
		len -= take;
		if (s->used < 64)
			return;
		sha256_block(s->state, s->block);
		s->used = 0;
	}
	while (len >= 64)
	{
		sha256_block(s->state, p);
		p += 64;
		len -= 64;
	}
	memcpy(s->block, p, len);
	s->used = len;
}

/* Pad (FIPS 180-4, 5.1.1) and write the 32-byte digest, big-endian words. */
void
aff_sha256_final(AffSha256 *s, uint8_t out[AFF_SHA256_BYTES])
{
	uint64_t	bits = s->length * 8;
	int			i;

	s->block[s->used++] = 0x80;
	if (s->used > 56)
	{
		memset(s->block + s->used, 0, 64 - s->used);
		sha256_block(s->state, s->block);
		s->used = 0;
	}
	memset(s->block + s->used, 0, 56 - s->used);
	for (i = 0; i < 8; i++)
		s->block[56 + i] = (uint8_t) (bits >> (56 - 8 * i));
	sha256_block(s->state, s->block);
	for (i = 0; i < 8; i++)
	{
		out[4 * i] = (uint8_t) (s->state[i] >> 24);
		out[4 * i + 1] = (uint8_t) (s->state[i] >> 16);
		out[4 * i + 2] = (uint8_t) (s->state[i] >> 8);
		out[4 * i + 3] = (uint8_t) s->state[i];
	}
}

/* One-shot SHA-256 of len bytes. */
void
aff_sha256(const void *data, size_t len, uint8_t out[AFF_SHA256_BYTES])
{
	AffSha256	s;

	aff_sha256_init(&s);
	aff_sha256_update(&s, data, len);
	aff_sha256_final(&s, out);
}

/* Ask poll (when there is one) whether to stop; the cancel error if so. */
static AffStatus
digest_poll(AffPollFn poll, void *poll_arg, AffError *err)
{
	if (poll != NULL && poll(poll_arg))
		return aff_fail(err, AFF_ERR_CANCELLED, "hashing the model was cancelled");
	return AFF_OK;
}

/*
 * The content digest: SHA-256 of bytes 4 .. len of the value with the
 * checksum and content_digest fields read as zeros (the checksum depends
 * on the digest, and the digest cannot cover itself).  The content after
 * the header goes in chunks of AFF_POLL_BYTES with a poll between them
 * (poll may be NULL); SHA-256 is a stream, so the digest is the one-pass
 * digest.
 */
AffStatus
aff_model_digest_polled(const uint8_t *buf, uint64_t len, uint8_t out[AFF_SHA256_BYTES],
						AffPollFn poll, void *poll_arg, AffError *err)
{
	const size_t cs = offsetof(AffModelHeader, checksum);
	const size_t dg = offsetof(AffModelHeader, content_digest);
	static const uint8_t zeros[AFF_SHA256_BYTES] = {0};
	const uint8_t *p;
	uint64_t	n;
	AffSha256	s;

	_Static_assert(offsetof(AffModelHeader, checksum) < offsetof(AffModelHeader, content_digest),
				   "the checksum field comes before the digest field");
	aff_sha256_init(&s);
	aff_sha256_update(&s, buf + 4, cs - 4);
	aff_sha256_update(&s, zeros, 8);
	aff_sha256_update(&s, buf + cs + 8, dg - cs - 8);
	aff_sha256_update(&s, zeros, AFF_SHA256_BYTES);
	p = buf + dg + AFF_SHA256_BYTES;
	n = len - dg - AFF_SHA256_BYTES;
	while (n > AFF_POLL_BYTES)
	{
		aff_sha256_update(&s, p, AFF_POLL_BYTES);
		p += AFF_POLL_BYTES;
		n -= AFF_POLL_BYTES;
		if (digest_poll(poll, poll_arg, err) != AFF_OK)
			return err->status;
	}
	aff_sha256_update(&s, p, n);
	aff_sha256_final(&s, out);
	return AFF_OK;
}

/* The content digest in one go. */
void
aff_model_digest(const uint8_t *buf, uint64_t len, uint8_t out[AFF_SHA256_BYTES])
{
	AffError	err;

	(void) aff_model_digest_polled(buf, len, out, NULL, NULL, &err);
}

/* 1 when the value's content_digest is all zero. */
int
aff_model_digest_unset(const uint8_t *buf)
{
	const uint8_t *d = buf + offsetof(AffModelHeader, content_digest);
	int			i;

	for (i = 0; i < AFF_SHA256_BYTES; i++)
		if (d[i] != 0)
			return 0;
	return 1;
}

/*
 * Store the content digest and the checksum that covers it, polling
 * between chunks of both (poll may be NULL).  On a cancel the value is
 * left unsealed.
 */
AffStatus
aff_model_seal_polled(uint8_t *buf, uint64_t len, AffPollFn poll, void *poll_arg,
					  AffError *err)
{
	uint8_t		d[AFF_SHA256_BYTES];
	uint64_t	c;

	if (aff_model_digest_polled(buf, len, d, poll, poll_arg, err) != AFF_OK)
		return err->status;
	memcpy(buf + offsetof(AffModelHeader, content_digest), d, AFF_SHA256_BYTES);
	if (aff_model_checksum_polled(buf, len, poll, poll_arg, &c, err) != AFF_OK)
		return err->status;
	memcpy(buf + offsetof(AffModelHeader, checksum), &c, 8);
	return AFF_OK;
}

/* Seal the value in one go. */
void
aff_model_seal(uint8_t *buf, uint64_t len)
{
	AffError	err;

	(void) aff_model_seal_polled(buf, len, NULL, NULL, &err);
}

static const char b64_alphabet[] =
"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";

/* 4 characters per started group of 3 bytes; 0 when that overflows. */
size_t
aff_b64_encoded_len(size_t n)
{
	size_t		groups = n / 3 + (n % 3 != 0);

	if (groups > SIZE_MAX / 4)
		return 0;
	return groups * 4;
}

/*
 * Bytes of input the codec handles between two polls: a multiple of 3, so
 * each chunk but the last encodes to whole groups without padding.
 */
#define B64_CHUNK	((size_t) (AFF_POLL_BYTES / 8) * 3)

/*
 * aff_b64_encode in chunks of B64_CHUNK bytes with a poll between them
 * (poll may be NULL); the text is the one-pass text.
 */
AffStatus
aff_b64_encode_polled(const uint8_t *in, size_t n, char *out, AffPollFn poll, void *poll_arg,
					  AffError *err)
{
	while (n > B64_CHUNK)
	{
		aff_b64_encode(in, B64_CHUNK, out);
		in += B64_CHUNK;
		out += B64_CHUNK / 3 * 4;
		n -= B64_CHUNK;
		if (digest_poll(poll, poll_arg, err) != AFF_OK)
			return err->status;
	}
	aff_b64_encode(in, n, out);
	return AFF_OK;
}

/* RFC 4648, section 4, with '=' padding and no line breaks. */
void
aff_b64_encode(const uint8_t *in, size_t n, char *out)
{
	size_t		i;

	for (i = 0; i + 3 <= n; i += 3)
	{
		uint32_t	v = ((uint32_t) in[i] << 16) | ((uint32_t) in[i + 1] << 8) | in[i + 2];

		*out++ = b64_alphabet[v >> 18];
		*out++ = b64_alphabet[(v >> 12) & 63];
		*out++ = b64_alphabet[(v >> 6) & 63];
		*out++ = b64_alphabet[v & 63];
	}
	if (n - i == 1)
	{
		uint32_t	v = (uint32_t) in[i] << 16;

		*out++ = b64_alphabet[v >> 18];
		*out++ = b64_alphabet[(v >> 12) & 63];
		*out++ = '=';
		*out++ = '=';
	}
	else if (n - i == 2)
	{
		uint32_t	v = ((uint32_t) in[i] << 16) | ((uint32_t) in[i + 1] << 8);

		*out++ = b64_alphabet[v >> 18];
		*out++ = b64_alphabet[(v >> 12) & 63];
		*out++ = b64_alphabet[(v >> 6) & 63];
		*out++ = '=';
	}
}

/* 3 bytes per started group of 4 characters (white space counts too). */
size_t
aff_b64_decoded_max(size_t n)
{
	return (n / 4 + 1) * 3;
}

/* Sextet of each character, -1 outside the alphabet (filled on first use). */
static int8_t b64_table[256];
static int	b64_table_ready = 0;

static void
b64_fill_table(void)
{
	int			i;

	memset(b64_table, -1, sizeof(b64_table));
	for (i = 0; i < 64; i++)
		b64_table[(unsigned char) b64_alphabet[i]] = (int8_t) i;
	b64_table_ready = 1;
}

/*
 * Decode, skipping white space, in one go.  Padding ('=') may only close the last
 * group of four, as one or two characters; nothing but white space may
 * follow it; the characters must form whole groups of four.
 */
int64_t
aff_b64_decode(const char *in, size_t n, uint8_t *out, size_t *bad_at)
{
	return aff_b64_decode_polled(in, n, out, bad_at, NULL, NULL);
}

/*
 * aff_b64_decode with a poll every B64_CHUNK characters or so (poll may be
 * NULL); AFF_B64_CANCELLED when it asks to stop.
 */
int64_t
aff_b64_decode_polled(const char *in, size_t n, uint8_t *out, size_t *bad_at,
					  AffPollFn poll, void *poll_arg)
{
	uint8_t    *o = out;
	uint32_t	acc = 0;
	int			held = 0;		/* sextets in acc */
	int			pad = 0;
	size_t		i;
	size_t		next_poll = B64_CHUNK;

	if (!b64_table_ready)
		b64_fill_table();		/* idempotent: a race only fills it twice */
	for (i = 0; i < n; i++)
	{
		unsigned char c = (unsigned char) in[i];
		int			v;

		if (i >= next_poll)
		{
			if (poll != NULL && poll(poll_arg))
				return AFF_B64_CANCELLED;
			next_poll = i + B64_CHUNK;
		}

		/* fast path: four alphabet characters at a group boundary */
		if (held == 0 && pad == 0 && i + 4 <= n)
		{
			int			a = b64_table[(unsigned char) in[i]];
			int			b = b64_table[(unsigned char) in[i + 1]];
			int			d = b64_table[(unsigned char) in[i + 2]];
			int			e = b64_table[(unsigned char) in[i + 3]];

			if ((a | b | d | e) >= 0)
			{
				uint32_t	w = ((uint32_t) a << 18) | ((uint32_t) b << 12) |
					((uint32_t) d << 6) | (uint32_t) e;

				*o++ = (uint8_t) (w >> 16);
				*o++ = (uint8_t) (w >> 8);
				*o++ = (uint8_t) w;
				i += 3;
				continue;
			}
		}

		if (c == ' ' || c == '\t' || c == '\n' || c == '\r' || c == '\f' || c == '\v')
			continue;
		if (c == '=')
		{
			/* "xx==" or "xxx=" */
			if (held + pad < 2 || held + pad > 3)
				goto bad;
			pad++;
			if (held + pad == 4)
			{
				if (pad == 2)
					*o++ = (uint8_t) (acc >> 4);
				else
				{
					*o++ = (uint8_t) (acc >> 10);
					*o++ = (uint8_t) (acc >> 2);
				}
				held = 0;
				acc = 0;
				pad = -1;		/* closed: only white space may follow */
			}
			continue;
		}
		if (pad != 0 || (v = b64_table[c]) < 0)
			goto bad;
		acc = (acc << 6) | (uint32_t) v;
		if (++held == 4)
		{
			*o++ = (uint8_t) (acc >> 16);
			*o++ = (uint8_t) (acc >> 8);
			*o++ = (uint8_t) acc;
			held = 0;
			acc = 0;
		}
	}
	if (held != 0 || pad > 0)
	{
		*bad_at = n;
		return -1;
	}
	return (int64_t) (o - out);

bad:
	*bad_at = i;
	return -1;
}
