/*
 * serving.c
 *		Per-request serving: top_items for a known user or for a basket,
 *		items_like, users_like, score and reasons.
 *
 * Every function reads the model through the per-backend cache
 * (model_cache.c), parses its arguments into index space (keys become
 * dense indices by binary search in the sorted dictionaries, exclusions a
 * byte mask over items, candidate lists a sorted index list), calls the
 * model's method (core/method.h) for the scores and the engine's top-k
 * kernel (core/serve.c) for the best k, and emits the rows.  An unknown
 * user or item is not an error.
 */
#include "serving_common.h"

#include <float.h>
#include <limits.h>
#include <math.h>

#include "catalog/pg_type.h"
#include "funcapi.h"
#include "mb/pg_wchar.h"
#include "utils/array.h"
#include "utils/builtins.h"

#include "../core/profiles.h"
#include "../core/serve.h"
#include "text_keys.h"

/*
 * Scores of all items for a known user u (index), through the model's
 * method (kept with this name and signature for the metrics aggregate).
 */
void
user_scores(const AffModelView *v, int64 u, float *scores)
{
	AffServe	s;

	memset(&s, 0, sizeof(s));
	s.v = v;
	model_method(v)->user_scores(&s, u, scores);
}

/*
 * The best k of scores over the items that flt lets through, emitted as
 * (key, score, rank) rows.  A considered score that is not finite is an
 * error naming it and whose scores they are: request, followed by the key
 * of index who (a user when who_users) when who >= 0.
 */
static void
emit_best(FunctionCallInfo fcinfo, CachedModel *e, const float *scores,
		  const AffItemFilter *flt, int64 k, bool users, const char *request,
		  int64 who, bool who_users, const char *source, const AffRules *rules)
{
	const AffModelView *v = &e->view;
	bool		ruled = rules != NULL && aff_rules_active(rules);
	int64		want = ruled ? rules->pool : k;
	AffTopK		t;
	int64		bad;
	AffServe	s;
	AffAllocator a;
	AffScored  *out;
	int64		n;

	aff_topk_init(&t, palloc(sizeof(AffScored) * Max(want, 1)), want);
	bad = aff_topk_scores(scores, users ? v->h->n_users : v->h->n_items, flt, &t);
	if (bad >= 0)
		check_finite_scores(v, users, bad,
							who < 0 ? request :
							psprintf("%s %s", request, key_cstring(v, who_users, who)));
	if (!ruled)
	{
		emit_topk(fcinfo, &t, v, users, source);
		return;
	}
	/* the best pool items, re-ranked by the rules (rules.c) */
	n = aff_topk_finish(&t);
	serve_context(e, &s, &a, SERVE_ITEM_NORMS);
	out = palloc(sizeof(AffScored) * Max(k, 1));
	n = rules_rank(&s, rules, rules_scratch(v, rules), t.heap, n, k, out);
	emit_scored(fcinfo, out, n, v, users, source);
}

/*
 * What top_items and the batch say of where a row came from (the result's
 * source column): the user's own scores, the scores of the basket given,
 * or the model's popularity (an unknown user or a basket of unknown items
 * falling back, or a model that is popularity itself).
 */
const char *const affinity_source_personal = "personal";
const char *const affinity_source_basket = "basket";
const char *const affinity_source_popular = "popular";

/*
 * A user key that top_items does not know, given as text that reads like
 * an array literal ('{A,B}'), is almost surely a cart whose literal was
 * left without a type: PostgreSQL resolves an untyped literal to text, so
 * the call took the user form.  Say so once per call.
 */
