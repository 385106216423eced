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

#include <stdatomic.h>
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

/* Compress nblocks consecutive 64-byte blocks into the state st[0..7] = a..h. */
typedef void (*Sha256BlocksFn) (uint32_t *st, const uint8_t *p, size_t nblocks);

/* Process 64-byte blocks one after the other in portable C (FIPS 180-4, 6.2.2). */
static void
sha256_blocks_portable(uint32_t *st, const uint8_t *p, size_t nblocks)
{
	for (; nblocks > 0; nblocks--, p += 64)
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
}

#if defined(__x86_64__) && (defined(__GNUC__) || defined(__clang__))
#define AFF_SHA256_HAVE_SHANI 1
#include <cpuid.h>
#include <immintrin.h>

/*
 * The same compression with the x86 SHA extensions.  Only this function is
 * compiled for them (the rest of the file keeps the baseline flags); it is
 * called only when the CPU reports them (sha256_choose).
 *
 * The instructions keep the eight working variables in two registers,
 * ABEF = {a, b, e, f} and CDGH = {c, d, g, h}, a in the highest 32 bits and
 * f (h) in the lowest.  sha256rnds2(CDGH, ABEF, WK) performs two rounds
 * with W[t] + K[t] in bits 0..31 and W[t+1] + K[t+1] in bits 32..63 of WK
 * and returns the new ABEF; the new CDGH is the old ABEF, so two calls with
 * the registers' roles exchanged do four rounds.  The schedule of FIPS
 * 180-4, 6.2.2 step 1, four words at a time: with M0..M3 holding
 * W[t-16..t-13] .. W[t-4..t-1] (lowest lane the lowest index),
 * sha256msg1(M0, M1) gives W[t-16+i] + sigma0(W[t-15+i]), adding
 * W[t-7..t-4] (M3:M2 shifted by one word) supplies the third term, and
 * sha256msg2(that, M3) adds sigma1(W[t-2+i]), taking W[t], W[t+1] it has
 * just made for the last two lanes.
 */
__attribute__((target("sha,sse4.1")))
static void
sha256_blocks_shani(uint32_t *st, const uint8_t *p, size_t nblocks)
{
	/* pshufb mask: reverse the bytes of each 32-bit lane (big-endian words) */
	const __m128i bswap = _mm_set_epi8(12, 13, 14, 15, 8, 9, 10, 11,
									   4, 5, 6, 7, 0, 1, 2, 3);
	__m128i		abef = _mm_set_epi32((int) st[0], (int) st[1], (int) st[4], (int) st[5]);
	__m128i		cdgh = _mm_set_epi32((int) st[2], (int) st[3], (int) st[6], (int) st[7]);

	for (; nblocks > 0; nblocks--, p += 64)
	{
		const __m128i abef0 = abef;
		const __m128i cdgh0 = cdgh;
		__m128i		m[4];
		int			g;

		for (g = 0; g < 4; g++)
			m[g] = _mm_shuffle_epi8(_mm_loadu_si128((const __m128i *) (p + 16 * g)), bswap);
		/* sixteen groups of four rounds: group g uses W[4g .. 4g+3] */
#if defined(__GNUC__) && !defined(__clang__)
#pragma GCC unroll 16
#endif
		for (g = 0; g < 16; g++)
		{
			__m128i		wk;

			if (g >= 4)
			{
				__m128i		w0 = m[g & 3];	/* W[4g-16 .. 4g-13] */
				__m128i		w1 = m[(g + 1) & 3];	/* W[4g-12 .. 4g-9] */
				__m128i		w2 = m[(g + 2) & 3];	/* W[4g-8 .. 4g-5] */
				__m128i		w3 = m[(g + 3) & 3];	/* W[4g-4 .. 4g-1] */
				__m128i		x = _mm_sha256msg1_epu32(w0, w1);

				x = _mm_add_epi32(x, _mm_alignr_epi8(w3, w2, 4));
				m[g & 3] = _mm_sha256msg2_epu32(x, w3);
			}
			wk = _mm_add_epi32(m[g & 3], _mm_loadu_si128((const __m128i *) (K256 + 4 * g)));
			cdgh = _mm_sha256rnds2_epu32(cdgh, abef, wk);	/* now ABEF */
			wk = _mm_shuffle_epi32(wk, 0x0E);	/* lanes 2, 3 down to 0, 1 */
			abef = _mm_sha256rnds2_epu32(abef, cdgh, wk);	/* ABEF; cdgh is CDGH */
		}
		abef = _mm_add_epi32(abef, abef0);
		cdgh = _mm_add_epi32(cdgh, cdgh0);
	}
	st[0] = (uint32_t) _mm_extract_epi32(abef, 3);
	st[1] = (uint32_t) _mm_extract_epi32(abef, 2);
	st[4] = (uint32_t) _mm_extract_epi32(abef, 1);
	st[5] = (uint32_t) _mm_extract_epi32(abef, 0);
	st[2] = (uint32_t) _mm_extract_epi32(cdgh, 3);
	st[3] = (uint32_t) _mm_extract_epi32(cdgh, 2);
	st[6] = (uint32_t) _mm_extract_epi32(cdgh, 1);
	st[7] = (uint32_t) _mm_extract_epi32(cdgh, 0);
}
#endif							/* x86-64 */

