/*
 * serving.c
 *		Per-request serving: top_items for a known user or for a basket,
 *		items_like, users_like, score and reasons.
 *
 * Every function reads the model through the per-backend cache
 * (model_cache.c) and works in index space: keys become dense indices by
 * binary search in the sorted dictionaries, exclusions a byte mask over
 * items, candidate lists a sorted index list, and the best k come from a
 * bounded heap (core/topk.c), never a full sort.  An unknown user or item
 * is not an error.
 */
#include "serving_common.h"

#include <cblas.h>
#include <math.h>

#include "catalog/pg_type.h"
#include "funcapi.h"
#include "utils/array.h"

#include "../core/als.h"
#include "text_keys.h"
#include "weights.h"

/*
 * Scores of all items for a known user u (index): x_u . y_i for
 * implicit_als, the training items' weights for ease and item_knn,
 * popularity otherwise.
 */
void
user_scores(const AffModelView *v, int64 u, float *scores)
{
	int64		lo = v->seen_ptr[u];

	switch (v->h->method)
	{
		case AFF_METHOD_IMPLICIT_ALS:
			cblas_sgemv(CblasRowMajor, CblasNoTrans, (int) v->h->n_items,
						v->h->factors, 1.0f, v->item_factors, v->h->factors,
						v->user_factors + (size_t) u * v->h->factors, 1, 0.0f,
						scores, 1);
			break;
		case AFF_METHOD_EASE:
		case AFF_METHOD_ITEM_KNN:
			weights_scores(v, v->seen_items + lo, v->seen_weights + lo,
						   v->seen_ptr[u + 1] - lo, scores);
			break;
		default:
			memcpy(scores, v->popularity, sizeof(float) * v->h->n_items);
	}
}

/*
 * The best k of scores over the items not masked by skip (all items, or
 * only cand[0..n_cand) when cand is given), emitted as rows.
 */
static void
emit_best(FunctionCallInfo fcinfo, const AffModelView *v, const float *scores,
		  const uint8 *skip, const int32 *cand, int n_cand, int64 k)
{
	AffTopK		t;
	int64		i;

	aff_topk_init(&t, palloc(sizeof(AffScored) * k), k);
	if (cand == NULL)
	{
		/* a full heap's worst bounds what can enter (indices rise: ties lose) */
		for (i = 0; i < v->h->n_items; i++)
			if (!skip[i] && (t.n < t.k || scores[i] > t.heap[0].score))
				aff_topk_push(&t, scores[i], (int32) i);
	}
	else
		for (i = 0; i < n_cand; i++)
			if (!skip[cand[i]])
				aff_topk_push(&t, scores[cand[i]], cand[i]);
	emit_topk(fcinfo, &t, v, false);
}

/* Mark the items of the bigint[] argument argno (when not NULL) in skip. */
static void
mask_items(FunctionCallInfo fcinfo, int argno, const AffModelView *v, uint8 *skip)
{
	int			n;
	int32	   *idx;
	int			i;

	if (PG_ARGISNULL(argno))
		return;
	idx = array_key_indices(fcinfo, argno, v, false, &n);
	for (i = 0; i < n; i++)
		skip[idx[i]] = 1;
}

static float *
alloc_scores(const AffModelView *v)
{
	return palloc_extended(sizeof(float) * v->h->n_items, MCXT_ALLOC_HUGE);
}

PG_FUNCTION_INFO_V1(top_items);

/*
 * top_items(model, user_id, k, exclude_seen, exclude, candidates,
 *			 fallback_popular) -> (item_id, score, rank)
 */
