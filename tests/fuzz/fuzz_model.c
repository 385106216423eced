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
 * Then walk_serving runs the real serving kernels of the model's method
 * (core/method.h, core/serve.c) over it, as the binding calls them: user
 * scores, pair scores and candidate scores of a few users, basket scores
 * of a few baskets, item rows, contributions, the top-k with and without a
 * seen list, a mask and a candidate list, cosine rows of users, and the
 * batch over a couple of users; every call within the preconditions the
 * binding guarantees (indices in range, baskets ascending with positive
 * finite weights).  A kernel that reads past a section, divides by zero
 * in integers or trips an AFF_ASSERT on a value the validator accepted is
 * a finding.
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
#include "als.h"
#include "method.h"
#include "model_format.h"
#include "serve.h"

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

static void *
plain_alloc(void *ctx, size_t size)
{
	(void) ctx;
	return malloc(size ? size : 1);
}

static void
plain_release(void *ctx, void *ptr)
{
	(void) ctx;
	free(ptr);
}

static const AffAllocator fuzz_alloc = {plain_alloc, plain_release, NULL};

/* Largest factor count whose f^3 solves the walk runs (keeps inputs fast). */
#define WALK_MAX_SOLVE_FACTORS 256

static int
never_stop(void *arg)
{
	(void) arg;
	return 0;
}

/* Offer scores to a top-k of k under flt and read what it kept. */
static double
walk_topk(const float *scores, int64_t n, const AffItemFilter *flt, int64_t k)
{
	AffScored  *heap = malloc(sizeof(AffScored) * (size_t) (k > 0 ? k : 1));
	AffTopK		t;
	double		s = 0;
	int64_t		r;

	aff_topk_init(&t, heap, k);
	(void) aff_topk_scores(scores, n, flt, &t);
	aff_topk_finish(&t);
	for (r = 0; r < t.n; r++)
	{
		if (t.heap[r].index < 0 || t.heap[r].index >= n)
			abort();
		s += t.heap[r].score;
	}
	free(heap);
	return s;
}

/* The basket of items[0 .. n) (ascending) with weights w: scores, top-k. */
static double
walk_basket(const AffMethod *meth, const AffServe *sv, const int32_t *items,
			const float *w, int64_t n, float *scores)
{
	AffError	err;
	AffItemFilter flt = {NULL, NULL, 0, NULL, 0};

	if (n == 0)
		return 0;
	if (meth->basket_scores(sv, items, w, n, scores, &err) != AFF_OK)
	{
		if (err.msg[0] == '\0')
			abort();
		return 0;
	}
	return walk_topk(scores, sv->v->h->n_items, &flt, 5);
}

