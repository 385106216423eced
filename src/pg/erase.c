/*
 * erase.c
 *		affinity.forget_user: a copy of a model without one user.
 *
 * The copy drops the user's key, vector and training list, and takes the
 * user out of the popularity counts.  Item factors and item-item weights
 * stay as they were: they were learned with the user's data, and only a
 * refit without the user's rows removes that influence (README).
 */
#include "affinity_pg.h"

#include "serving_common.h"

#include "../core/interactions.h"

/* Copy arrays of elem bytes without the range [skip_from, skip_to). */
static void *
copy_without(const void *src, int64 n, size_t elem, int64 skip_from, int64 skip_to)
{
	char	   *dst = palloc_extended(elem * Max(n - (skip_to - skip_from), 1), MCXT_ALLOC_HUGE);

	memcpy(dst, src, elem * skip_from);
	memcpy(dst + elem * skip_from, (const char *) src + elem * skip_to, elem * (n - skip_to));
	return dst;
}

PG_FUNCTION_INFO_V1(forget_user);

Datum
forget_user(PG_FUNCTION_ARGS)
{
	AffModelView v;
	AffModelParts parts;
	const AffModelHeader *h;
	int64		u;
	int64		lo;
	int64		hi;
	int64	   *ptr;
	float	   *pop;
	int64		j;
	int			k;

	model_fetch(fcinfo, 0, &v);
	h = v.h;
	u = key_arg_index(fcinfo, 1, &v, true);
	if (u < 0)
		PG_RETURN_DATUM(PG_GETARG_DATUM(0));
	if (h->n_users == 1)
		ereport(ERROR,
				(errcode(ERRCODE_INVALID_PARAMETER_VALUE),
				 errmsg("cannot forget the only user of a model"),
				 errdetail("The user asked for is the model's one user."),
				 errhint("Drop the model instead.")));
	lo = v.seen_ptr[u];
	hi = v.seen_ptr[u + 1];

	memset(&parts, 0, sizeof(parts));
	parts.h = *h;
	parts.h.n_users = h->n_users - 1;
	parts.h.nnz = h->nnz - (hi - lo);

	/* every section as it was, then the user's parts cut out */
	{
		const void *secs[AFF_SEC_MAX + 1] = {0};

		secs[AFF_SEC_ITEM_KEYS] = v.item_keys;
		secs[AFF_SEC_ITEM_FACTORS] = v.item_factors;
		secs[AFF_SEC_LOSS] = v.loss;
		secs[AFF_SEC_SWEEP_SECONDS] = v.sweep_seconds;
		secs[AFF_SEC_ITEM_WEIGHTS] = v.item_weights;
		secs[AFF_SEC_NEIGHBOR_PTR] = v.neighbor_ptr;
		secs[AFF_SEC_NEIGHBOR_IDX] = v.neighbor_idx;
		secs[AFF_SEC_NEIGHBOR_SIM] = v.neighbor_sim;
		for (k = 1; k <= AFF_SEC_MAX; k++)
			parts.data[k] = secs[k];
		parts.count[AFF_SEC_ITEM_KEYS] = h->n_items;
		parts.count[AFF_SEC_ITEM_FACTORS] = v.item_factors ? (uint64) h->n_items * h->factors : 0;
		parts.count[AFF_SEC_LOSS] = v.loss ? v.n_sweeps : 0;
		parts.count[AFF_SEC_SWEEP_SECONDS] = v.sweep_seconds ? v.n_sweeps : 0;
		parts.count[AFF_SEC_ITEM_WEIGHTS] = v.item_weights ? (uint64) h->n_items * h->n_items : 0;
		parts.count[AFF_SEC_NEIGHBOR_PTR] = v.neighbor_ptr ? h->n_items + 1 : 0;
		parts.count[AFF_SEC_NEIGHBOR_IDX] = v.neighbor_count;
		parts.count[AFF_SEC_NEIGHBOR_SIM] = v.neighbor_count;
	}
	parts.data[AFF_SEC_USER_KEYS] = copy_without(v.user_keys, h->n_users, sizeof(int64), u, u + 1);
	parts.count[AFF_SEC_USER_KEYS] = h->n_users - 1;
	if (v.user_factors)
	{
		parts.data[AFF_SEC_USER_FACTORS] =
			copy_without(v.user_factors, h->n_users * h->factors, sizeof(float),
						 u * h->factors, (u + 1) * h->factors);
		parts.count[AFF_SEC_USER_FACTORS] = (uint64) (h->n_users - 1) * h->factors;
	}
	parts.data[AFF_SEC_SEEN_ITEMS] = copy_without(v.seen_items, h->nnz, sizeof(int32), lo, hi);
	parts.data[AFF_SEC_SEEN_WEIGHTS] = copy_without(v.seen_weights, h->nnz, sizeof(float), lo, hi);
	parts.count[AFF_SEC_SEEN_ITEMS] = parts.count[AFF_SEC_SEEN_WEIGHTS] = h->nnz - (hi - lo);

	ptr = palloc_extended(sizeof(int64) * h->n_users, MCXT_ALLOC_HUGE);
	for (j = 0; j < h->n_users; j++)
		ptr[j] = j < u ? v.seen_ptr[j] : v.seen_ptr[j + 1] - (hi - lo);
	parts.data[AFF_SEC_SEEN_PTR] = ptr;
	parts.count[AFF_SEC_SEEN_PTR] = h->n_users;

	if (h->key_type == AFF_KEYS_TEXT)
	{
		int64		tlo = v.user_text_off[u];
		int64		thi = v.user_text_off[u + 1];
		int64	   *toff = palloc_extended(sizeof(int64) * h->n_users, MCXT_ALLOC_HUGE);

		for (j = 0; j < h->n_users; j++)
			toff[j] = j < u ? v.user_text_off[j] : v.user_text_off[j + 1] - (thi - tlo);
		parts.data[AFF_SEC_USER_TEXT_OFF] = toff;
		parts.count[AFF_SEC_USER_TEXT_OFF] = h->n_users;
		parts.data[AFF_SEC_USER_TEXT] = copy_without(v.user_text, v.user_text_len, 1, tlo, thi);
		parts.count[AFF_SEC_USER_TEXT] = v.user_text_len - (thi - tlo);
		parts.data[AFF_SEC_ITEM_TEXT_OFF] = v.item_text_off;
		parts.count[AFF_SEC_ITEM_TEXT_OFF] = h->n_items + 1;
		parts.data[AFF_SEC_ITEM_TEXT] = v.item_text;
		parts.count[AFF_SEC_ITEM_TEXT] = v.item_text_len;
	}

	pop = palloc_extended(sizeof(float) * h->n_items, MCXT_ALLOC_HUGE);
	memcpy(pop, v.popularity, sizeof(float) * h->n_items);
	for (j = lo; j < hi; j++)
		pop[v.seen_items[j]] = Max(pop[v.seen_items[j]] - 1.0f, 0.0f);
	parts.data[AFF_SEC_POPULARITY] = pop;
	parts.count[AFF_SEC_POPULARITY] = h->n_items;

	PG_RETURN_POINTER(model_build(&parts));
}
