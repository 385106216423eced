/*
 * weights.c
 *		Item-item weight methods (EASE, item_knn): not yet implemented.
 */
#include "weights.h"

static void
not_yet(const char *what)
{
	ereport(ERROR,
			(errcode(ERRCODE_FEATURE_NOT_SUPPORTED),
			 errmsg("%s is not available in this version of affinity", what),
			 errhint("Use method \"implicit_als\" or \"popularity\".")));
}

void
fit_ease(const AffMatrix *m, const FitOptions *o, const AffAllocator *a,
		 AffModelParts *parts)
{
	not_yet("method \"ease\"");
}

void
fit_item_knn(const AffMatrix *m, const FitOptions *o, const AffAllocator *a,
			 AffModelParts *parts)
{
	not_yet("method \"item_knn\"");
}

void
weights_scores(const AffModelView *v, const int32 *items, const float *weights,
			   int64 n, float *scores)
{
	not_yet("serving item-item weights");
}

void
weights_item_row(const AffModelView *v, int64 it, float *sims)
{
	not_yet("serving item-item weights");
}
