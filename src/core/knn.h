/*
 * knn.h
 *		Item-item cosine neighbours of the confidence-weighted matrix.
 *
 * The matrix compared holds c_ui = 1 + alpha f(w_ui) (aff_confidence) on
 * the observed pairs and 0 elsewhere; the similarity of items i and j is the
 * cosine of their columns.  Each item keeps its `neighbors` most similar
 * other items with a positive similarity, best first (ties to the smaller
 * index), as a CSR list over items.
 */
#ifndef AFF_KNN_H
#define AFF_KNN_H

#include "aff_core.h"
#include "interactions.h"

typedef struct AffKnnParams
{
	int			neighbors;		/* kept per item, >= 1 */
	int			confidence;		/* AFF_CONFIDENCE_* */
	double		alpha;
	double		epsilon;
	int			threads;		/* >= 1, already resolved */
} AffKnnParams;

typedef struct AffNeighbors
{
	int64_t    *ptr;			/* [n_items + 1] */
	int32_t    *idx;			/* [count] neighbour indices */
	float	   *sim;			/* [count] similarities, descending per item */
	int64_t		count;
} AffNeighbors;

extern size_t aff_item_knn_work_bytes(const AffMatrix *m, const AffKnnParams *p);
extern AffStatus aff_item_knn(const AffMatrix *m, const AffKnnParams *p,
							  const AffAllocator *a, AffNeighbors *out,
							  AffPollFn poll, void *poll_arg, AffError *err);
extern void aff_neighbors_free(const AffAllocator *a, AffNeighbors *nb);

#endif							/* AFF_KNN_H */
