/*
 * fuzz_model.c
 *		libFuzzer target for the model validator, aff_model_validate
 *		(src/core/model_format.c, compiled unchanged, outside the server).
 *
 * The fuzzer's input is what a client sends: the value's bytes after the
 * 4-byte varlena length word (the binary form, or the text form once
 * base64-decoded).  model_in/model_recv copy those bytes behind a fresh
 * length word into an 8-byte-aligned palloc'd buffer; this target does the
 * same into a malloc'd buffer of exactly len + 4 bytes, so AddressSanitizer
 * flags any read past the value's end.
 *
 * Each input is validated twice: as given, and with the header's checksum
 * recomputed.  Random mutations almost never keep the checksum right, so
 * without the second pass the fuzzer would only ever exercise the
 * structural checks; with it, every content check (sorted keys, finite
 * numbers, CSR offsets and indices) is reached on mutated data.
 *
 * When a value passes, walk_view reads every element that serving code may
 * read without further checks, with the dimensions serving code assumes
 * (see the comment there).  A validator that lets through a value whose
 * sections are shorter than those dimensions shows up as a heap overflow
 * or a NULL dereference here, before it can show up in a backend.
 *
 * Build (tests/check_fuzz.sh does this):
 *	clang -g -O1 -fsanitize=fuzzer,address,undefined -fno-sanitize-recover=undefined -DAFF_ASSERTS \
 *		-Isrc/core tests/fuzz/fuzz_model.c src/core/*.c -lopenblas -lm
 */
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "aff_core.h"
#include "model_format.h"

/* Sums are kept in a volatile so the compiler cannot drop the reads. */
static volatile double sink;

/* A validated view that serving code would dereference through NULL. */
static void
missing(const char *what)
{
	fprintf(stderr, "fuzz_model: the validator accepted a value without %s, "
			"which serving code reads\n", what);
	abort();
}

static double
sum_f(const float *x, uint64_t n)
{
	double		s = 0;
	uint64_t	i;

	for (i = 0; i < n; i++)
		s += x[i];
	return s;
}

static double
sum_i64(const int64_t *x, uint64_t n)
{
	double		s = 0;
	uint64_t	i;

	for (i = 0; i < n; i++)
		s += (double) x[i];
	return s;
}

/*
 * Read everything a validated view promises, with the dimensions and the
 * conditions under which the serving functions (src/pg/) read it: key
 * dictionaries of n_users and n_items; both factor matrices as n x factors
 * for implicit_als and whenever item factors are present (the vector
 * exports test for the item factor section, not for the method); training
 * lists through seen_ptr, each index used to read popularity and the item
 * keys; for ease the item-item matrix as n_items x n_items; for item_knn
 * the neighbour lists through neighbor_ptr, each index used to read the
 * item keys; for text keys, the bytes of every key through its offsets (the
 * text overloads compare and return them).
 */
/* Sum of the bytes of n text keys: key i is text[off[i] .. off[i + 1]). */
static double
sum_text(const int64_t *off, const char *text, int64_t n)
{
	double		s = 0;
	int64_t		i;
	int64_t		j;

	if (off == NULL || text == NULL)
		missing("the text of its text keys");
	for (i = 0; i < n; i++)
		for (j = off[i]; j < off[i + 1]; j++)
			s += (unsigned char) text[j];
	return s;
}

static void
walk_view(const AffModelView *v)
{
	const AffModelHeader *h = v->h;
	uint64_t	nu = (uint64_t) h->n_users;
	uint64_t	ni = (uint64_t) h->n_items;
	double		s = 0;
	int64_t		u;
	int64_t		j;

	s += sum_i64(v->user_keys, nu);
	s += sum_i64(v->item_keys, ni);
	s += sum_f(v->popularity, ni);
	if (h->method == AFF_METHOD_IMPLICIT_ALS || v->item_factors != NULL)
	{
		uint64_t	f = (uint64_t) h->factors;

		if (v->user_factors == NULL || v->item_factors == NULL)
			missing("both factor matrices");
		s += sum_f(v->item_factors, ni * f);
		s += sum_f(v->user_factors, nu * f);
	}
	for (u = 0; u < h->n_users; u++)
		for (j = v->seen_ptr[u]; j < v->seen_ptr[u + 1]; j++)
		{
			int32_t		i = v->seen_items[j];

			s += v->seen_weights[j] + v->popularity[i] + (double) v->item_keys[i];
		}
	for (j = 0; j < v->n_sweeps; j++)
		s += v->loss[j] + v->sweep_seconds[j];
	if (h->method == AFF_METHOD_EASE)
	{
		if (v->item_weights == NULL)
			missing("the item-item weights of an ease model");
		s += sum_f(v->item_weights, ni * ni);
	}
	if (h->method == AFF_METHOD_ITEM_KNN)
	{
		if (v->neighbor_ptr == NULL || v->neighbor_idx == NULL || v->neighbor_sim == NULL)
			missing("the neighbour lists of an item_knn model");
		for (j = 0; j < h->n_items; j++)
		{
			int64_t		k;

			for (k = v->neighbor_ptr[j]; k < v->neighbor_ptr[j + 1]; k++)
				s += v->neighbor_sim[k] + (double) v->item_keys[v->neighbor_idx[k]];
		}
	}
	if (h->key_type == AFF_KEYS_TEXT)
	{
		s += sum_text(v->user_text_off, v->user_text, h->n_users);
		s += sum_text(v->item_text_off, v->item_text, h->n_items);
	}
	sink = s;
}

static void
validate_and_walk(const uint8_t *buf, uint64_t len)
{
	AffModelView view;
	AffError	err;

	if (aff_model_validate(buf, len, &view, &err) == AFF_OK)
		walk_view(&view);
	else
	{
		/* every failure must say something */
		if (err.status == AFF_OK || err.msg[0] == '\0')
			abort();
	}
}

int
LLVMFuzzerTestOneInput(const uint8_t *data, size_t size)
{
	uint64_t	len = (uint64_t) size + 4;
	uint8_t    *buf;
	uint32_t	word;

	/* a varlena value is at most 1 GB; libFuzzer's inputs are far smaller */
	if (size > 64 * 1024 * 1024)
		return 0;
	/* malloc's result is 16-byte aligned, as palloc's is 8-byte aligned */
	buf = malloc(len);
	if (buf == NULL)
		return 0;
	/* what SET_VARSIZE writes on a little-endian machine */
	word = (uint32_t) (len << 2);
	memcpy(buf, &word, 4);
	if (size > 0)
		memcpy(buf + 4, data, size);
	validate_and_walk(buf, len);

	/* again with the checksum made right, to reach the content checks */
	if (len >= sizeof(AffModelHeader))
	{
		uint64_t	sum = aff_model_checksum(buf, len);

		memcpy(buf + offsetof(AffModelHeader, checksum), &sum, sizeof(sum));
		validate_and_walk(buf, len);
	}
	free(buf);
	return 0;
}
