/*
 * method_knn.c
 *		item_knn as a method: per item, the `neighbors` items whose
 *		confidence-weighted columns are closest by cosine (knn.c), kept as
 *		CSR lists; scores are sums of the similarities over the user's
 *		training items.
 */
#include "method_weights.h"
#include "knn.h"

#include <stdio.h>
#include <string.h>

static AffStatus
knn_fit(const AffMatrix *m, const AffOptions *o, const AffFitContext *cx,
		AffModelParts *parts, AffError *err)
{
	AffKnnParams p;
	AffNeighbors nb;
	size_t		work;
	uint64_t	size;
	double		t0;
	AffStatus	st;

	if ((st = aff_check_confidences(m, o, err)) != AFF_OK)
		return st;
	p.neighbors = o->neighbors;
	p.confidence = o->confidence;
	p.alpha = o->alpha;
	p.epsilon = o->epsilon;
	p.threads = o->threads;
	work = aff_item_knn_work_bytes(m, &p);
	if (work == 0)
		return aff_fail(err, AFF_ERR_LIMIT, "item_knn work size overflows for %lld items",
						(long long) m->n_items);
	if ((st = aff_fit_check_memory(cx, "item_knn", (double) work + aff_sparse_matrix_bytes(m),
								   m, err)) != AFF_OK)
		return st;

	if (aff_fit_progress(cx, NULL, NULL))
		return aff_fail(err, AFF_ERR_CANCELLED, "the fit was cancelled");
	t0 = aff_clock();
	if ((st = aff_item_knn(m, &p, cx->alloc, &nb, cx->poll, cx->poll_arg, err)) != AFF_OK)
		return st;
	if (o->verbose)
	{
		char		notice[128];

		snprintf(notice, sizeof(notice),
				 "affinity.fit item_knn: %lld neighbours of %lld items, %.3f s",
				 (long long) nb.count, (long long) m->n_items, aff_clock() - t0);
		if (aff_fit_progress(cx, NULL, notice))
			return aff_fail(err, AFF_ERR_CANCELLED, "the fit was cancelled");
	}

	parts->data[AFF_SEC_NEIGHBOR_PTR] = nb.ptr;
	parts->count[AFF_SEC_NEIGHBOR_PTR] = (uint64_t) m->n_items + 1;
	parts->data[AFF_SEC_NEIGHBOR_IDX] = nb.idx;
	parts->count[AFF_SEC_NEIGHBOR_IDX] = (uint64_t) nb.count;
	parts->data[AFF_SEC_NEIGHBOR_SIM] = nb.sim;
	parts->count[AFF_SEC_NEIGHBOR_SIM] = (uint64_t) nb.count;
	if (aff_model_size(parts, &size, err) != AFF_OK || size > cx->max_model_bytes)
	{
		aff_fail(err, AFF_ERR_LIMIT, "an item_knn model with %lld neighbours is too large for one value",
				 (long long) nb.count);
		aff_detail(err, "A value holds at most 1 GB.");
		return aff_hint(err, "Lower neighbors (now %d), or drop rare items with min_item_interactions.",
						o->neighbors);
	}
	return AFF_OK;
}

static void
knn_add_row(const AffModelView *v, int32_t i, float scale, float *scores)
{
	int64_t		j;

	for (j = v->neighbor_ptr[i]; j < v->neighbor_ptr[i + 1]; j++)
		scores[v->neighbor_idx[j]] += scale * v->neighbor_sim[j];
}

/* Lists are short (at most neighbors) and ordered by similarity. */
static float
knn_pair(const AffModelView *v, int32_t i, int32_t j)
{
	int64_t		k;

	for (k = v->neighbor_ptr[i]; k < v->neighbor_ptr[i + 1]; k++)
		if (v->neighbor_idx[k] == j)
			return v->neighbor_sim[k];
	return 0.0f;
}

static void
knn_user_scores(const AffServe *s, int64_t u, float *scores)
{
	const AffModelView *v = s->v;
	int64_t		lo = v->seen_ptr[u];

	aff_weights_scores(v, knn_add_row, v->seen_items + lo, NULL, v->seen_ptr[u + 1] - lo,
					   scores);
}

static AffStatus
knn_basket_scores(const AffServe *s, const int32_t *idx, const float *w, int64_t n,
				  float *scores, AffError *err)
{
	(void) err;
	aff_weights_scores(s->v, knn_add_row, idx, w, n, scores);
	return AFF_OK;
}

/*
 * Items like it: its neighbour list.  Items outside the list have no
 * similarity (0 there means "not a neighbour", not a score), so they are
 * no answer, and neither is it itself.
 */
static void
knn_item_row(const AffServe *s, int64_t it, float *sims, uint8_t *skip)
{
	const AffModelView *v = s->v;
	size_t		n = (size_t) v->h->n_items;
	int64_t		j;

	memset(sims, 0, sizeof(float) * n);
	memset(skip, 1, n);
	for (j = v->neighbor_ptr[it]; j < v->neighbor_ptr[it + 1]; j++)
	{
		sims[v->neighbor_idx[j]] = v->neighbor_sim[j];
		skip[v->neighbor_idx[j]] = 0;
	}
	skip[it] = 1;
}

static float
knn_pair_score(const AffServe *s, int64_t u, int64_t i)
{
	return aff_weights_pair_sum(s->v, knn_pair, u, i);
}

static AffStatus
knn_contributions(const AffServe *s, int64_t u, int64_t i, float *contrib,
				  AffError *err)
{
	(void) err;
	aff_weights_contributions(s->v, knn_pair, u, i, contrib);
	return AFF_OK;
}

const AffMethod aff_method_item_knn = {
	.code = AFF_METHOD_ITEM_KNN,
	.name = "item_knn",
	.sections = (1u << AFF_SEC_NEIGHBOR_PTR) | (1u << AFF_SEC_NEIGHBOR_IDX) |
	(1u << AFF_SEC_NEIGHBOR_SIM),
	.options = AFF_OPT_BIT(AFF_OPT_NEIGHBORS) | AFF_OPT_BIT(AFF_OPT_ALPHA) |
	AFF_OPT_BIT(AFF_OPT_CONFIDENCE) | AFF_OPT_BIT(AFF_OPT_EPSILON) |
	AFF_OPT_BIT(AFF_OPT_THREADS) | AFF_OPT_BIT(AFF_OPT_MIN_USER) |
	AFF_OPT_BIT(AFF_OPT_MIN_ITEM),
	.personal = true,
	.fit = knn_fit,
	.user_scores = knn_user_scores,
	.basket_scores = knn_basket_scores,
	.item_row = knn_item_row,
	.pair_score = knn_pair_score,
	.contributions = knn_contributions,
};
