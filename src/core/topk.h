/*
 * topk.h
 *		Bounded selection of the k best (score, index) pairs.
 */
#ifndef AFF_TOPK_H
#define AFF_TOPK_H

#include "aff_core.h"

typedef struct AffScored
{
	float		score;
	int32_t		index;
} AffScored;

/*
 * A min-heap of at most k entries holding the best seen so far; its root
 * is the worst kept.  Better means a higher score, then a lower index
 * (indices follow key order, so ties go to the smaller key).
 */
typedef struct AffTopK
{
	AffScored  *heap;
	int64_t		k;
	int64_t		n;
} AffTopK;

extern void aff_topk_init(AffTopK *t, AffScored *buf, int64_t k);

/* Is a better than b: a higher score, then a lower index. */
static inline int
aff_topk_better(const AffScored *a, const AffScored *b)
{
	if (a->score != b->score)
		return a->score > b->score;
	return a->index < b->index;
}

/* Restore the heap order below h[i] (the root being the worst kept). */
static inline void
aff_topk_sift_down(AffScored *h, int64_t n, int64_t i)
{
	for (;;)
	{
		int64_t		l = 2 * i + 1;
		int64_t		r = l + 1;
		int64_t		w = i;
		AffScored	tmp;

		if (l < n && aff_topk_better(&h[w], &h[l]))
			w = l;
		if (r < n && aff_topk_better(&h[w], &h[r]))
			w = r;
		if (w == i)
			return;
		tmp = h[i];
		h[i] = h[w];
		h[w] = tmp;
		i = w;
	}
}

/*
 * Offer c to the heap h of *n entries out of k (k >= 1), *n updated: the
 * body of aff_topk_push, inline for loops that keep the heap's state in
 * locals.
 */
static inline void
aff_topk_offer(AffScored *h, int64_t k, int64_t *n, AffScored c)
{
	if (*n < k)
	{
		int64_t		i = (*n)++;

		/* sift up: the root stays the worst */
		while (i > 0)
		{
			int64_t		p = (i - 1) / 2;

			if (!aff_topk_better(&h[p], &c))
				break;
			h[i] = h[p];
			i = p;
		}
		h[i] = c;
		return;
	}
	if (!aff_topk_better(&c, &h[0]))
		return;
	h[0] = c;
	aff_topk_sift_down(h, *n, 0);
}

extern void aff_topk_push(AffTopK *t, float score, int32_t index);
extern int64_t aff_topk_finish(AffTopK *t);

#endif
