/*
 * serve.c
 *		The serving kernels shared by every method: the one top-k loop over
 *		the items a request may return, cosine rows over factor vectors, and
 *		the batch block (scores of a block of users, then a bounded heap per
 *		row) on worker threads.
 *
 * Items are visited in ascending index order, so once the heap is full a
 * score not above its worst cannot enter (an equal score loses the tie to
 * the smaller index already kept) and the push is skipped, a block of
 * such scores at a time where it can; the result is the same as pushing
 * every item.
 */
#include "serve.h"
#include "parallel.h"

#include <cblas.h>

#include <float.h>
#include <math.h>
#include <string.h>

/* Users per block of the batch at most, and scores per thread at most. */
#define BATCH_BLOCK_USERS	64
#define BATCH_BLOCK_SCORES	(8 * 1024 * 1024)

/* Scores per block of the skip test in topk_loop. */
#define TOPK_SKIP_BLOCK		16

/*
 * The loop of aff_topk_scores, with the heap's state (entries kept, worst
 * score) and the filter's fields in locals and the push inline.  Written
 * once; the two calls of aff_topk_scores, with cand a constant NULL in one,
 * let the compiler build it without the candidate indirection for the
 * common case.
 *
 * worst is the score an item must beat to be looked at: the root's score
 * once the heap is full (an equal score loses the tie to the smaller index
 * already kept), -INFINITY while it is not, FLT_MAX when k = 0 (nothing is
 * kept, but a non-finite score is still reported).  A finite score not
 * above worst can neither enter nor be reported, whatever the filter says,
 * so it is passed over before the filter is looked at; without a candidate
 * list, a block of TOPK_SKIP_BLOCK such scores is passed over at once.
 * Everything else takes the full path: seen list, mask, the finiteness
 * check, the push.
 */
static inline __attribute__((always_inline)) int64_t
topk_loop(const float *scores, int64_t n_items, const AffItemFilter *flt,
		  AffTopK *t, const int32_t *cand)
{
	const uint8_t *skip = flt->skip;
	const int32_t *seen = flt->seen;
	const int32_t *seen_end = seen ? seen + flt->n_seen : NULL;
	int64_t		n = cand ? flt->n_cand : n_items;
	AffScored  *heap = t->heap;
	int64_t		k = t->k;
	int64_t		kept = t->n;
	float		worst;
	int64_t		bad = -1;
	int64_t		r;

	AFF_ASSERT(k >= 0 && kept >= 0 && kept <= k);
	worst = kept < k ? -INFINITY : k > 0 ? heap[0].score : FLT_MAX;
	for (r = 0; r < n; r += TOPK_SKIP_BLOCK)
	{
		int64_t		end = n - r < TOPK_SKIP_BLOCK ? n : r + TOPK_SKIP_BLOCK;
		int64_t		q;

		if (!cand && end - r == TOPK_SKIP_BLOCK)
		{
			const float *blk = scores + r;
			int			pass = 1;

			/* a vector compare with -fopenmp-simd; a NaN fails both tests */
#pragma omp simd reduction(&:pass)
			for (q = 0; q < TOPK_SKIP_BLOCK; q++)
				pass &= (blk[q] <= worst) & (blk[q] > -INFINITY);
			if (pass)
				continue;
		}
		for (q = r; q < end; q++)
		{
			int32_t		i = cand ? cand[q] : (int32_t) q;
			float		sc = scores[i];
			AffScored	c;

			AFF_ASSERT(i >= 0 && i < n_items);
			AFF_ASSERT(q == 0 || !cand || cand[q - 1] < i);
			if (sc <= worst && sc > -INFINITY)
				continue;
			if (seen)
			{
				while (seen < seen_end && *seen < i)
					seen++;
				if (seen < seen_end && *seen == i)
					continue;
			}
			if (skip && skip[i])
				continue;
			if (!isfinite(sc))
			{
				if (bad < 0)
					bad = i;
				continue;
			}
			if (k == 0)
				continue;		/* not reached: worst = FLT_MAX */
			c.score = sc;
			c.index = i;
			aff_topk_offer(heap, k, &kept, c);
			if (kept == k)
				worst = heap[0].score;
		}
	}
	t->n = kept;
	return bad;
}