static void
notice_cart_literal(FunctionCallInfo fcinfo, int argno)
{
	text	   *t;
	int			len;
	const char *p;

	if (get_fn_expr_argtype(fcinfo->flinfo, argno) != TEXTOID)
		return;
	t = PG_GETARG_TEXT_PP(argno);
	len = VARSIZE_ANY_EXHDR(t);
	p = VARDATA_ANY(t);
	while (len > 0 && (*p == ' ' || *p == '\t'))
		p++, len--;
	while (len > 0 && (p[len - 1] == ' ' || p[len - 1] == '\t'))
		len--;
	if (len >= 2 && p[0] == '{' && p[len - 1] == '}')
	{
		int			cut = pg_mbcliplen(p, len, 64);

		ereport(NOTICE,
				(errmsg("user \"%.*s%s\" is not in the model: these are its popular items",
						cut, p, cut < len ? "..." : ""),
				 errdetail("The key reads like an array literal, but PostgreSQL took the untyped literal as one user's key."),
				 errhint("For the items of a cart, give the array its type: '{...}'::text[] (or ::bigint[]).")));
	}
}

/* Raise the error of a serving operation that failed. */
static void
serve_check(AffStatus st, const AffError *err)
{
	if (st != AFF_OK)
		raise_engine_error(err);
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

/* The candidate list of argument argno (when not NULL) into flt. */
static void
candidate_items(FunctionCallInfo fcinfo, int argno, const AffModelView *v,
				AffItemFilter *flt)
{
	int			n = 0;

	if (PG_ARGISNULL(argno))
		return;
	flt->cand = array_key_indices(fcinfo, argno, v, false, &n);
	flt->n_cand = n;
}

static float *
alloc_scores(const AffModelView *v)
{
	return palloc_extended(sizeof(float) * v->h->n_items, MCXT_ALLOC_HUGE);
}

PG_FUNCTION_INFO_V1(affinity_top_items);

/*
 * top_items(model, user_id, k, exclude_seen, exclude, candidates,
 *			 fallback_popular) -> (item_id, score, rank, source)
 */
Datum
affinity_top_items(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	const AffModelView *v;
	const AffMethod *meth;
	AffServe	s;
	AffAllocator a;
	AffItemFilter flt;
	int64		k;
	int64		u;
	uint8	   *skip;
	float	   *scores;
	AffRules	rules;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	e = model_get(fcinfo, 0);
	v = &e->view;
	meth = model_method(v);
	check_output_keys(fcinfo, v, 0, false);
	k = get_k(fcinfo, 2, v->h->n_items);
	require_arg(fcinfo, 3, "exclude_seen");
	require_arg(fcinfo, 6, "fallback_popular");
	/* 1.3 declares rules eighth; a 1.2 database has seven arguments */
	(void) rules_parse(fcinfo, PG_NARGS() >= 8 ? 7 : -1, v, k, &rules);
	u = key_arg_index(fcinfo, 1, v, true);
	if (u < 0)
		notice_cart_literal(fcinfo, 1);
	if (k == 0 || (u < 0 && !PG_GETARG_BOOL(6)))
		return (Datum) 0;

	memset(&flt, 0, sizeof(flt));
	if (u >= 0 && PG_GETARG_BOOL(3))
	{
		flt.seen = v->seen_items + v->seen_ptr[u];
		flt.n_seen = v->seen_ptr[u + 1] - v->seen_ptr[u];
	}
	skip = palloc0(v->h->n_items);
	mask_items(fcinfo, 4, v, skip);
	flt.skip = skip;
	candidate_items(fcinfo, 5, v, &flt);

	scores = alloc_scores(v);
	memset(&s, 0, sizeof(s));
	s.v = v;
	s.alloc = &a;
	a = context_allocator(CurrentMemoryContext);
	if (u < 0)
		memcpy(scores, v->popularity, sizeof(float) * v->h->n_items);
	else if (flt.cand != NULL && meth->candidate_scores != NULL)
		meth->candidate_scores(&s, u, flt.cand, flt.n_cand, scores);
	else
		meth->user_scores(&s, u, scores);
	emit_best(fcinfo, e, scores, &flt, k, false, u < 0 ? "an unknown user" : "user", u, true,
			  u >= 0 && meth->personal ? affinity_source_personal : affinity_source_popular,
			  &rules);
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
	bool		text_call = require_array_keys(fcinfo, argno_b, v, false);
	Datum	   *be;
	bool	   *bn;
	int			nb;
	Datum	   *we = NULL;
	bool	   *wn = NULL;
	int			nw = 0;
	double	   *acc = NULL;
	int32	   *idx;
	float	   *w;
	int			n = 0;
	int			i;

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
	acc = palloc_extended(sizeof(double) * v->h->n_items, MCXT_ALLOC_HUGE | MCXT_ALLOC_ZERO);
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
		j = key_elem_index(v, false, be[i], text_call);
		if (j < 0)
			continue;
		if (acc[j] == 0)
			idx[n++] = (int32) j;
		/* summed in double: a sum beyond the range of real is refused */
		acc[j] += wi;
		if (acc[j] > FLT_MAX)
			ereport(ERROR,
					(errcode(ERRCODE_NUMERIC_VALUE_OUT_OF_RANGE),
					 errmsg("basket weights add up beyond the range of real"),
					 errdetail("The weights of basket item %s add up to %g at element %d; the largest real is %g.",
							   key_cstring(v, false, j), acc[j], i + 1, (double) FLT_MAX),
					 errhint("Give each item once with its total weight, scaled down.")));
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
	AFF_ASSERT(n <= nb);
	for (i = 0; i < n; i++)
	{
		AFF_ASSERT(i == 0 || idx[i - 1] < idx[i]);
		AFF_ASSERT(acc[idx[i]] > 0 && acc[idx[i]] <= FLT_MAX);
		w[i] = (float) acc[idx[i]];
	}
	pfree(acc);
	*idx_out = idx;
	*w_out = w;
	return n;
}

PG_FUNCTION_INFO_V1(affinity_top_items_basket);

/*
 * Where the basket form's arguments are: 1.3 declares (model, basket, k,
 * exclude_seen, exclude, candidates, fallback_popular, weights, rules), the
 * user form's order with weights and rules last; a database not yet updated from 1.2
 * declares (model, basket, k, weights, exclude_seen, exclude, candidates)
 * and is served as it was (a basket of unknown items falls back).
 */
typedef struct BasketArgs
{
	int			weights;
	int			exclude_seen;
	int			exclude;
	int			candidates;
	int			fallback;		/* -1: always fall back */
	int			rules;			/* -1: none */
} BasketArgs;

static const BasketArgs basket_args_1_3 = {7, 3, 4, 5, 6, 8};
static const BasketArgs basket_args_1_2 = {3, 4, 5, 6, -1, -1};

/*
 * top_items(model, basket, k, exclude_seen, exclude, candidates,
 *			 fallback_popular, weights) -> (item_id, score, rank, source)
 * For a user the model has never seen.  A basket with no known item gets
 * the most popular items (unless fallback_popular is false).
 */
Datum
affinity_top_items_basket(PG_FUNCTION_ARGS)
{
	const BasketArgs *ba = PG_NARGS() >= 9 ? &basket_args_1_3 : &basket_args_1_2;
	CachedModel *e;
	const AffModelView *v;
	const AffMethod *meth;
	AffServe	s;
	AffAllocator a;
	AffItemFilter flt;
	AffError	err;
	int64		k;
	int32	   *idx;
	float	   *w;
	int			n;
	uint8	   *skip;
	float	   *scores;
	int			i;
	AffRules	rules;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	e = model_get(fcinfo, 0);
	v = &e->view;
	meth = model_method(v);
	check_output_keys(fcinfo, v, 0, false);
	k = get_k(fcinfo, 2, v->h->n_items);
	require_arg(fcinfo, ba->exclude_seen, "exclude_seen");
	if (ba->fallback >= 0)
		require_arg(fcinfo, ba->fallback, "fallback_popular");
	if (k == 0)
		return (Datum) 0;
	(void) rules_parse(fcinfo, ba->rules, v, k, &rules);
	n = basket_items(fcinfo, v, 1, ba->weights, &idx, &w);
	if (n == 0 && ba->fallback >= 0 && !PG_GETARG_BOOL(ba->fallback))
		return (Datum) 0;

	skip = palloc0(v->h->n_items);
	if (PG_GETARG_BOOL(ba->exclude_seen))
		for (i = 0; i < n; i++)
			skip[idx[i]] = 1;
	mask_items(fcinfo, ba->exclude, v, skip);
	memset(&flt, 0, sizeof(flt));
	flt.skip = skip;
	candidate_items(fcinfo, ba->candidates, v, &flt);

	scores = alloc_scores(v);
	if (n == 0)
		memcpy(scores, v->popularity, sizeof(float) * v->h->n_items);
	else
	{
		serve_context(e, &s, &a, SERVE_GRAM);
		serve_check(meth->basket_scores(&s, idx, w, n, scores, &err), &err);
	}
	emit_best(fcinfo, e, scores, &flt, k, false, "the basket", -1, false,
			  n > 0 && meth->personal ? affinity_source_basket : affinity_source_popular,
			  &rules);
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(affinity_items_like);

/*
 * items_like(model, item_id, k, candidates) -> (item_id, similarity, rank):
 * the method's item-to-item row (cosine of item factors for implicit_als,
 * the learned weights for ease and item_knn).
 */
Datum
affinity_items_like(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	const AffModelView *v;
	const AffMethod *meth;
	AffServe	s;
	AffAllocator a;
	AffItemFilter flt;
	int64		k;
	int64		it;
	float	   *sims;
	uint8	   *skip;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	e = model_get(fcinfo, 0);
	v = &e->view;
	meth = model_method(v);
	check_output_keys(fcinfo, v, 0, false);
	if (meth->item_row == NULL)
		ereport(ERROR,
				(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
				 errmsg("items_like needs a model that relates items to items"),
				 errdetail("This model was fitted with method \"%s\", which has no item-to-item similarities.",
						   aff_method_name(v->h->method)),
				 errhint("Fit with method \"implicit_als\" (cosine of item factors), \"ease\" or \"item_knn\" (learned item-to-item weights).")));
	k = get_k(fcinfo, 2, v->h->n_items);
	it = key_arg_index(fcinfo, 1, v, false);
	if (it < 0 || k == 0)
		return (Datum) 0;
	memset(&flt, 0, sizeof(flt));
	candidate_items(fcinfo, 3, v, &flt);

	serve_context(e, &s, &a, SERVE_ITEM_NORMS);
	sims = alloc_scores(v);
	skip = palloc(v->h->n_items);
	meth->item_row(&s, it, sims, skip);
	flt.skip = skip;
	emit_best(fcinfo, e, sims, &flt, k, false, "the items like item", it, false, NULL, NULL);
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(affinity_users_like);

/* users_like(model, user_id, k) -> (user_id, similarity, rank) */
Datum
affinity_users_like(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	const AffModelView *v;
	AffServe	s;
	AffAllocator a;
	AffItemFilter flt;
	int64		k;
	int64		u;
	float	   *sims;
	uint8	   *skip;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1))
		return (Datum) 0;
	e = model_get(fcinfo, 0);
	v = &e->view;
	if (!model_method(v)->user_vectors)
		ereport(ERROR,
				(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
				 errmsg("users_like needs a model with user factors"),
				 errdetail("This model was fitted with method \"%s\".",
						   aff_method_name(v->h->method)),
				 errhint("Fit with method \"implicit_als\".")));
	check_output_keys(fcinfo, v, 0, true);
	k = get_k(fcinfo, 2, v->h->n_users);
	u = key_arg_index(fcinfo, 1, v, true);
	if (u < 0 || k == 0)
		return (Datum) 0;
	serve_context(e, &s, &a, SERVE_USER_NORMS);
	sims = palloc_extended(sizeof(float) * v->h->n_users, MCXT_ALLOC_HUGE);
	skip = palloc_extended(v->h->n_users, MCXT_ALLOC_HUGE | MCXT_ALLOC_ZERO);
	aff_cosine_row(v->user_factors, s.user_norms, v->h->n_users, v->h->factors, u, sims);
	skip[u] = 1;
	memset(&flt, 0, sizeof(flt));
	flt.skip = skip;
	emit_best(fcinfo, e, sims, &flt, k, true, "the users like user", u, true, NULL, NULL);
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(affinity_score);

/* score(model, user_id, item_id) -> real, NULL when either is unknown */
Datum
affinity_score(PG_FUNCTION_ARGS)
{
	AffModelView v;
	AffServe	s;
	int64		u;
	int64		i;

	model_fetch(fcinfo, 0, &v);
	u = key_arg_index(fcinfo, 1, &v, true);
	i = key_arg_index(fcinfo, 2, &v, false);
	if (u < 0 || i < 0)
		PG_RETURN_NULL();
	memset(&s, 0, sizeof(s));
	s.v = &v;
	PG_RETURN_FLOAT4(model_method(&v)->pair_score(&s, u, i));
}

/*
 * Offer the shares contrib[0 .. n) to a heap of the k largest (t, left
 * unfinished), for reasons and feature_reasons; returns the first position
 * whose share is not finite (not offered), or -1.
 */
static int64
rank_shares(const float *contrib, int64 n, int64 k, AffTopK *t)
{
	AffItemFilter flt;

	aff_topk_init(t, palloc(sizeof(AffScored) * Max(Min(k, n), 1)), Min(k, n));
	memset(&flt, 0, sizeof(flt));
	return aff_topk_scores(contrib, n, &flt, t);
}

PG_FUNCTION_INFO_V1(affinity_reasons);

/*
 * reasons(model, user_id, item_id, k) -> (past_item_id, contribution,
 * rank): which of the user's training items push this item up, and by how
 * much.
 */
Datum
affinity_reasons(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	const AffModelView *v;
	const AffMethod *meth;
	AffServe	s;
	AffAllocator a;
	AffError	err;
	int64		k;
	int64		u;
	int64		i;
	int64		n;
	float	   *contrib;
	AffTopK		t;
	int64		r;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1) || PG_ARGISNULL(2))
		return (Datum) 0;
	e = model_get(fcinfo, 0);
	v = &e->view;
	meth = model_method(v);
	if (meth->contributions == NULL)
		ereport(ERROR,
				(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
				 errmsg("reasons needs a personalised model"),
				 errdetail("A popularity model ranks by buyer counts alone."),
				 errhint("Fit with method \"implicit_als\", \"ease\" or \"item_knn\".")));
	check_output_keys(fcinfo, v, 0, false);
	k = get_k(fcinfo, 3, v->h->nnz);
	u = key_arg_index(fcinfo, 1, v, true);
	i = key_arg_index(fcinfo, 2, v, false);
	if (u < 0 || i < 0 || k == 0)
		return (Datum) 0;
	n = v->seen_ptr[u + 1] - v->seen_ptr[u];
	contrib = palloc(sizeof(float) * (n + 1));
	serve_context(e, &s, &a, SERVE_GRAM);
	serve_check(meth->contributions(&s, u, i, contrib, &err), &err);

	/* heap over positions in the training list; they follow key order */
	r = rank_shares(contrib, n, k, &t);
	if (r >= 0)
		ereport(ERROR,
				(errcode(ERRCODE_NUMERIC_VALUE_OUT_OF_RANGE),
				 errmsg("a contribution is not finite"),
				 errdetail("The contribution of item %s to the score of item %s for user %s overflowed the range of real.",
						   key_cstring(v, false, v->seen_items[v->seen_ptr[u] + r]),
						   key_cstring(v, false, i), key_cstring(v, true, u)),
				 errhint("The model's vectors are too large for float arithmetic; refit with a larger regularization.")));
	n = aff_topk_finish(&t);
	for (r = 0; r < n; r++)
	{
		Datum		values[3];

		values[0] = key_datum(v, false, v->seen_items[v->seen_ptr[u] + t.heap[r].index]);
		values[1] = Float4GetDatum(t.heap[r].score);
		values[2] = Int32GetDatum((int32) (r + 1));
		put_row(fcinfo, values);
	}
	return (Datum) 0;
}

