/*
 * topk.c
 *		Top-k by a bounded binary heap: O(n log k) for n candidates, k
 *		entries of memory, and a final O(k log k) sort of what is kept.
 */
#include "topk.h"

static inline int
better(const AffScored *a, const AffScored *b)
{
	if (a->score != b->score)
		return a->score > b->score;
	return a->index < b->index;
}

void
aff_topk_init(AffTopK *t, AffScored *buf, int64_t k)
{
	t->heap = buf;
	t->k = k;
	t->n = 0;
}

static void
sift_down(AffScored *h, int64_t n, int64_t i)
{
	for (;;)
	{
		int64_t		l = 2 * i + 1;
		int64_t		r = l + 1;
		int64_t		w = i;
		AffScored	tmp;

		if (l < n && better(&h[w], &h[l]))
			w = l;
		if (r < n && better(&h[w], &h[r]))
			w = r;
		if (w == i)
			return;
		tmp = h[i];
		h[i] = h[w];
		h[w] = tmp;
		i = w;
	}
}

/* Offer one candidate. */
void
aff_topk_push(AffTopK *t, float score, int32_t index)
{
	AffScored	c = {score, index};
	AffScored  *h = t->heap;

	if (t->k <= 0)
		return;
	if (t->n < t->k)
	{
		int64_t		i = t->n++;

		/* sift up: the root stays the worst */
		while (i > 0)
		{
			int64_t		p = (i - 1) / 2;

			if (!better(&h[p], &c))
				break;
			h[i] = h[p];
			i = p;
		}
		h[i] = c;
		return;
	}
	if (!better(&c, &h[0]))
		return;
	h[0] = c;
	sift_down(h, t->n, 0);
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
		sift_down(t->heap, n, 0);
	}
	return t->n;
}
