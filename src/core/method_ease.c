/*
 * method_ease.c
 *		ease as a method (Steck 2019, "Embarrassingly Shallow Autoencoders
 *		for Sparse Data", WWW 2019): a dense items x items weight matrix B.
 *
 * The fit's cost is cubic in the items and its size quadratic, so it
 * refuses, before allocating, catalogues over max_items, models that would
 * not fit in one value, and fits over the memory limit.  The work is in
 * ease.c, on worker threads and in blocked BLAS/LAPACK calls.
 */
#include "method_weights.h"
#include "ease.h"

#include <stdio.h>
#include <string.h>

/*
 * The guards, all before anything large is allocated: a positive
 * regularization, max_items, the size of one value, the memory limit.
 * Memory peaks at one of three moments: the double Gram matrix beside the
 * float weights (12 bytes per item pair), the weights beside the encoded
 * model, or the model beside the copy that the executor makes of an
 * aggregate's result; the sparse matrix is alive throughout.
 */
static AffStatus
ease_check_size(const AffMatrix *m, const AffOptions *o, const AffFitContext *cx,
				const AffModelParts *parts, AffError *err)
{
	int64_t		n = m->n_items;
	uint64_t	size;
	size_t		work;
	double		need;

	/* X^T X alone is singular as soon as two items have the same buyers */
	if (!(o->regularization > 0))
	{
		aff_fail(err, AFF_ERR_OPTION, "ease needs a positive regularization");
		aff_detail(err, "The regularization is %g.", o->regularization);
		return aff_hint(err, "Set the option \"regularization\" to a positive number; ease defaults to %g.",
						aff_default_regularization(AFF_METHOD_EASE));
	}
	if (n > o->max_items)
	{
		aff_fail(err, AFF_ERR_LIMIT, "too many items for an ease fit");
		aff_detail(err, "The training data holds %lld items; max_items is %d.",
				   (long long) n, o->max_items);
		return aff_hint(err, "Drop rare items with min_item_interactions, raise max_items (the fit takes time cubic in the items), or use method \"item_knn\".");
	}
	size = aff_model_size_with(parts, AFF_SEC_ITEM_WEIGHTS, (uint64_t) n * (uint64_t) n);
	if (size == 0 || size > cx->max_model_bytes)
	{
		aff_fail(err, AFF_ERR_LIMIT, "an ease model over %lld items is too large for one value",
				 (long long) n);
		aff_detail(err, "Its item weights take %.0f MB; a value holds at most 1 GB.",
				   aff_megabytes(4.0 * n * n));
		return aff_hint(err, "Drop rare items with min_item_interactions, or use method \"item_knn\".");
	}
	work = aff_ease_work_bytes(n);
	if (work == 0)
		return aff_fail(err, AFF_ERR_LIMIT, "ease work size overflows for %lld items",
						(long long) n);
	need = (double) work > 4.0 * n * n + (double) size ? (double) work : 4.0 * n * n + (double) size;
	need = need > 2.0 * (double) size ? need : 2.0 * (double) size;
	return aff_fit_check_memory(cx, "ease", need + aff_sparse_matrix_bytes(m), m, err);
}

/* A numerical failure (a tiny regularization can cause one) gets a hint. */
static AffStatus
ease_numeric(AffStatus st, const AffOptions *o, AffError *err)
{
	if (st != AFF_ERR_NUMERIC)
		return st;
	return aff_hint(err, "Use a larger regularization (now %g); ease defaults to %g.",
					o->regularization, aff_default_regularization(AFF_METHOD_EASE));
}

/* One step's verbose line, then a progress call; nonzero: stop. */
static int
ease_step_done(const AffFitContext *cx, const AffOptions *o, const char *step,
			   int64_t n, double secs)
{
	char		notice[128];

	if (!o->verbose)
		return aff_fit_progress(cx, NULL, NULL);
	snprintf(notice, sizeof(notice), "affinity.fit ease: %s of %lld items, %.3f s",
			 step, (long long) n, secs);
	return aff_fit_progress(cx, NULL, notice);
}

/*
 * B = I - P diag(1 / diag P) with P = (X^T X + lambda I)^-1, zero
 * diagonal, stored as n_items^2 floats, row-major, in AFF_SEC_ITEM_WEIGHTS.
 */
