/*
 * method_popularity.c
 *		popularity as a method: every user gets the items with the most
 *		distinct training users.  Nothing to fit beyond the common
 *		sections (the popularity section is written for every method).
 */
#include "method.h"

#include <string.h>

static AffStatus
popularity_fit(const AffMatrix *m, const AffOptions *o, const AffFitContext *cx,
			   AffModelParts *parts, AffError *err)
{
	(void) m;
	(void) o;
	(void) cx;
	(void) parts;
	(void) err;
	return AFF_OK;
}

static void
popularity_user_scores(const AffServe *s, int64_t u, float *scores)
{
	(void) u;
	memcpy(scores, s->v->popularity, sizeof(float) * (size_t) s->v->h->n_items);
}

static AffStatus
popularity_basket_scores(const AffServe *s, const int32_t *idx, const float *w,
						 int64_t n, float *scores, AffError *err)
{
	(void) idx;
	(void) w;
	(void) n;
	(void) err;
	popularity_user_scores(s, 0, scores);
	return AFF_OK;
}

static float
popularity_pair_score(const AffServe *s, int64_t u, int64_t i)
{
	(void) u;
	return s->v->popularity[i];
}

const AffMethod aff_method_popularity = {
	.code = AFF_METHOD_POPULARITY,
	.name = "popularity",
	.sections = 0,
	.options = AFF_OPT_BIT(AFF_OPT_MIN_USER) | AFF_OPT_BIT(AFF_OPT_MIN_ITEM),
	.fit = popularity_fit,
	.user_scores = popularity_user_scores,
	.basket_scores = popularity_basket_scores,
	.pair_score = popularity_pair_score,
};