Datum
top_items(PG_FUNCTION_ARGS)
{
	AffModelView v;
	int64		k;
	int64		u;
	uint8	   *skip;
	int32	   *cand = NULL;
	int			n_cand = 0;
	float	   *scores;
	int64		j;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	model_fetch(fcinfo, 0, &v);
	check_output_keys(fcinfo, &v, 0);
	k = get_k(fcinfo, 2, v.h->n_items);
	require_arg(fcinfo, 3, "exclude_seen");
	require_arg(fcinfo, 6, "fallback_popular");
	u = key_arg_index(fcinfo, 1, &v, true);
	if (k == 0 || (u < 0 && !PG_GETARG_BOOL(6)))
		return (Datum) 0;

	skip = palloc0(v.h->n_items);
	if (u >= 0 && PG_GETARG_BOOL(3))
		for (j = v.seen_ptr[u]; j < v.seen_ptr[u + 1]; j++)
			skip[v.seen_items[j]] = 1;
	mask_items(fcinfo, 4, &v, skip);
	if (!PG_ARGISNULL(5))
		cand = array_key_indices(fcinfo, 5, &v, false, &n_cand);

	scores = alloc_scores(&v);
	if (u < 0)
		memcpy(scores, v.popularity, sizeof(float) * v.h->n_items);
	else if (cand != NULL && v.h->method == AFF_METHOD_IMPLICIT_ALS)
	{
		/* a short candidate list costs one dot product per candidate */
		const float *x = v.user_factors + (size_t) u * v.h->factors;

		for (j = 0; j < n_cand; j++)
			scores[cand[j]] = dot_f(v.item_factors + (size_t) cand[j] * v.h->factors,
									x, v.h->factors);
	}
	else
		user_scores(&v, u, scores);
	emit_best(fcinfo, &v, scores, skip, cand, n_cand, k);
	return (Datum) 0;
}

/*
 * The basket argument as sorted known item indices with summed weights.
 * weights (argno_w, may be NULL) must match the basket's length; NULL
 * elements of the basket are skipped, weights must be finite and >= 0.
 */
static int
basket_items(FunctionCallInfo fcinfo, const AffModelView *v, int argno_b,
			 int argno_w, int32 **idx_out, float **w_out)
{
	ArrayType  *b = PG_GETARG_ARRAYTYPE_P(argno_b);
	bool		text_call = ARR_ELEMTYPE(b) == TEXTOID;
	Datum	   *be;
	bool	   *bn;
	int			nb;
	Datum	   *we = NULL;
	bool	   *wn = NULL;
	int			nw = 0;
	float	   *acc = NULL;
	int32	   *idx;
	float	   *w;
	int			n = 0;
	int			i;

	if ((v->h->key_type == AFF_KEYS_TEXT) != text_call)
	{
		int			dummy;

		(void) array_key_indices(fcinfo, argno_b, v, false, &dummy);	/* raises the mismatch */
	}
	if (text_call)
		deconstruct_array(b, TEXTOID, -1, false, TYPALIGN_INT, &be, &bn, &nb);
	else
		deconstruct_array(b, INT8OID, 8, true, TYPALIGN_DOUBLE, &be, &bn, &nb);
	if (!PG_ARGISNULL(argno_w))
	{
		deconstruct_array(PG_GETARG_ARRAYTYPE_P(argno_w), FLOAT4OID, 4, true,
						  TYPALIGN_INT, &we, &wn, &nw);
		if (nw != nb)
			ereport(ERROR,
					(errcode(ERRCODE_ARRAY_SUBSCRIPT_ERROR),
					 errmsg("weights must have one entry per basket item"),
					 errdetail("The basket has %d items and weights has %d entries.", nb, nw)));
	}
	acc = palloc0(sizeof(float) * v->h->n_items);
	idx = palloc(sizeof(int32) * (nb + 1));
	w = palloc(sizeof(float) * (nb + 1));
	for (i = 0; i < nb; i++)
	{
		int64		j;
		float		wi = 1.0f;

		if (we != NULL)
		{
			wi = wn[i] ? 0.0f : DatumGetFloat4(we[i]);
			if (!(wi >= 0) || isinf(wi))
				ereport(ERROR,
						(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
						 errmsg("basket weights must be finite and not negative"),
						 errdetail("Weight %d is %g.", i + 1, (double) wi)));
		}
		if (bn[i] || wi == 0)
			continue;
		if (text_call)
		{
			text	   *t = DatumGetTextPP(be[i]);

			j = text_key_index(v, false, VARDATA_ANY(t), VARSIZE_ANY_EXHDR(t));
		}
		else
			j = aff_find_key(v->item_keys, v->h->n_items, DatumGetInt64(be[i]));
		if (j < 0)
			continue;
		if (acc[j] == 0)
			idx[n++] = (int32) j;
		acc[j] += wi;
	}
	/* ascending indices, as the engine's training lists are */
	for (i = 1; i < n; i++)
	{
		int32		t = idx[i];
		int			p = i - 1;

		while (p >= 0 && idx[p] > t)
		{
			idx[p + 1] = idx[p];
			p--;
		}
		idx[p + 1] = t;
	}
	for (i = 0; i < n; i++)
		w[i] = acc[idx[i]];
	pfree(acc);
	*idx_out = idx;
	*w_out = w;
	return n;
}

