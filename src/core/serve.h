/*
 * serve.h
 *		Serving kernels of the engine: top-k over the items a request may
 *		return, cosine rows, and the batch of every user's top-k on worker
 *		threads.  The method's own arithmetic is behind method.h; these
 *		kernels are shared by every method.
 */
#ifndef AFF_SERVE_H
#define AFF_SERVE_H

#include <stdbool.h>

#include "aff_core.h"
#include "method.h"
#include "topk.h"

/*
 * Which items a top-k may return: every item j not excluded, where j is
 * excluded when skip[j] is set (skip may be NULL) or j is in the sorted
 * list seen[0 .. n_seen) (may be NULL); with cand (sorted ascending,
 * without repeats) only those items are considered.
 *
 * aff_topk_scores offers the scores of the items a filter lets through to
 * a top-k; a score that is not finite (NaN or infinite: arithmetic that
 * overflowed) is not offered, and the index of the first such item is
 * returned (-1 when every considered score is finite), for the caller to
 * refuse the request rather than rank an arbitrary order.
 */
typedef struct AffItemFilter
{
	const uint8_t *skip;
	const int32_t *seen;
	int64_t		n_seen;
	const int32_t *cand;
	int64_t		n_cand;
} AffItemFilter;

extern int64_t aff_topk_scores(const float *scores, int64_t n_items,
							   const AffItemFilter *flt, AffTopK *t);
extern float aff_dot_f(const float *a, const float *b, int f);
extern void aff_row_norms(const float *F, int64_t n, int f, float *norms);
extern void aff_cosine_row(const float *F, const float *norms, int64_t n, int f,
						   int64_t r, float *sims);

/*
 * The batch: the top k of each of a list of users, computed in blocks on
 * worker threads (scores by the method's block_scores or user_scores,
 * then the per-row top-k with the training items, an exclusion mask and a
 * candidate list applied).  aff_batch_init allocates every buffer (on the
 * calling thread); aff_batch_run fills out[r * k ..] and kept[r] for rows
 * r of users[0 .. n), n at most chunk.  A score that is not finite is
 * never ranked: aff_batch_run then fails with AFF_ERR_NUMERIC and names
 * the first such (user, item) in bad_user and bad_item.
 */
typedef struct AffBatch
{
	const AffServe *s;
	const AffMethod *meth;
	int64_t		k;
	bool		exclude_seen;
	const uint8_t *exclude;		/* n_items mask, or NULL */
	const int32_t *cand;		/* sorted candidate items, or NULL */
	int64_t		n_cand;
	int			threads;
	int			block;			/* users per block */
	int64_t		chunk;			/* users per aff_batch_run at most */
	int64_t		bad_user;		/* after AFF_ERR_NUMERIC: the user (index) */
	int64_t		bad_item;		/* and the item whose score is not finite */
	const int32_t *users;		/* of the running chunk */
	float	   *work;			/* per thread: block * factors */
	float	   *scores;			/* per thread: block * n_items */
	AffScored  *heaps;			/* per thread: k */
	AffScored  *out;			/* chunk * k */
	int64_t    *kept;			/* chunk */
	int64_t    *bad;			/* chunk: first non-finite item, or -1 */
} AffBatch;

extern AffStatus aff_batch_init(AffBatch *b, const AffServe *s, int64_t k,
								bool exclude_seen, int threads, int64_t chunk,
								const AffAllocator *a, AffError *err);
extern AffStatus aff_batch_run(AffBatch *b, const int32_t *users, int64_t n,
							   AffPollFn poll, void *poll_arg, AffError *err);
extern void aff_batch_free(AffBatch *b, const AffAllocator *a);

#endif							/* AFF_SERVE_H */