static void
walk_serving(const AffModelView *v)
{
	const AffModelHeader *h = v->h;
	const AffMethod *meth = aff_method_by_code(h->method);
	int64_t		ni = h->n_items;
	int64_t		nu = h->n_users;
	int			f = h->factors;
	AffServe	sv;
	float	   *scores;
	float	   *contrib = NULL;
	uint8_t    *skip;
	int32_t    *cand;
	int32_t    *basket;
	float	   *bw;
	double	   *gram = NULL;
	float	   *gram_f = NULL;
	float	   *item_norms = NULL;
	float	   *user_norms = NULL;
	int64_t		us[3];
	int64_t		n_cand = 0;
	int64_t		i;
	int64_t		r;
	int			solves;
	double		s = 0;

	if (meth == NULL)
		missing("a known method");
	if (ni < 1)
		return;
	solves = !meth->needs_gram || f <= WALK_MAX_SOLVE_FACTORS;
	memset(&sv, 0, sizeof(sv));
	sv.v = v;
	sv.alloc = &fuzz_alloc;
	if (meth->needs_gram && solves)
	{
		gram = malloc(sizeof(double) * (size_t) f * f);
		gram_f = malloc(sizeof(float) * (size_t) f * f);
		aff_gram(v->item_factors, ni, f, 1, gram_f, gram);
		sv.gram = gram;
	}
	if (v->item_factors != NULL && f >= 1)
	{
		item_norms = malloc(sizeof(float) * (size_t) ni);
		aff_row_norms(v->item_factors, ni, f, item_norms);
		sv.item_norms = item_norms;
	}
	if (meth->user_vectors && nu >= 1)
	{
		user_norms = malloc(sizeof(float) * (size_t) nu);
		aff_row_norms(v->user_factors, nu, f, user_norms);
		sv.user_norms = user_norms;
	}
	scores = malloc(sizeof(float) * (size_t) (ni > nu ? ni : nu));
	skip = calloc((size_t) (ni > nu ? ni : nu), 1);
	cand = malloc(sizeof(int32_t) * (size_t) ni);
	basket = malloc(sizeof(int32_t) * 4);
	bw = malloc(sizeof(float) * 4);
	for (i = 0; i < ni; i += 1 + ni / 7)
		cand[n_cand++] = (int32_t) i;
	for (i = 0; i < ni; i += 3)
		skip[i] = 1;

	/* known users: first, middle, last */
	us[0] = 0;
	us[1] = nu / 2;
	us[2] = nu - 1;
	for (r = 0; r < 3 && nu >= 1; r++)
	{
		int64_t		u = us[r];
		int64_t		lo = v->seen_ptr[u];
		int64_t		n = v->seen_ptr[u + 1] - lo;
		AffItemFilter flt = {NULL, v->seen_items + lo, n, NULL, 0};
		AffError	err;

		meth->user_scores(&sv, u, scores);
		s += walk_topk(scores, ni, &flt, 4);
		flt.skip = skip;
		flt.cand = cand;
		flt.n_cand = n_cand;
		if (meth->candidate_scores)
			meth->candidate_scores(&sv, u, cand, n_cand, scores);
		s += walk_topk(scores, ni, &flt, 3);
		s += meth->pair_score(&sv, u, 0) + meth->pair_score(&sv, u, ni - 1);
		/* the user's own row as a basket */
		if (solves)
			s += walk_basket(meth, &sv, v->seen_items + lo, v->seen_weights + lo, n, scores);
		if (meth->contributions && solves)
		{
			contrib = realloc(contrib, sizeof(float) * (size_t) (n + 1));
			if (meth->contributions(&sv, u, ni - 1, contrib, &err) == AFF_OK)
			{
				AffItemFilter all = {NULL, NULL, 0, NULL, 0};

				s += walk_topk(contrib, n, &all, 3);
			}
			else if (err.msg[0] == '\0')
				abort();
		}
		if (meth->user_vectors)
		{
			AffItemFilter ufl = {NULL, NULL, 0, NULL, 0};

			aff_cosine_row(v->user_factors, user_norms, nu, f, u, scores);
			s += walk_topk(scores, nu, &ufl, 3);
		}
	}

	/* baskets for a user the model has not seen (a catalogue value has no basket scores) */
	if (solves && meth->basket_scores != NULL)
	{
		basket[0] = 0;
		bw[0] = 1;
		s += walk_basket(meth, &sv, basket, bw, 1, scores);
		if (ni >= 3)
		{
			basket[0] = 0;
			basket[1] = (int32_t) (ni / 2);
			basket[2] = (int32_t) (ni - 1);
			bw[0] = 0.5f;
			bw[1] = 3e38f;
			bw[2] = 1e-30f;
			if (basket[1] > basket[0] && basket[2] > basket[1])
				s += walk_basket(meth, &sv, basket, bw, 3, scores);
		}
	}

	/* item rows: first and last item */
	if (meth->item_row)
		for (r = 0; r < 2; r++)
		{
			int64_t		it = r == 0 ? 0 : ni - 1;
			AffItemFilter flt = {skip, NULL, 0, NULL, 0};

			meth->item_row(&sv, it, scores, skip);
			s += walk_topk(scores, ni, &flt, 4);
			flt.cand = cand;
			flt.n_cand = n_cand;
			s += walk_topk(scores, ni, &flt, 2);
		}

	/* the batch over the first and last user, with a mask and candidates */
	if (nu >= 1)
	{
		AffBatch	b;
		AffError	err;
		int32_t		users[2] = {0, (int32_t) (nu - 1)};

		memset(skip, 0, (size_t) ni);
		skip[0] = 1;
		if (aff_batch_init(&b, &sv, 3, true, 1, 2, &fuzz_alloc, &err) == AFF_OK)
		{
			b.exclude = skip;
			if (aff_batch_run(&b, users, 2, never_stop, NULL, &err) == AFF_OK)
				for (r = 0; r < 2; r++)
					for (i = 0; i < b.kept[r]; i++)
						s += b.out[r * 3 + i].score;
			b.cand = cand;
			b.n_cand = n_cand;
			b.exclude = NULL;
			if (aff_batch_run(&b, users, 2, never_stop, NULL, &err) == AFF_OK)
				for (r = 0; r < 2; r++)
					for (i = 0; i < b.kept[r]; i++)
						s += b.out[r * 3 + i].score;
			aff_batch_free(&b, &fuzz_alloc);
		}
	}
	sink = s;
	free(scores);
	free(contrib);
	free(skip);
	free(cand);
	free(basket);
	free(bw);
	free(gram);
	free(gram_f);
	free(item_norms);
	free(user_norms);
}

static void
validate_and_walk(const uint8_t *buf, uint64_t len)
{
	AffModelView view;
	AffError	err;

	if (aff_model_validate(buf, len, &view, &err) == AFF_OK)
	{
		walk_view(&view);
		walk_serving(&view);
	}
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
