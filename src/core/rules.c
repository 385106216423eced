/*
 * rules.c
 *		Group caps and the MMR re-ranking of a request's best items (see
 *		rules.h for the rule).  The cost is k passes over the pool plus one
 *		similarity row per chosen item when diversity > 0.
 */
#include "rules.h"

#include <math.h>
#include <string.h>

bool
aff_rules_active(const AffRules *r)
{
	return r != NULL && ((r->group != NULL && r->max_per_group > 0) || r->diversity > 0);
}

int64_t
aff_rules_rank(const AffScored *pool, int64_t n_pool, const AffRules *r, int64_t k,
			   AffSimRowFn sim_row, void *sim_arg, float *row, int32_t *counts,
			   float *work, AffScored *out)
{
	float	   *scaled = work;
	float	   *redundancy = work + n_pool;	/* max similarity to a chosen item */
	float		lo = 0,
				hi = 0;
	bool		capped = r->group != NULL && r->max_per_group > 0;
	float		d = r->diversity;
	int64_t		kept = 0;
	int64_t		c;

	if (n_pool == 0 || k == 0)
		return 0;
	hi = pool[0].score;
	lo = pool[n_pool - 1].score;
	for (c = 0; c < n_pool; c++)
	{
		/* scores are finite (aff_topk_scores offers no other) */
		scaled[c] = hi > lo ? (pool[c].score - lo) / (hi - lo) : 1.0f;
		redundancy[c] = 0;
	}
	if (capped)
		memset(counts, 0, sizeof(int32_t) * (size_t) r->n_groups);

	while (kept < k)
	{
		int64_t		best = -1;
		float		best_value = 0;

		for (c = 0; c < n_pool; c++)
		{
			int32_t		g;
			float		value;

			if (scaled[c] < 0)
				continue;		/* chosen already, or its group is full */
			g = capped ? r->group[pool[c].index] : -1;
			if (g >= 0 && counts[g] >= r->max_per_group)
			{
				scaled[c] = -1;
				continue;
			}
			if (d == 0)
			{
				best = c;		/* the pool is in score order */
				break;
			}
			value = (1 - d) * scaled[c] - d * (kept > 0 ? redundancy[c] : 0);
			if (best < 0 || value > best_value)
			{
				best = c;
				best_value = value;
			}
		}
		if (best < 0)
			break;				/* the pool is spent */
		out[kept++] = pool[best];
		scaled[best] = -1;
		if (capped && r->group[pool[best].index] >= 0)
			counts[r->group[pool[best].index]]++;
		if (d > 0 && kept < k)
		{
			sim_row(sim_arg, pool[best].index, row);
			for (c = 0; c < n_pool; c++)
			{
				float		s = row[pool[c].index];

				if (isfinite(s) && (redundancy[c] < s || kept == 1))
					redundancy[c] = s;
			}
		}
	}
	return kept;
}