/*
 * Offer scores[j] to t for every item j that flt lets through (see
 * AffItemFilter), in ascending order.  The caller finishes t.  Returns the
 * first such j whose score is not finite (not offered), or -1.
 */
int64_t
aff_topk_scores(const float *scores, int64_t n_items, const AffItemFilter *flt,
				AffTopK *t)
{
	if (flt->cand)
		return topk_loop(scores, n_items, flt, t, flt->cand);
	return topk_loop(scores, n_items, flt, t, NULL);
}

/* a . b in float, summed in index order (bit-stable across callers). */
float
aff_dot_f(const float *a, const float *b, int f)
{
	float		s = 0;
	int			k;

	for (k = 0; k < f; k++)
		s += a[k] * b[k];
	return s;
}

/*
 * norms[r] = |F_r| (Euclidean) for the n rows of F (f floats each): the
 * norms aff_cosine_row divides by, computed once per cached model.
 */
void
aff_row_norms(const float *F, int64_t n, int f, float *norms)
{
	int64_t		r;

	AFF_ASSERT(n >= 0 && f >= 1);
	for (r = 0; r < n; r++)
		norms[r] = cblas_snrm2(f, F + (size_t) r * f, 1);
}

/*
 * sims[j] = cos(F_r, F_j) for the n rows of F (f floats each), with the
 * rows' norms given; 0 where a norm is 0.
 */
void
aff_cosine_row(const float *F, const float *norms, int64_t n, int f, int64_t r,
			   float *sims)
{
	const float *y = F + (size_t) r * f;
	int64_t		j;

	AFF_ASSERT(r >= 0 && r < n);
	for (j = 0; j < n; j++)
	{
		float		d = norms[r] * norms[j];

		sims[j] = d > 0 ? aff_dot_f(y, F + (size_t) j * f, f) / d : 0.0f;
	}
}

/* The best k of one user's score row into out, with the batch's filter. */
static void
batch_select(const AffBatch *b, int32_t u, const float *row, AffScored *heap,
			 AffScored *out, int64_t *kept, int64_t *bad)
{
	const AffModelView *v = b->s->v;
	AffItemFilter flt = {b->exclude, NULL, 0, b->cand, b->n_cand};
	AffTopK		t;

	if (b->exclude_seen)
	{
		flt.seen = v->seen_items + v->seen_ptr[u];
		flt.n_seen = v->seen_ptr[u + 1] - v->seen_ptr[u];
	}
	aff_topk_init(&t, heap, b->k);
	*bad = aff_topk_scores(row, v->h->n_items, &flt, &t);
	*kept = aff_topk_finish(&t);
	memcpy(out, heap, sizeof(AffScored) * *kept);
}

/* One block of users on a worker: scores, then each row's top k. */
static void
batch_block(void *arg, int thread_no, int64_t block_no, int64_t begin, int64_t end)
{
	AffBatch   *b = arg;
	const AffServe *s = b->s;
	int64_t		m = s->v->h->n_items;
	int			f = s->v->h->factors;
	float	   *work = b->work + (size_t) thread_no * b->block * (f > 0 ? f : 1);
	float	   *sc = b->scores + (size_t) thread_no * b->block * m;
	AffScored  *heap = b->heaps + (size_t) thread_no * b->k;
	int64_t		r;

	(void) block_no;
	if (b->meth->block_scores)
		b->meth->block_scores(s, b->users + begin, end - begin, work, sc);
	else
		for (r = begin; r < end; r++)
			b->meth->user_scores(s, b->users[r], sc + (size_t) (r - begin) * m);
	for (r = begin; r < end; r++)
		batch_select(b, b->users[r], sc + (size_t) (r - begin) * m, heap,
					 b->out + (size_t) r * b->k, &b->kept[r], &b->bad[r]);
}