/*
 * Fold-in: the user vector that the fit's per-row problem gives for this
 * basket against the fixed item factors, solved exactly (Cholesky), with
 * the model's confidence, alpha, epsilon and regularization.
 */
static void
fold_in(CachedModel *e, const int32 *idx, const float *w, int n, float *x)
{
	const AffModelView *v = &e->view;
	const AffModelHeader *h = v->h;
	int			f = h->factors;
	float	   *conf = palloc(sizeof(float) * (n + 1));
	double	   *scratch = palloc(sizeof(double) * aff_solve_scratch_len(f));
	int			i;

	for (i = 0; i < n; i++)
		conf[i] = (float) aff_confidence(h->confidence, h->alpha, h->epsilon, w[i]);
	memset(x, 0, sizeof(float) * f);
	if (!aff_solve_row(v->item_factors, cached_gram(e), f, h->regularization,
					   idx, conf, n, AFF_SOLVER_CHOLESKY, 0, x, scratch))
		ereport(ERROR,
				(errcode(ERRCODE_NUMERIC_VALUE_OUT_OF_RANGE),
				 errmsg("the basket's least-squares system is not positive definite"),
				 errdetail("The model's regularization is %g.", h->regularization)));
}

PG_FUNCTION_INFO_V1(top_items_basket);

/*
 * top_items(model, basket bigint[], k, weights, exclude_seen, exclude,
 *			 candidates) -> (item_id, score, rank)
 * For a user the model has never seen.  A basket with no known item gets
 * the most popular items.
 */
Datum
top_items_basket(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	AffModelView v;
	int64		k;
	int32	   *idx;
	float	   *w;
	int			n;
	uint8	   *skip;
	int32	   *cand = NULL;
	int			n_cand = 0;
	float	   *scores;
	int			i;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	e = model_get(fcinfo, 0);
	v = e->view;
	check_output_keys(fcinfo, &v, 0);
	k = get_k(fcinfo, 2, v.h->n_items);
	require_arg(fcinfo, 4, "exclude_seen");
	if (k == 0)
		return (Datum) 0;
	n = basket_items(fcinfo, &v, 1, 3, &idx, &w);

	skip = palloc0(v.h->n_items);
	if (PG_GETARG_BOOL(4))
		for (i = 0; i < n; i++)
			skip[idx[i]] = 1;
	mask_items(fcinfo, 5, &v, skip);
	if (!PG_ARGISNULL(6))
		cand = array_key_indices(fcinfo, 6, &v, false, &n_cand);

	scores = alloc_scores(&v);
	if (n == 0 || v.h->method == AFF_METHOD_POPULARITY)
		memcpy(scores, v.popularity, sizeof(float) * v.h->n_items);
	else if (v.h->method == AFF_METHOD_IMPLICIT_ALS)
	{
		float	   *x = palloc(sizeof(float) * v.h->factors);

		fold_in(e, idx, w, n, x);
		cblas_sgemv(CblasRowMajor, CblasNoTrans, (int) v.h->n_items, v.h->factors,
					1.0f, v.item_factors, v.h->factors, x, 1, 0.0f, scores, 1);
	}
	else
		weights_scores(&v, idx, w, n, scores);
	emit_best(fcinfo, &v, scores, skip, cand, n_cand, k);
	return (Datum) 0;
}

/*
 * Cosine neighbours of row r of F (n rows of f) among all rows or the
 * candidates, the row itself left out.
 */