static AffStatus
ease_fit(const AffMatrix *m, const AffOptions *o, const AffFitContext *cx,
		 AffModelParts *parts, AffError *err)
{
	int64_t		n = m->n_items;
	size_t		cells = (size_t) n * (size_t) n;
	double	   *G;
	float	   *B;
	AffStatus	st;
	double		t0;

	if ((st = ease_check_size(m, o, cx, parts, err)) != AFF_OK)
		return st;
	G = aff_alloc_array(cx->alloc, cells, sizeof(double));
	B = aff_alloc_array(cx->alloc, cells, sizeof(float));
	if (G == NULL || B == NULL)
	{
		aff_release(cx->alloc, G);
		aff_release(cx->alloc, B);
		aff_fail(err, AFF_ERR_NOMEM, "out of memory for an ease fit over %lld items",
				 (long long) n);
		return aff_detail(err, "The fit needs %.0f MB for its two item x item matrices.",
						  aff_megabytes((double) aff_ease_work_bytes(n)));
	}

	if (aff_fit_progress(cx, NULL, NULL))
		return aff_fail(err, AFF_ERR_CANCELLED, "the fit was cancelled");
	t0 = aff_clock();
	if ((st = aff_ease_gram(m, o->regularization, o->threads, G, cx->poll,
							cx->poll_arg, err)) != AFF_OK)
		return st;
	if (ease_step_done(cx, o, "Gram matrix", n, aff_clock() - t0))
		return aff_fail(err, AFF_ERR_CANCELLED, "the fit was cancelled");

	/* BLAS calls cannot be interrupted; the inverse polls between blocks */
	t0 = aff_clock();
	if ((st = aff_ease_invert(G, n, o->threads, o->regularization, cx->poll,
							  cx->poll_arg, err)) != AFF_OK)
		return ease_numeric(st, o, err);
	if (ease_step_done(cx, o, "inverse", n, aff_clock() - t0))
		return aff_fail(err, AFF_ERR_CANCELLED, "the fit was cancelled");

	t0 = aff_clock();
	if ((st = aff_ease_weights(G, n, o->threads, B, cx->poll, cx->poll_arg, err)) != AFF_OK)
		return ease_numeric(st, o, err);
	aff_release(cx->alloc, G);
	if (o->verbose &&
		ease_step_done(cx, o, "weights", n, aff_clock() - t0))
		return aff_fail(err, AFF_ERR_CANCELLED, "the fit was cancelled");
	parts->data[AFF_SEC_ITEM_WEIGHTS] = B;
	parts->count[AFF_SEC_ITEM_WEIGHTS] = cells;
	return AFF_OK;
}

static void
ease_add_row(const AffModelView *v, int32_t i, float scale, float *scores)
{
	int64_t		n = v->h->n_items;
	const float *row = v->item_weights + (size_t) i * n;
	int64_t		j;

	for (j = 0; j < n; j++)
		scores[j] += scale * row[j];
}

static float
ease_pair(const AffModelView *v, int32_t i, int32_t j)
{
	return v->item_weights[(size_t) i * v->h->n_items + j];
}

static void
ease_user_scores(const AffServe *s, int64_t u, float *scores)
{
	const AffModelView *v = s->v;
	int64_t		lo = v->seen_ptr[u];

	aff_weights_scores(v, ease_add_row, v->seen_items + lo, NULL, v->seen_ptr[u + 1] - lo,
					   scores);
}

static AffStatus
ease_basket_scores(const AffServe *s, const int32_t *idx, const float *w, int64_t n,
				   float *scores, AffError *err)
{
	(void) err;
	aff_weights_scores(s->v, ease_add_row, idx, w, n, scores);
	return AFF_OK;
}

/* Items like it: its row of B; it itself is no answer. */
static void
ease_item_row(const AffServe *s, int64_t it, float *sims, uint8_t *skip)
{
	const AffModelView *v = s->v;
	size_t		n = (size_t) v->h->n_items;

	memcpy(sims, v->item_weights + (size_t) it * n, sizeof(float) * n);
	memset(skip, 0, n);
	skip[it] = 1;
}

static float
ease_pair_score(const AffServe *s, int64_t u, int64_t i)
{
	return aff_weights_pair_sum(s->v, ease_pair, u, i);
}

static AffStatus
ease_contributions(const AffServe *s, int64_t u, int64_t i, float *contrib,
				   AffError *err)
{
	(void) err;
	aff_weights_contributions(s->v, ease_pair, u, i, contrib);
	return AFF_OK;
}

const AffMethod aff_method_ease = {
	.code = AFF_METHOD_EASE,
	.name = "ease",
	.sections = 1u << AFF_SEC_ITEM_WEIGHTS,
	.options = AFF_OPT_BIT(AFF_OPT_REGULARIZATION) | AFF_OPT_BIT(AFF_OPT_MAX_ITEMS) |
	AFF_OPT_BIT(AFF_OPT_THREADS) | AFF_OPT_BIT(AFF_OPT_MIN_USER) |
	AFF_OPT_BIT(AFF_OPT_MIN_ITEM),
	.personal = true,
	.fit = ease_fit,
	.user_scores = ease_user_scores,
	.basket_scores = ease_basket_scores,
	.item_row = ease_item_row,
	.pair_score = ease_pair_score,
	.contributions = ease_contributions,
};