/*
 * The compression in use: NULL (static storage starts zeroed) until the
 * first hash picks one.  Either
 * choice is right, so two threads that choose at once store the same value;
 * the relaxed atomic accesses only make that race a defined one.
 */
static _Atomic(Sha256BlocksFn) sha256_blocks_fn;

/*
 * The fastest compression this CPU runs.  The SHA extensions are asked of
 * CPUID itself (leaf 7, EBX bit 29; SSSE3 and SSE4.1 are leaf 1, ECX bits
 * 9 and 19), which every compiler's <cpuid.h> reaches, rather than through
 * __builtin_cpu_supports, whose "sha" name older clang does not know.
 */
static Sha256BlocksFn
sha256_choose(void)
{
#ifdef AFF_SHA256_HAVE_SHANI
	unsigned int a,
				b,
				c,
				d;

	if (__get_cpuid(1, &a, &b, &c, &d) && (c & (1u << 9)) && (c & (1u << 19)) &&
		__get_cpuid_count(7, 0, &a, &b, &c, &d) && (b & (1u << 29)))
		return sha256_blocks_shani;
#endif
	return sha256_blocks_portable;
}

/* Compress nblocks blocks with the chosen compression. */
static void
sha256_blocks(uint32_t *st, const uint8_t *p, size_t nblocks)
{
	Sha256BlocksFn fn = atomic_load_explicit(&sha256_blocks_fn, memory_order_relaxed);

	if (fn == NULL)
	{
		fn = sha256_choose();
		atomic_store_explicit(&sha256_blocks_fn, fn, memory_order_relaxed);
	}
	fn(st, p, nblocks);
}

/*
 * Use the portable compression from now on (portable != 0) or go back to
 * the fastest one; returns the name of the one in use.
 */
const char *
aff_sha256_force_portable(int portable)
{
	atomic_store_explicit(&sha256_blocks_fn,
						  portable ? sha256_blocks_portable : sha256_choose(),
						  memory_order_relaxed);
	return aff_sha256_implementation();
}

/* "sha-ni" or "portable": the compression the next hash will use. */
const char *
aff_sha256_implementation(void)
{
	Sha256BlocksFn fn = atomic_load_explicit(&sha256_blocks_fn, memory_order_relaxed);

	if (fn == NULL)
		fn = sha256_choose();
#ifdef AFF_SHA256_HAVE_SHANI
	if (fn == sha256_blocks_shani)
		return "sha-ni";
#endif
	return "portable";
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
		sha256_blocks(s->state, s->block, 1);
		s->used = 0;
	}
	if (len >= 64)
	{
		size_t		whole = len / 64;

		sha256_blocks(s->state, p, whole);
		p += whole * 64;
		len -= whole * 64;
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
		sha256_blocks(s->state, s->block, 1);
		s->used = 0;
	}
	memset(s->block + s->used, 0, 56 - s->used);
	for (i = 0; i < 8; i++)
		s->block[56 + i] = (uint8_t) (bits >> (56 - 8 * i));
	sha256_blocks(s->state, s->block, 1);
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
