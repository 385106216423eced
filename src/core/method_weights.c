/*
 * method_weights.c
 *		What the item-item weight methods (ease, item_knn) share: scores as
 *		sums of pair weights over the user's (binary) training row, the
 *		per-item contributions, and the size guards of their fits.
 */
#include "method_weights.h"

#include <math.h>
#include <string.h>

/* scores[0 .. n_items) = sum over items[0 .. n) of their weight rows. */
void
aff_weights_scores(const AffModelView *v, AffAddRowFn add_row, const int32_t *items,
				   const float *w, int64_t n, float *scores)
{
	int64_t		t;

	memset(scores, 0, sizeof(float) * (size_t) v->h->n_items);
	for (t = 0; t < n; t++)
	{
		AFF_ASSERT(items[t] >= 0 && items[t] < v->h->n_items);
		AFF_ASSERT(w == NULL || (w[t] >= 0 && isfinite(w[t])));
		add_row(v, items[t], w ? w[t] : 1.0f, scores);
	}
}

/* The score of item i for user u: the pair weights over u's training items. */
float
aff_weights_pair_sum(const AffModelView *v, AffPairWeightFn pair, int64_t u, int64_t i)
{
	float		s = 0;
	int64_t		j;

	for (j = v->seen_ptr[u]; j < v->seen_ptr[u + 1]; j++)
		s += pair(v, v->seen_items[j], (int32_t) i);
	return s;
}

/* contrib[j]: the weight of (training item j of u, i). */
void
aff_weights_contributions(const AffModelView *v, AffPairWeightFn pair, int64_t u,
						  int64_t i, float *contrib)
{
	int64_t		lo = v->seen_ptr[u];
	int64_t		j;

	for (j = 0; j < v->seen_ptr[u + 1] - lo; j++)
		contrib[j] = pair(v, v->seen_items[lo + j], (int32_t) i);
}

double
aff_megabytes(double bytes)
{
	return bytes / (1024.0 * 1024.0);
}

/*
 * Size of the model that parts will encode once section `kind` holds
 * `count` elements, so that an oversized model is refused before the fit
 * instead of after it.  Returns 0 when the size overflows.
 */
uint64_t
aff_model_size_with(const AffModelParts *parts, int kind, uint64_t count)
{
	AffModelParts tmp = *parts;
	AffError	err;
	uint64_t	size;

	/* only NULL-ness of data matters to the size */
	tmp.data[kind] = parts->data[AFF_SEC_ITEM_KEYS];
	tmp.count[kind] = count;
	if (aff_model_size(&tmp, &size, &err) != AFF_OK)
		return 0;
	return size;
}