static void
emit_cosine(FunctionCallInfo fcinfo, const float *F, const float *norms,
			int64 n, int f, int64 r, const int32 *cand, int n_cand, int64 k,
			const AffModelView *v, bool users)
{
	const float *y = F + (size_t) r * f;
	AffTopK		t;
	int64		i;

	aff_topk_init(&t, palloc(sizeof(AffScored) * k), k);
	for (i = 0; i < (cand ? n_cand : n); i++)
	{
		int32		j = cand ? cand[i] : (int32) i;
		float		d = norms[r] * norms[j];

		if (j != r)
			aff_topk_push(&t, d > 0 ? dot_f(y, F + (size_t) j * f, f) / d : 0.0f, j);
	}
	emit_topk(fcinfo, &t, v, users);
}

PG_FUNCTION_INFO_V1(items_like);

/*
 * items_like(model, item_id, k, candidates) -> (item_id, similarity, rank):
 * cosine of item factors (implicit_als), the learned weights (ease,
 * item_knn).
 */
Datum
items_like(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	AffModelView v;
	int64		k;
	int64		it;
	int32	   *cand = NULL;
	int			n_cand = 0;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	e = model_get(fcinfo, 0);
	v = e->view;
	check_output_keys(fcinfo, &v, 0);
	if (v.h->method == AFF_METHOD_POPULARITY)
		require_factors(&v, "items_like");
	k = get_k(fcinfo, 2, v.h->n_items);
	it = key_arg_index(fcinfo, 1, &v, false);
	if (it < 0 || k == 0)
		return (Datum) 0;
	if (!PG_ARGISNULL(3))
		cand = array_key_indices(fcinfo, 3, &v, false, &n_cand);

	if (v.h->method == AFF_METHOD_IMPLICIT_ALS)
		emit_cosine(fcinfo, v.item_factors, cached_norms(e, false), v.h->n_items,
					v.h->factors, it, cand, n_cand, k, &v, false);
	else
	{
		float	   *sims = alloc_scores(&v);
		uint8	   *skip = palloc0(v.h->n_items);

		weights_item_row(&v, it, sims);
		weights_item_skip(&v, it, skip);
		emit_best(fcinfo, &v, sims, skip, cand, n_cand, k);
	}
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(users_like);

/* users_like(model, user_id, k) -> (user_id, similarity, rank) */
Datum
users_like(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	AffModelView v;
	int64		k;
	int64		u;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	e = model_get(fcinfo, 0);
	v = e->view;
	if (v.h->method != AFF_METHOD_IMPLICIT_ALS)
		ereport(ERROR,
				(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
				 errmsg("users_like needs a model with user factors"),
				 errdetail("This model was fitted with method \"%s\".",
						   aff_method_name(v.h->method)),
				 errhint("Fit with method \"implicit_als\".")));
	check_output_keys(fcinfo, &v, 0);
	k = get_k(fcinfo, 2, v.h->n_users);
	u = key_arg_index(fcinfo, 1, &v, true);
	if (u < 0 || k == 0)
		return (Datum) 0;
	emit_cosine(fcinfo, v.user_factors, cached_norms(e, true), v.h->n_users,
				v.h->factors, u, NULL, 0, k, &v, true);
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(score);

/* score(model, user_id, item_id) -> real, NULL when either is unknown */
Datum
score(PG_FUNCTION_ARGS)
{
	AffModelView v;
	int64		u;
	int64		i;

	model_fetch(fcinfo, 0, &v);
	u = key_arg_index(fcinfo, 1, &v, true);
	i = key_arg_index(fcinfo, 2, &v, false);
	if (u < 0 || i < 0)
		PG_RETURN_NULL();
	switch (v.h->method)
	{
		case AFF_METHOD_IMPLICIT_ALS:
			PG_RETURN_FLOAT4(dot_f(v.user_factors + (size_t) u * v.h->factors,
								   v.item_factors + (size_t) i * v.h->factors,
								   v.h->factors));
		case AFF_METHOD_EASE:
		case AFF_METHOD_ITEM_KNN:
			{
				float		s = 0;
				int64		j;

				for (j = v.seen_ptr[u]; j < v.seen_ptr[u + 1]; j++)
					s += weights_pair(&v, v.seen_items[j], (int32) i);
				PG_RETURN_FLOAT4(s);
			}
		default:
			PG_RETURN_FLOAT4(v.popularity[i]);
	}
}

/*
 * Contributions of the user's training items to the score of item i for
 * implicit_als (Hu, Koren, Volinsky 2008, section 5): with
 * W = (Y^T C_u Y + lambda I)^-1, training item j adds c_uj * y_i^T W y_j.
 * They add up to y_i . x where x is the user's vector solved exactly
 * against the current item factors.  contrib[j] gets one entry per
 * training item.
 */
static void
als_contributions(CachedModel *e, int64 u, int64 i, float *contrib)
{
	const AffModelView *v = &e->view;
	const AffModelHeader *h = v->h;
	int			f = h->factors;
	int64		lo = v->seen_ptr[u];
	int64		n = v->seen_ptr[u + 1] - lo;
	const int32 *idx = v->seen_items + lo;
	float	   *conf = palloc(sizeof(float) * (n + 1));
	double	   *scratch = palloc(sizeof(double) * aff_solve_scratch_len(f));
	float	   *z = palloc(sizeof(float) * f);
	int32		ii = (int32) i;
	int64		j;

	/* z = W y_i: the row system with b = y_i, i.e. one item of confidence 1 */
	for (j = 0; j < n; j++)
		conf[j] = (float) aff_confidence(h->confidence, h->alpha, h->epsilon,
										 v->seen_weights[lo + j]);
	if (!aff_solve_system(v->item_factors, cached_gram(e), f, h->regularization,
						  idx, conf, n, v->item_factors + (size_t) ii * f, z, scratch))
		ereport(ERROR,
				(errcode(ERRCODE_NUMERIC_VALUE_OUT_OF_RANGE),
				 errmsg("the user's least-squares system is not positive definite")));
	for (j = 0; j < n; j++)
		contrib[j] = conf[j] * dot_f(z, v->item_factors + (size_t) idx[j] * f, f);
}

PG_FUNCTION_INFO_V1(reasons);

/*
 * reasons(model, user_id, item_id, k) -> (past_item_id, contribution,
 * rank): which of the user's training items push this item up, and by how
 * much.
 */
Datum
reasons(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	AffModelView v;
	int64		k;
	int64		u;
	int64		i;
	int64		n;
	float	   *contrib;
	AffTopK		t;
	int64		j;
	int64		r;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1) || PG_ARGISNULL(2))
		return (Datum) 0;
	e = model_get(fcinfo, 0);
	v = e->view;
	if (v.h->method == AFF_METHOD_POPULARITY)
		ereport(ERROR,
				(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
				 errmsg("reasons needs a personalised model"),
				 errdetail("A popularity model ranks by buyer counts alone."),
				 errhint("Fit with method \"implicit_als\", \"ease\" or \"item_knn\".")));
	check_output_keys(fcinfo, &v, 0);
	k = get_k(fcinfo, 3, v.h->nnz);
	u = key_arg_index(fcinfo, 1, &v, true);
	i = key_arg_index(fcinfo, 2, &v, false);
	if (u < 0 || i < 0 || k == 0)
		return (Datum) 0;
	n = v.seen_ptr[u + 1] - v.seen_ptr[u];
	contrib = palloc(sizeof(float) * (n + 1));
	if (v.h->method == AFF_METHOD_IMPLICIT_ALS)
		als_contributions(e, u, i, contrib);
	else
		for (j = 0; j < n; j++)
			contrib[j] = weights_pair(&v, v.seen_items[v.seen_ptr[u] + j], (int32) i);

	/* heap over positions in the training list; they follow key order */
	aff_topk_init(&t, palloc(sizeof(AffScored) * Min(k, n)), Min(k, n));
	for (j = 0; j < n; j++)
		aff_topk_push(&t, contrib[j], (int32) j);
	n = aff_topk_finish(&t);
	for (r = 0; r < n; r++)
	{
		Datum		values[3];

		values[0] = key_datum(&v, false, v.seen_items[v.seen_ptr[u] + t.heap[r].index]);
		values[1] = Float4GetDatum(t.heap[r].score);
		values[2] = Int32GetDatum((int32) (r + 1));
		put_row(fcinfo, values);
	}
	return (Datum) 0;
}
