/*
 * chunk_compare.c
 *		The engine's polled writer, checksum, digest, validator and base64
 *		codec against one-pass reference code, for tests/check_cancel.py.
 *
 * Usage: chunk_compare USERS ITEMS FACTORS FILE
 * Lays out an implicit_als model of USERS customers, ITEMS items and
 * FACTORS factors (random content, valid), writes it twice: with the
 * reference below (the one-pass writer as it was before the polled one:
 * zero the buffer, copy each section, hash it whole) and with
 * aff_model_write_polled, and compares the bytes; then seals, validates,
 * encodes and decodes with and without polls, and checks that a poll that
 * asks to stop makes each step return its cancel result.  Built with a
 * small AFF_POLL_BYTES (-DAFF_POLL_BYTES=40) every section crosses many
 * chunk edges.  FILE receives the sealed value (after the length word) for
 * the caller to check against hashlib.  Prints "ok POLLS" on success, or
 * "FAIL what" and exits 1.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "../../src/core/digest.h"
#include "../../src/core/model_format.h"

static int	polls = 0;
static int	stop_after = -1;	/* ask to stop at this call; -1 never */

static int
count_poll(void *arg)
{
	(void) arg;
	polls++;
	return stop_after >= 0 && polls >= stop_after;
}

static void
fail(const char *what)
{
	printf("FAIL %s\n", what);
	exit(1);
}

static uint64_t
rnd(void)
{
	static uint64_t s = 0x853c49e6748fea9bULL;

	s ^= s << 13;
	s ^= s >> 7;
	s ^= s << 17;
	return s;
}

/* The one-pass writer the polled one replaces, byte for byte. */
static void
reference_write(const AffModelParts *parts, uint8_t *buf, uint64_t size)
{
	AffModelHeader h = parts->h;
	AffSection *table = (AffSection *) (buf + sizeof(AffModelHeader));
	uint64_t	off;
	uint64_t	fp = 0x2545f4914f6cdd1dULL;
	int			n = 0;
	int			k;

	memset(buf, 0, size);
	for (k = 1; k <= AFF_SEC_MAX; k++)
		if (parts->data[k] != NULL)
			n++;
	memcpy(h.magic, AFF_MAGIC, 4);
	h.version = AFF_FORMAT_VERSION;
	h.n_sections = (uint16_t) n;
	h.total_size = size;
	h.checksum = 0;
	h.fingerprint = 0;
	off = (sizeof(AffModelHeader) + (uint64_t) n * sizeof(AffSection) + 7) & ~(uint64_t) 7;
	n = 0;
	for (k = 1; k <= AFF_SEC_MAX; k++)
	{
		uint64_t	bytes;

		if (parts->data[k] == NULL)
			continue;
		bytes = parts->count[k] * aff_section_elem_size(k);
		table[n].kind = (uint32_t) k;
		table[n].elem_size = (uint32_t) aff_section_elem_size(k);
		table[n].offset = off;
		table[n].count = parts->count[k];
		if (bytes > 0)
			memcpy(buf + off, parts->data[k], bytes);
		if (k != AFF_SEC_SWEEP_SECONDS)
			fp = aff_hash(buf + off, bytes, fp);
		off += (bytes + 7) & ~(uint64_t) 7;
		n++;
	}
	{
		AffModelHeader hc = h;

		hc.varlena_word = 0;
		hc.fit_seconds = 0;
		hc.peak_memory = 0;
		fp = aff_hash((const uint8_t *) &hc, sizeof(hc), fp);
		fp = aff_hash((const uint8_t *) table, (uint64_t) n * sizeof(AffSection), fp);
	}
	h.fingerprint = fp;
	memcpy(buf + 4, ((const uint8_t *) &h) + 4, sizeof(h) - 4);
	h.checksum = aff_model_checksum(buf, size);
	memcpy(buf + offsetof(AffModelHeader, checksum), &h.checksum, 8);
}

/* The one-pass checksum: aff_hash over everything but the length word and itself. */
static uint64_t
reference_checksum(const uint8_t *buf, uint64_t len)
{
	size_t		off = offsetof(AffModelHeader, checksum);
	uint64_t	h = 0x5851f42d4c957f2dULL;

	h = aff_hash(buf + 4, off - 4, h);
	h = aff_hash(buf + off + 8, len - off - 8, h);
	return h ^ (h >> 31);
}

