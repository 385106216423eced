/*
 * weights.h
 *		Item-item weight methods: EASE (dense weights) and item_knn (sparse
 *		neighbour lists).  Fitting fills the method's model sections; serving
 *		turns a user's training items into scores.
 */
#ifndef AFFINITY_WEIGHTS_H
#define AFFINITY_WEIGHTS_H

#include "affinity_pg.h"
#include "../core/interactions.h"

/* Fill the method's sections of parts from m (errors are raised). */
extern void fit_ease(const AffMatrix *m, const FitOptions *o,
					 const AffAllocator *a, AffModelParts *parts);
extern void fit_item_knn(const AffMatrix *m, const FitOptions *o,
						 const AffAllocator *a, AffModelParts *parts);

/*
 * scores[j] (all n_items, overwritten) for a user whose training items are
 * items[0..n) with summed weights weights[0..n).  Both methods score with
 * the binary row of the user (weights are not used): the sum over the
 * user's items i of weights_pair(v, i, j).
 */
extern void weights_scores(const AffModelView *v, const int32 *items,
						   const float *weights, int64 n, float *scores);

/* sims[j]: the learned weight of item j for item it (all n_items). */
extern void weights_item_row(const AffModelView *v, int64 it, float *sims);

/*
 * Mark in skip[] (n_items bytes, not cleared) the items that are no answer
 * to "items like it": it itself, and for item_knn every item outside it's
 * neighbour list (whose weight 0 means "not a neighbour", not a score).
 */
extern void weights_item_skip(const AffModelView *v, int64 it, uint8 *skip);

/*
 * The contribution of training item i to the score of item j: B[i][j] for
 * ease, the similarity of j in i's neighbour list for item_knn (0 when j
 * is not in it).
 */
extern float weights_pair(const AffModelView *v, int32 i, int32 j);

#endif