PG_FUNCTION_INFO_V1(affinity_feature_reasons);

/*
 * The name of feature f of a model over item features: its text for
 * feature rows, "dimension N" (from 1) for dense vectors.
 */
static Datum
feature_name(const AffModelView *v, int32 f)
{
	const int64 *info = v->sections[AFF_SEC_PROFILE_INFO];
	const int64 *off = v->sections[AFF_SEC_FEATURE_TEXT_OFF];
	const char *text = v->sections[AFF_SEC_FEATURE_TEXT];

	if (info[AFF_PINFO_KIND] == AFF_PROFILE_DENSE || off == NULL)
		return CStringGetTextDatum(psprintf("dimension %d", f + 1));
	return PointerGetDatum(cstring_to_text_with_len(text + off[f], (int) (off[f + 1] - off[f])));
}

/*
 * feature_reasons(model, user_id, item_id, k) -> (feature, contribution,
 * rank): which of the item's features push it up for the user, and by how
 * much (a model over item features: method content).
 */
Datum
affinity_feature_reasons(PG_FUNCTION_ARGS)
{
	CachedModel *e;
	const AffModelView *v;
	const AffMethod *meth;
	AffServe	s;
	AffAllocator a;
	int64		k;
	int64		u;
	int64		i;
	int64		n;
	int64		r;
	int32	   *feat;
	float	   *contrib;
	AffTopK		t;

	materialize(fcinfo);
	if (PG_ARGISNULL(0) || PG_ARGISNULL(1) || PG_ARGISNULL(2))
		return (Datum) 0;
	e = model_get(fcinfo, 0);
	v = &e->view;
	meth = model_method(v);
	if (meth->feature_contributions == NULL)
		ereport(ERROR,
				(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
				 errmsg("feature_reasons needs a model over item features"),
				 errdetail("This model was fitted with method \"%s\", which scores no item features.",
						   aff_method_name(v->h->method)),
				 errhint("Fit with method \"content\" and item profiles; affinity.reasons names the past purchases behind a score for any personal model.")));
	k = get_k(fcinfo, 3, INT_MAX);
	u = key_arg_index(fcinfo, 1, v, true);
	i = key_arg_index(fcinfo, 2, v, false);
	if (u < 0 || i < 0 || k == 0)
		return (Datum) 0;
	n = ((const int64 *) v->sections[AFF_SEC_PROFILE_INFO])[AFF_PINFO_FEATURES];
	feat = palloc(sizeof(int32) * (n + 1));
	contrib = palloc(sizeof(float) * (n + 1));
	serve_context(e, &s, &a, 0);
	n = meth->feature_contributions(&s, u, i, feat, contrib);

	/* the largest shares first, as reasons ranks past purchases */
	r = rank_shares(contrib, n, k, &t);
	if (r >= 0)
		ereport(ERROR,
				(errcode(ERRCODE_NUMERIC_VALUE_OUT_OF_RANGE),
				 errmsg("a contribution is not finite"),
				 errdetail("The contribution of feature %s to the score of item %s for user %s overflowed the range of real.",
						   TextDatumGetCString(feature_name(v, feat[r])),
						   key_cstring(v, false, i), key_cstring(v, true, u)),
				 errhint("The model's vectors are too large for float arithmetic; refit with a larger regularization.")));
	n = aff_topk_finish(&t);
	for (r = 0; r < n; r++)
	{
		Datum		values[3];

		values[0] = feature_name(v, feat[t.heap[r].index]);
		values[1] = Float4GetDatum(t.heap[r].score);
		values[2] = Int32GetDatum((int32) (r + 1));
		put_row(fcinfo, values);
	}
	return (Datum) 0;
}