/*
 * Prepare a batch of top k (k >= 1) per user over s with threads workers
 * and chunks of at most chunk users: every buffer, guarded, through a.
 * exclude and cand of *b may be set afterwards (they start NULL).
 */
AffStatus
aff_batch_init(AffBatch *b, const AffServe *s, int64_t k, bool exclude_seen,
			   int threads, int64_t chunk, const AffAllocator *a, AffError *err)
{
	const AffModelView *v = s->v;
	int64_t		m = v->h->n_items;
	size_t		f = v->h->factors > 0 ? (size_t) v->h->factors : 1;
	size_t		n_work;
	size_t		n_scores;
	size_t		n_heaps;
	size_t		n_out;

	AFF_ASSERT(k >= 1 && threads >= 1 && chunk >= 1);
	memset(b, 0, sizeof(*b));
	b->s = s;
	b->meth = aff_method_by_code(v->h->method);
	b->k = k;
	b->exclude_seen = exclude_seen;
	b->threads = threads;
	b->chunk = chunk;
	b->block = (int) (BATCH_BLOCK_SCORES / m);
	if (b->block > BATCH_BLOCK_USERS)
		b->block = BATCH_BLOCK_USERS;
	if (b->block < 1)
		b->block = 1;
	if (b->meth == NULL)
		return aff_fail(err, AFF_ERR_CORRUPT, "model of unknown method code %d",
						(int) v->h->method);
	if (aff_mul_overflows((size_t) b->block * f, (size_t) threads, &n_work) ||
		aff_mul_overflows((size_t) b->block * (size_t) m, (size_t) threads, &n_scores) ||
		aff_mul_overflows((size_t) k, (size_t) threads, &n_heaps) ||
		aff_mul_overflows((size_t) k, (size_t) chunk, &n_out))
		return aff_fail(err, AFF_ERR_LIMIT, "the batch's buffers are too large");
	b->work = aff_alloc_array(a, n_work, sizeof(float));
	b->scores = aff_alloc_array(a, n_scores, sizeof(float));
	b->heaps = aff_alloc_array(a, n_heaps, sizeof(AffScored));
	b->out = aff_alloc_array(a, n_out, sizeof(AffScored));
	b->kept = aff_alloc_array(a, (size_t) chunk, sizeof(int64_t));
	b->bad = aff_alloc_array(a, (size_t) chunk, sizeof(int64_t));
	if (!b->work || !b->scores || !b->heaps || !b->out || !b->kept || !b->bad)
	{
		aff_batch_free(b, a);
		return aff_fail(err, AFF_ERR_NOMEM, "out of memory for the batch's buffers");
	}
	return AFF_OK;
}

/*
 * The top k of users[0 .. n) (n <= chunk) into b->out and b->kept; fails
 * with AFF_ERR_NUMERIC (bad_user, bad_item set) when a considered score of
 * one of them is not finite.
 */
AffStatus
aff_batch_run(AffBatch *b, const int32_t *users, int64_t n, AffPollFn poll,
			  void *poll_arg, AffError *err)
{
	AffStatus	st;
	int64_t		r;

	AFF_ASSERT(n >= 0 && n <= b->chunk);
	b->users = users;
	st = aff_parallel_for(b->threads, n, b->block, batch_block, b, poll,
						  poll_arg, err);
	if (st != AFF_OK)
		return st;
	for (r = 0; r < n; r++)
		if (b->bad[r] >= 0)
		{
			b->bad_user = users[r];
			b->bad_item = b->bad[r];
			return aff_fail(err, AFF_ERR_NUMERIC, "a score is not finite");
		}
	return AFF_OK;
}

/* Release the batch's buffers (through the allocator that gave them). */
void
aff_batch_free(AffBatch *b, const AffAllocator *a)
{
	aff_release(a, b->work);
	aff_release(a, b->scores);
	aff_release(a, b->heaps);
	aff_release(a, b->out);
	aff_release(a, b->kept);
	aff_release(a, b->bad);
	b->work = b->scores = NULL;
	b->heaps = b->out = NULL;
	b->kept = b->bad = NULL;
}
