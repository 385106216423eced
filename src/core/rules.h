/*
 * rules.h
 *		Rules on top of scores: at most N items per group, and a diversity
 *		re-ranking by maximal marginal relevance (Carbonell and Goldstein
 *		1998, "The use of MMR, diversity-based reranking for reordering
 *		documents and producing summaries", SIGIR 1998).
 *
 * A request's best items by score (its pool, best first) are re-ranked:
 * the list is built one item at a time, each time taking the pool item of
 * the highest
 *
 *		(1 - diversity) * s(c) - diversity * max over chosen j of sim(c, j)
 *
 * whose group is not full, where s(c) is the score scaled to [0, 1] over
 * the pool (min-max) and sim(c, j) the model's item-to-item value of c in
 * the row of the chosen item j (what items_like ranks by).  With diversity
 * 0 this is the pool in score order with the group caps applied.
 */
#ifndef AFF_RULES_H
#define AFF_RULES_H

#include <stdbool.h>
#include <stdint.h>

#include "aff_core.h"
#include "topk.h"

typedef struct AffRules
{
	const int32_t *group;		/* n_items: an item's group, -1 for none; NULL: none */
	int32_t		n_groups;
	int32_t		max_per_group;	/* 0: no cap */
	float		diversity;		/* in [0, 1]; 0: scores only */
	int64_t		pool;			/* how many of the best are re-ranked (>= k) */
} AffRules;

/* row[0 .. n_items) = the similarity of every item to item it */
typedef void (*AffSimRowFn) (void *arg, int64_t it, float *row);

/*
 * The rules' best k of pool[0 .. n_pool) (best first, as aff_topk_finish
 * leaves them) into out (k entries, in the new order, with their own
 * scores); returns how many were kept.  sim_row (called once per chosen
 * item, only when diversity > 0) fills row (n_items floats); counts has
 * n_groups entries of scratch and work n_pool * 2 floats.  Runs engine
 * code only: it may run on a worker thread.
 */
extern int64_t aff_rules_rank(const AffScored *pool, int64_t n_pool, const AffRules *r,
							  int64_t k, AffSimRowFn sim_row, void *sim_arg, float *row,
							  int32_t *counts, float *work, AffScored *out);

extern bool aff_rules_active(const AffRules *r);

#endif							/* AFF_RULES_H */