/* The one-pass digest: SHA-256 of a copy with the two fields zeroed. */
static void
reference_seal(uint8_t *buf, uint64_t len)
{
	uint8_t    *copy = malloc(len);
	uint8_t		d[AFF_SHA256_BYTES];
	uint64_t	c;

	memcpy(copy, buf, len);
	memset(copy + offsetof(AffModelHeader, checksum), 0, 8);
	memset(copy + offsetof(AffModelHeader, content_digest), 0, AFF_SHA256_BYTES);
	aff_sha256(copy + 4, len - 4, d);
	free(copy);
	memcpy(buf + offsetof(AffModelHeader, content_digest), d, AFF_SHA256_BYTES);
	c = reference_checksum(buf, len);
	memcpy(buf + offsetof(AffModelHeader, checksum), &c, 8);
}

int
main(int argc, char **argv)
{
	int64_t		users,
				items,
				nnz = 0,
				u;
	int			f,
				k;
	AffModelParts p;
	AffModelView v;
	AffError	err;
	uint64_t	size;
	uint8_t    *a,
			   *b;
	int64_t    *ukeys,
			   *ikeys,
			   *ptr;
	int32_t    *seen;
	float	   *wts,
			   *uf,
			   *itf,
			   *pop;
	double		loss[3] = {3.5, 2.25, 2.0};
	double		secs[3] = {0.1, 0.2, 0.3};
	char	   *text,
			   *text2;
	uint8_t    *back;
	size_t		tlen,
				bad;
	int64_t		got;
	FILE	   *out;

	if (argc != 5)
	{
		fprintf(stderr, "usage: chunk_compare USERS ITEMS FACTORS FILE\n");
		return 2;
	}
	users = atoll(argv[1]);
	items = atoll(argv[2]);
	f = atoi(argv[3]);

	ukeys = malloc(sizeof(int64_t) * users);
	ikeys = malloc(sizeof(int64_t) * items);
	ptr = malloc(sizeof(int64_t) * (users + 1));
	seen = malloc(sizeof(int32_t) * users * 3);
	wts = malloc(sizeof(float) * users * 3);
	uf = malloc(sizeof(float) * users * f);
	itf = malloc(sizeof(float) * items * f);
	pop = calloc(items, sizeof(float));
	for (u = 0; u < users; u++)
		ukeys[u] = 10 * u + 3;
	for (u = 0; u < items; u++)
		ikeys[u] = 7 * u - 5;
	ptr[0] = 0;
	for (u = 0; u < users; u++)
	{
		int64_t		i = (int64_t) (rnd() % (uint64_t) items);
		int			m = 1 + (int) (rnd() % 3),
					j;

		for (j = 0; j < m && i < items; j++, i += 1 + (int64_t) (rnd() % 5))
		{
			seen[nnz] = (int32_t) i;
			wts[nnz] = 1.0f + (float) (rnd() % 9);
			pop[i] += 1.0f;
			nnz++;
		}
		ptr[u + 1] = nnz;
	}
	for (u = 0; u < users * f; u++)
		uf[u] = (float) ((int64_t) (rnd() % 2001) - 1000) / 997.0f;
	for (u = 0; u < items * f; u++)
		itf[u] = (float) ((int64_t) (rnd() % 2001) - 1000) / 991.0f;

	memset(&p, 0, sizeof(p));
	p.h.method = AFF_METHOD_IMPLICIT_ALS;
	p.h.key_type = AFF_KEYS_BIGINT;
	p.h.n_users = users;
	p.h.n_items = items;
	p.h.nnz = nnz;
	p.h.factors = f;
	p.h.iterations = 3;
	p.h.solver = AFF_SOLVER_CG;
	p.h.solver_steps = 3;
	p.h.confidence = AFF_CONFIDENCE_LINEAR;
	p.h.threads = 1;
	p.h.regularization = 0.01;
	p.h.alpha = 1.0;
	p.h.epsilon = 1.0;
	p.h.rows_read = nnz;
	p.h.fit_seconds = 1.5;
	p.h.peak_memory = 12345;
	p.data[AFF_SEC_USER_KEYS] = ukeys;
	p.count[AFF_SEC_USER_KEYS] = users;
	p.data[AFF_SEC_ITEM_KEYS] = ikeys;
	p.count[AFF_SEC_ITEM_KEYS] = items;
	p.data[AFF_SEC_USER_FACTORS] = uf;
	p.count[AFF_SEC_USER_FACTORS] = users * f;
	p.data[AFF_SEC_ITEM_FACTORS] = itf;
	p.count[AFF_SEC_ITEM_FACTORS] = items * f;
	p.data[AFF_SEC_SEEN_PTR] = ptr;
	p.count[AFF_SEC_SEEN_PTR] = users + 1;
	p.data[AFF_SEC_SEEN_ITEMS] = seen;
	p.count[AFF_SEC_SEEN_ITEMS] = nnz;
	p.data[AFF_SEC_SEEN_WEIGHTS] = wts;
	p.count[AFF_SEC_SEEN_WEIGHTS] = nnz;
	p.data[AFF_SEC_POPULARITY] = pop;
	p.count[AFF_SEC_POPULARITY] = items;
	p.data[AFF_SEC_LOSS] = loss;
	p.count[AFF_SEC_LOSS] = 3;
	p.data[AFF_SEC_SWEEP_SECONDS] = secs;
	p.count[AFF_SEC_SWEEP_SECONDS] = 3;

	if (aff_model_size(&p, &size, &err) != AFF_OK)
		fail("size");
	a = aligned_alloc(8, size);
	b = aligned_alloc(8, size);
	/* different garbage in both, so unwritten bytes would show */
	memset(a, 0xA5, size);
	memset(b, 0x5A, size);
	reference_write(&p, a, size);
	if (aff_model_write_polled(&p, b, size, count_poll, NULL, &err) != AFF_OK)
		fail("polled write");
	if (memcmp(a, b, size) != 0)
		fail("the polled writer's bytes differ from the one-pass writer's");
	if (reference_checksum(b, size) != aff_model_checksum(b, size))
		fail("checksum");
	reference_seal(a, size);
	if (aff_model_seal_polled(b, size, count_poll, NULL, &err) != AFF_OK)
		fail("polled seal");
	if (memcmp(a, b, size) != 0)
		fail("the polled seal (digest, checksum) differs from the one-pass seal");
	if (aff_model_validate_polled(b, size, &v, count_poll, NULL, &err) != AFF_OK)
		fail(err.detail);
	if (aff_model_validate(a, size, &v, &err) != AFF_OK)
		fail("one-pass validation");

	tlen = aff_b64_encoded_len(size - 4);
	text = malloc(tlen);
	text2 = malloc(tlen);
	aff_b64_encode(b + 4, size - 4, text);
	if (aff_b64_encode_polled(b + 4, size - 4, text2, count_poll, NULL, &err) != AFF_OK ||
		memcmp(text, text2, tlen) != 0)
		fail("polled base64 encoding differs");
	back = malloc(aff_b64_decoded_max(tlen));
	got = aff_b64_decode_polled(text, tlen, back, &bad, count_poll, NULL);
	if (got != (int64_t) size - 4 || memcmp(back, b + 4, size - 4) != 0)
		fail("polled base64 decoding differs");
	if (polls < 6)
		fail("the steps did not poll");
	printf("ok %d\n", polls);

	/* a poll that asks to stop: every step returns its cancel result */
	for (k = 0; k < 6; k++)
	{
		AffStatus	st = AFF_OK;
		uint8_t		d[AFF_SHA256_BYTES];

		polls = 0;
		stop_after = 1;
		switch (k)
		{
			case 0:
				st = aff_model_write_polled(&p, a, size, count_poll, NULL, &err);
				break;
			case 1:
				st = aff_model_seal_polled(a, size, count_poll, NULL, &err);
				break;
			case 2:
				st = aff_model_validate_polled(b, size, &v, count_poll, NULL, &err);
				break;
			case 3:
				st = aff_model_digest_polled(b, size, d, count_poll, NULL, &err);
				break;
			case 4:
				st = aff_b64_encode_polled(b + 4, size - 4, text2, count_poll, NULL, &err);
				break;
			case 5:
				st = aff_b64_decode_polled(text, tlen, back, &bad, count_poll, NULL) ==
					AFF_B64_CANCELLED ? AFF_ERR_CANCELLED : AFF_OK;
				break;
		}
		if (st != AFF_ERR_CANCELLED)
		{
			printf("FAIL step %d does not stop when its poll asks\n", k);
			return 1;
		}
	}
	stop_after = -1;

	out = fopen(argv[4], "wb");
	if (out == NULL || fwrite(b + 4, 1, size - 4, out) != size - 4 || fclose(out) != 0)
		fail("cannot write the file");
	return 0;
}
