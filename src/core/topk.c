/*
 * topk.c
 *		Top-k by a bounded binary heap: O(n log k) for n candidates, k
 *		entries of memory, and a final O(k log k) sort of what is kept.
 */
#include "topk.h"

void
aff_topk_init(AffTopK *t, AffScored *buf, int64_t k)
{
	t->heap = buf;
	t->k = k;
	t->n = 0;
}

/* Offer one candidate. */
void
aff_topk_push(AffTopK *t, float score, int32_t index)
{
	AffScored	c = {score, index};

	if (t->k <= 0)
		return;
	aff_topk_offer(t->heap, t->k, &t->n, c);
}

/*
 * Sort the kept entries best first, in place (heap sort: repeatedly move
 * the worst to the end).  Returns the number kept.
 */
int64_t
aff_topk_finish(AffTopK *t)
{
	int64_t		n = t->n;

	while (n > 1)
	{
		AffScored	tmp = t->heap[0];

		t->heap[0] = t->heap[n - 1];
		t->heap[n - 1] = tmp;
		n--;
		aff_topk_sift_down(t->heap, n, 0);
	}
	return t->n;
}
