/*
 * method_weights.h
 *		Serving shared by the item-item weight methods (ease, item_knn): a
 *		user's score for item j is the sum over the user's training items i
 *		of the weight of the pair (i, j), with the user's row taken as
 *		binary, as in the EASE paper (Steck 2019); a basket's scores weigh
 *		each item's row by its weight (1 when none is given).
 */
#ifndef AFF_METHOD_WEIGHTS_H
#define AFF_METHOD_WEIGHTS_H

#include "method.h"

/* The learned weight of the pair (i, j): 0 when the method keeps none. */
typedef float (*AffPairWeightFn) (const AffModelView *v, int32_t i, int32_t j);
/* scores += scale * the weights row of item i (all n_items) */
typedef void (*AffAddRowFn) (const AffModelView *v, int32_t i, float scale, float *scores);

extern void aff_weights_scores(const AffModelView *v, AffAddRowFn add_row,
							   const int32_t *items, const float *w, int64_t n,
							   float *scores);
extern float aff_weights_pair_sum(const AffModelView *v, AffPairWeightFn pair,
								  int64_t u, int64_t i);
extern void aff_weights_contributions(const AffModelView *v, AffPairWeightFn pair,
									  int64_t u, int64_t i, float *contrib);
extern double aff_megabytes(double bytes);
extern uint64_t aff_model_size_with(const AffModelParts *parts, int kind,
									uint64_t count);

#endif							/* AFF_METHOD_WEIGHTS_H */
