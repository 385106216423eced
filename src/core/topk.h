/*
 * topk.h
 *		Bounded selection of the k best (score, index) pairs.
 */
#ifndef AFF_TOPK_H
#define AFF_TOPK_H

#include "aff_core.h"

typedef struct AffScored
{
	float		score;
	int32_t		index;
} AffScored;

/*
 * A min-heap of at most k entries holding the best seen so far; its root
 * is the worst kept.  Better means a higher score, then a lower index
 * (indices follow key order, so ties go to the smaller key).
 */
typedef struct AffTopK
{
	AffScored  *heap;
	int64_t		k;
	int64_t		n;
} AffTopK;

extern void aff_topk_init(AffTopK *t, AffScored *buf, int64_t k);
extern void aff_topk_push(AffTopK *t, float score, int32_t index);
extern int64_t aff_topk_finish(AffTopK *t);

#endif
